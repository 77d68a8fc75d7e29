# SPDX-License-Identifier: Apache-2.0
"""Policy-card load time: what a policy swap costs before its parameter answer goes out.

Loads the demo's cards (`load_policy`: parse, checks against the running configuration,
model session, test inference) as the adapter does for a swap, with the YAML loader the
package uses (libyaml's for short texts, `adaptive_streamer.core.text_files`) and, in the
same run, with the pure-Python loader for comparison, and prints the median and the worst
of ``ROUNDS`` loads of each and their ratio. While the arm moves, a swap must load within
half a decision period (25 ms at 50 ms), or it is refused. Also how long libyaml's part
of parsing a text of the largest size the C loader takes holds the interpreter in one
piece (the stream thread may wait that long). Run: ``.venv/bin/python bench/card_load.py``.
"""
from __future__ import annotations

import os
import statistics
import time
from unittest import mock

import yaml

from adaptive_streamer.core import text_files
from adaptive_streamer.core.adapter_setup import DEFAULTS, build_session
from adaptive_streamer.core.policies import load_policy
from adaptive_streamer.share import demo_file

ROUNDS = 30
CARDS = ("policy_edge.yaml", "policy_feedback.yaml")


def load_times(card: str, running: object) -> list[float]:
    """Seconds per load of ``card``, ``ROUNDS`` loads after one warm-up."""
    load_policy(demo_file(card), running)
    out = []
    for _ in range(ROUNDS):
        t0 = time.perf_counter()
        load_policy(demo_file(card), running)
        out.append(time.perf_counter() - t0)
    return out


def main() -> None:
    """Print the figures."""
    params = dict(DEFAULTS, limits_file=str(demo_file("limits.yaml")),
                  policy=str(demo_file("policy_edge.yaml")))
    running = build_session(params).running
    print(f"policy card loads ({ROUNDS} each, median / worst), load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    for card in CARDS:
        fast = load_times(card, running)
        with mock.patch.object(text_files, "_C_LOADER", None):   # the Python loader only
            slow = load_times(card, running)
        print(f"  {card}: {statistics.median(fast) * 1e3:5.2f} / {max(fast) * 1e3:5.2f} ms "
              f"(Python YAML loader: {statistics.median(slow) * 1e3:5.2f} / "
              f"{max(slow) * 1e3:5.2f} ms; {statistics.median(slow) / statistics.median(fast):.1f}x)")
    text = "items:\n" + "".join(f"  - [{i}.5, {i}.25]\n"
                                for i in range(text_files.C_LOADER_MAX // 20))
    text = text[:text_files.C_LOADER_MAX - 1].rsplit("\n", 1)[0] + "\n"
    held = []
    for _ in range(ROUNDS):   # the C part: scanning, parsing, composing (the constructor
        t0 = time.perf_counter()   # that follows is Python code, which lets threads in)
        yaml.compose(text, Loader=yaml.CSafeLoader)
        held.append(time.perf_counter() - t0)
    print(f"  libyaml's part of parsing {len(text):,} bytes (the most the C loader takes) "
          f"holds the interpreter {statistics.median(held) * 1e3:.2f} ms (median; worst "
          f"{max(held) * 1e3:.2f} ms)")


if __name__ == "__main__":
    main()
