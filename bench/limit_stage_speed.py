# SPDX-License-Identifier: Apache-2.0
"""Speed of `LimitStage.admissible_range` for a 7-joint arm, next to ruckig in the same run.

Prints the median and p90 time per call for three state sets: random viable states (uniform
over the box, kept when viable), states near the position-viability boundary of every
joint (the slow path), and the joints far from every position limit; then the time of
one 7-DoF time-optimal trajectory calculation by the ruckig library (PyPI) for random
targets, and the ratio. Run: ``.venv/bin/python bench/limit_stage_speed.py``.
"""
from __future__ import annotations

import time

import numpy as np
import ruckig

from adaptive_streamer.core.limit_stage import LimitStage
from adaptive_streamer.core.limits import JointLimits

N = 7
PERIOD = 0.05  # decision period, common practice
REPEAT = 20


def arm_limits() -> JointLimits:
    """Invented 7-joint limits (made-up irregular values)."""
    return JointLimits([f"j{i + 1}" for i in range(N)],
                       [-2.71, -1.54, -2.48, -2.64, -2.93, -0.58, -2.77],
                       [2.63, 1.92, 2.86, 0.29, 2.51, 3.21, 2.69],
                       [1.37, 1.61, 1.83, 2.06, 2.44, 2.71, 2.9],
                       [6.3, 4.7, 7.9, 5.8, 9.2, 11.4, 10.6],
                       [71.0, 43.0, 66.0, 58.0, 87.0, 104.0, 113.0])


def time_calls(fn, states) -> np.ndarray:
    """Per-call microseconds for each state (mean of REPEAT calls)."""
    out = []
    for s in states:
        t0 = time.perf_counter_ns()
        for _ in range(REPEAT):
            fn(*s)
        out.append((time.perf_counter_ns() - t0) / REPEAT / 1e3)
    return np.array(out)


def state_sets(stage: LimitStage, rng: np.random.Generator, count: int) -> dict[str, list]:
    """Random viable, near-boundary and far-from-limits 7-joint states."""
    lim = stage.limits
    V, A = lim.velocity_max, stage.acceleration_limit
    sets: dict[str, list] = {"random viable": [], "all joints near a position limit": [],
                             "far from position limits": []}
    while len(sets["random viable"]) < count:
        p = rng.uniform(lim.position_min, lim.position_max)
        v, a = rng.uniform(-V, V), rng.uniform(-A, A)
        if stage.evaluate(p, v, a).viable.all():
            sets["random viable"].append((p, v, a))
    while len(sets["all joints near a position limit"]) < count:
        v, a = rng.uniform(0.2, 1.0) * V, rng.uniform(-0.5, 0.5) * A
        lo, hi = lim.position_min.copy(), lim.position_max.copy()
        for _ in range(40):  # bisect towards the highest viable position per joint
            mid = 0.5 * (lo + hi)
            ok = stage.evaluate(mid, v, a).viable
            lo, hi = np.where(ok, mid, lo), np.where(ok, hi, mid)
        p = lo - rng.uniform(0.0, 0.02, N)
        if stage.evaluate(p, v, a).viable.all():
            sets["all joints near a position limit"].append((p, v, a))
    centre = 0.5 * (lim.position_min + lim.position_max)
    while len(sets["far from position limits"]) < count:
        p = centre + rng.uniform(-0.05, 0.05, N)
        v, a = rng.uniform(-0.3, 0.3) * V, rng.uniform(-0.3, 0.3) * A
        sets["far from position limits"].append((p, v, a))
    return sets


def ruckig_times(lim: JointLimits, rng: np.random.Generator, count: int) -> np.ndarray:
    """Per-call microseconds of one 7-DoF ruckig calculation (random state and target)."""
    otg = ruckig.Ruckig(N)
    inp, traj = ruckig.InputParameter(N), ruckig.Trajectory(N)
    inp.max_velocity = lim.velocity_max.tolist()
    inp.max_acceleration = lim.acceleration_max.tolist()
    inp.max_jerk = lim.jerk_max.tolist()
    out = []
    for _ in range(count):
        inp.current_position = rng.uniform(-1, 1, N).tolist()
        inp.current_velocity = rng.uniform(-0.5, 0.5, N).tolist()
        inp.target_position = rng.uniform(-1, 1, N).tolist()
        t0 = time.perf_counter_ns()
        for _ in range(REPEAT):
            otg.calculate(inp, traj)
        out.append((time.perf_counter_ns() - t0) / REPEAT / 1e3)
    return np.array(out)


def main() -> None:
    """Print the figures."""
    rng = np.random.default_rng(7)
    stage = LimitStage(arm_limits(), PERIOD)
    print(f"limit stage speed: {N} joints, period {PERIOD * 1e3:.0f} ms, "
          f"{REPEAT} calls per state, us per call")
    ref = np.median(ruckig_times(stage.limits, rng, 300))
    for label, states in state_sets(stage, rng, 1000).items():
        t = time_calls(stage.admissible_range, states)
        print(f"  {label:34s} median {np.median(t):6.1f}  p90 {np.percentile(t, 90):6.1f}  "
              f"(x{np.median(t) / ref:.2f} of one ruckig calculation)")
    print(f"  {'ruckig 7-DoF calculation':34s} median {ref:6.1f}")


if __name__ == "__main__":
    main()
