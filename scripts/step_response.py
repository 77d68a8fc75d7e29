#!/usr/bin/env python3
# SPDX-License-Identifier: Apache-2.0
"""Step response of the demo's lateral loop: a panel placed 10 mm off nominal (no angle),
the reference held at its start, the policy correcting; prints the overshoot, the largest
error after 1 s and when the error last leaves +-0.5 mm (offline closed loop, simulated time).

Run: ``.venv/bin/python scripts/step_response.py [CARD ...]`` (default: the demo's linear
feedback and learned cards).
"""
from __future__ import annotations

import argparse

import numpy as np

from adaptive_streamer.share import demo_file
from adaptive_streamer.sim.closed_loop import CellSettings, run_closed_loop
from adaptive_streamer.sim.config import load_scenario

OFFSET_MM = 10.0
BAND_MM = 0.5


def main() -> int:
    """Print one line per card."""
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("cards", nargs="*", default=[str(demo_file("policy_feedback.yaml")),
                                                 str(demo_file("policy_edge.yaml"))])
    ap.add_argument("--duration", type=float, default=5.0)
    args = ap.parse_args()
    panel = load_scenario().panel(0, offset_mm=OFFSET_MM, angle_deg=0.0)
    hold = CellSettings(start_delay=1e3)   # the pass never starts: the reference stays put
    for card in args.cards:
        r = run_closed_loop(card, 0, duration=args.duration, settings=hold, panel=panel)
        t = r.measured_times - r.measured_times[0]
        e = r.lateral * 1e3
        over = max(0.0, float(np.max(e * np.sign(-e[0])))) / abs(e[0])
        outside = np.flatnonzero(np.abs(e) > BAND_MM)
        print(f"{card}: initial {e[0]:+.2f} mm, overshoot {100 * over:.1f}%, largest |error| "
              f"after 1 s {np.abs(e[t >= 1.0]).max():.2f} mm, last outside +-{BAND_MM} mm at "
              f"{t[outside[-1]] if outside.size else 0.0:.2f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
