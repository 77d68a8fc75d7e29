#!/usr/bin/env python3
# SPDX-License-Identifier: Apache-2.0
"""Write the demo's joint-space reference (``config/demo/reference.csv``) from the scenario.

The nominal pass of ``config/demo/scenario.yaml`` (straight, along the nominal edge, timed
rest to rest; see `adaptive_streamer.sim.nominal_path`) is solved with the demo
arm's inverse kinematics at every ``pass.sample_period`` and written as ``time,j1,...,j6``
(seconds, radians). The script then checks the pass against ``config/demo/limits.yaml``
densely, two ways, and prints the peak ratios per joint:

- finite differences of the IK solution on a 2 ms grid (central differences);
- the quintic interpolating spline through the CSV rows with zero velocity and
  acceleration at both ends (``scipy.interpolate.make_interp_spline``, what a reference
  reader fits), evaluated on a 1 ms grid.

It exits with status 1 if any ratio exceeds ``--max-ratio`` (default 0.5) or a position
leaves its range.

    python scripts/make_demo_reference.py [--scenario FILE] [--limits FILE] [--out FILE]
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy.interpolate import make_interp_spline

from adaptive_streamer.core.limits import JointLimits, LimitsError
from adaptive_streamer.sim.arm import DEMO_ARM
from adaptive_streamer.sim.config import ScenarioError, load_scenario
from adaptive_streamer.sim.nominal_path import PathError, nominal_joint_path

ROOT = Path(__file__).resolve().parents[1]
FD_STEP = 0.002      # s, finite-difference grid
SPLINE_STEP = 0.001  # s, spline evaluation grid


def pass_times(duration: float, period: float) -> np.ndarray:
    """Sample times 0, period, ..., ending exactly at ``duration``."""
    count = int(np.floor(duration / period + 1e-9))
    times = np.arange(count + 1) * period
    return times if abs(times[-1] - duration) < 1e-9 else np.append(times, duration)


def finite_difference_peaks(q: np.ndarray, h: float) -> np.ndarray:
    """Peak |v|, |a|, |j| (3, n) of uniformly sampled q (N, n) by central differences."""
    v = (q[2:] - q[:-2]) / (2 * h)
    a = (q[2:] - 2 * q[1:-1] + q[:-2]) / h ** 2
    j = (q[4:] - 2 * q[3:-1] + 2 * q[1:-3] - q[:-4]) / (2 * h ** 3)
    return np.array([np.abs(x).max(axis=0) for x in (v, a, j)])


def spline_peaks(times: np.ndarray, q: np.ndarray, h: float) -> np.ndarray:
    """Peak |v|, |a|, |j| (3, n) of the rest-ended quintic spline through (times, q)."""
    rest = [(1, np.zeros(q.shape[1])), (2, np.zeros(q.shape[1]))]
    spline = make_interp_spline(times, q, k=5, bc_type=(rest, rest))
    grid = np.arange(0.0, times[-1], h)
    return np.array([np.abs(spline(grid, m)).max(axis=0) for m in (1, 2, 3)])


def print_ratios(title: str, peaks: np.ndarray, limits: JointLimits) -> float:
    """Print peak/limit in percent per joint; return the largest ratio."""
    bounds = np.array([limits.velocity_max, limits.acceleration_max, limits.jerk_max])
    ratios = peaks / bounds
    print(f"{title}: peak / limit [%]")
    print("  joint " + " ".join(f"{n:>7}" for n in limits.names))
    for label, row in zip(("v", "a", "j"), ratios):
        print(f"  {label:5} " + " ".join(f"{100 * r:7.2f}" for r in row))
    return float(ratios.max())


def main(argv: list[str] | None = None) -> int:
    """Entry point; see the module docstring."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--scenario", type=Path, default=ROOT / "config/demo/scenario.yaml")
    ap.add_argument("--limits", type=Path, default=ROOT / "config/demo/limits.yaml")
    ap.add_argument("--out", type=Path, default=ROOT / "config/demo/reference.csv")
    ap.add_argument("--max-ratio", type=float, default=0.5,
                    help="fail if any peak v/a/j exceeds this fraction of its limit")
    args = ap.parse_args(argv)
    try:
        scenario = load_scenario(args.scenario)
        limits = JointLimits.from_file(args.limits)
        if tuple(limits.names) != DEMO_ARM.joints:
            raise LimitsError(f"{args.limits}: joints {list(limits.names)}, expected "
                              f"{list(DEMO_ARM.joints)}")
        cfg, top = scenario.nominal_pass, scenario.nominal_panel.top_height
        times = pass_times(cfg.duration, cfg.sample_period)
        q = nominal_joint_path(cfg, DEMO_ARM, top, times)
        fine = np.arange(0.0, cfg.duration + FD_STEP / 2, FD_STEP)
        q_fine = nominal_joint_path(cfg, DEMO_ARM, top, fine)
    except (ScenarioError, LimitsError, PathError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    rows = np.column_stack([times, np.round(q, 10) + 0.0])   # + 0.0: no '-0.0' in the file
    header = "time," + ",".join(DEMO_ARM.joints)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    np.savetxt(args.out, rows, delimiter=",", header=header, comments="",
               fmt=["%.4f"] + ["%.10f"] * q.shape[1])
    print(f"wrote {args.out}: {len(times)} rows, {cfg.duration:.3f} s, "
          f"pass {cfg.length:.3f} m at {1000 * cfg.cruise_speed:.0f} mm/s cruise")
    print("initial positions [rad]: [" + ", ".join(f"{x:.6f}" for x in q[0]) + "]")
    worst = max(print_ratios("finite differences (2 ms, IK)", finite_difference_peaks(q_fine,
                                                                                     FD_STEP),
                             limits),
                print_ratios("quintic spline through the CSV (1 ms)",
                             spline_peaks(times, q, SPLINE_STEP), limits))
    lo, hi = q_fine.min(axis=0), q_fine.max(axis=0)
    margin = np.minimum(lo - limits.position_min, limits.position_max - hi)
    print("position margin to the range [rad]: "
          + " ".join(f"{n}={m:.3f}" for n, m in zip(limits.names, margin)))
    if worst > args.max_ratio or (margin <= 0).any():
        print(f"error: the pass is not within {100 * args.max_ratio:.0f}% of the limits",
              file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
