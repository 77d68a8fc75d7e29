# SPDX-License-Identifier: Apache-2.0
"""Speed of one decision cycle for a 7-joint arm at a 50 ms decision period.

Times, per decision, ``DecisionCycle.step`` (reference alignment, policy, limit stage,
segment, deviation check, commit) and ``StreamingSession.decide`` (the adapter's call: the
input checks, the cycle, the plan commit under the lock) with:

* a 2x64 tanh ONNX MLP (every observation block kind, H = 5, two feedback features,
  normalised actions; seeded random weights written with onnx.helper, as in
  bench/policy_speed.py) run by onnxruntime;
* the tracker.

The plan follows a smooth looping reference (windows precomputed, so their generation is
not timed); the deviation and following-error thresholds are opened wide so that the random
MLP keeps deciding instead of stopping. Each figure is the round with the lowest median of
``ROUNDS`` rounds of ``STEPS`` decisions, every decision timed on its own.
Target (issue): median <= 150 us for the MLP cycle.
Run: ``.venv/bin/python bench/cycle_speed.py``.
"""
from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from policy_speed import FEATURES, HORIZON, N, PERIOD, arm_limits, write_cards, write_mlp  # noqa: E402

from adaptive_streamer.core.cycle import CycleConfig, DecisionCycle  # noqa: E402
from adaptive_streamer.core.feedback import FeatureVector  # noqa: E402
from adaptive_streamer.core.playback import Playback  # noqa: E402
from adaptive_streamer.core.policies import RunningConfig, load_policy, policy_for_kind  # noqa: E402
from adaptive_streamer.core.reference import ReferenceTrajectory  # noqa: E402
from adaptive_streamer.core.segment import MotionState  # noqa: E402
from adaptive_streamer.core.session import SessionInputs, StreamingSession, make_stages  # noqa: E402
from adaptive_streamer.core.watchdog import Watchdog, WatchdogConfig  # noqa: E402

STEPS = 2000
ROUNDS = 3
T0 = 1_796_000_000.0
WIDE = WatchdogConfig(deviation_joint=1e3, deviation_norm=1e3, following_error=1e3)


def windows(limits, count: int) -> list:
    """Reference windows at the decision instants of a looping 4 s lap."""
    t = np.arange(0.0, 4.0 + 1e-9, 0.01)
    centre = 0.5 * (np.where(np.isfinite(limits.position_min), limits.position_min, 0.0)
                    + np.where(np.isfinite(limits.position_max), limits.position_max, 0.0))
    p = centre + np.outer(0.5 * (1 - np.cos(2 * np.pi * t / 4.0)), np.full(N, 0.3))
    pb = Playback(ReferenceTrajectory(limits.names, t, p, ends="periodic"), PERIOD, HORIZON + 7,
                  end_mode="loop")
    pb.start(T0 - PERIOD)
    # stamped half a period before each decision instant, as the live reference server's
    # windows arrive (they are not in phase with the adapter's decisions)
    return [pb.window(T0 + (k - 0.5) * PERIOD) for k in range(count)], centre


def time_cycle(policy, limits, run: RunningConfig, ws: list, centre: np.ndarray) -> tuple:
    """Microseconds per DecisionCycle.step, and the share of decisions in 'following'."""
    stage, approach_stage = make_stages(limits, PERIOD, 1.0, 0.3)
    cycle = DecisionCycle(stage, approach_stage, policy, policy_for_kind("tracker", run),
                          Watchdog(WIDE, limits.names), CycleConfig(horizon=HORIZON + 5))
    cycle.begin_following(T0, MotionState(centre.copy(), np.zeros(N), np.zeros(N)))
    fb = FeatureVector(FEATURES, np.array([0.002, 0.01]), np.ones(2, bool), T0)
    out, following = np.empty(len(ws)), 0
    clock = time.perf_counter_ns
    for k, w in enumerate(ws):
        t0 = clock()
        d = cycle.step(w, fb)
        out[k] = clock() - t0
        following += d.mode == "following"
    return out / 1e3, following / len(ws)


def time_session(policy, limits, run: RunningConfig, ws: list, centre: np.ndarray) -> tuple:
    """Microseconds per StreamingSession.decide (the adapter's decision call)."""
    s = StreamingSession(limits, PERIOD, policy, policy_for_kind("tracker", run),
                         CycleConfig(horizon=HORIZON + 5), WIDE)
    s.begin(T0, MotionState(centre.copy(), np.zeros(N), np.zeros(N)))
    s.cycle.mode = "following"
    fb = FeatureVector(FEATURES, np.array([0.002, 0.01]), np.ones(2, bool), T0)
    out, following = np.empty(len(ws)), 0
    clock = time.perf_counter_ns
    for k, w in enumerate(ws):
        now = s.next_decision_time - PERIOD
        inputs = SessionInputs(w, now, fb, now, s.cycle.state.position, now, now)
        t0 = clock()
        d = s.decide(now, inputs)
        out[k] = clock() - t0
        following += d is not None and d.mode == "following"
    return out / 1e3, following / len(ws)


def main() -> None:
    """Print the figures."""
    limits = arm_limits()
    run = RunningConfig(limits.names, PERIOD, limits, HORIZON + 5, FEATURES)
    ws, centre = windows(limits, STEPS + 200)
    with tempfile.TemporaryDirectory() as tmp:
        onnx_card, _ = write_cards(Path(tmp), limits)
        size = N * (3 + 2 * HORIZON + 2 + 1) + 2 * len(FEATURES)
        write_mlp(Path(tmp) / "mlp.onnx", size, N)
        policies = {"onnx 2x64 MLP": lambda: load_policy(onnx_card, run),
                    "tracker": lambda: policy_for_kind("tracker", run)}
        print(f"decision cycle speed: {N} joints, period {PERIOD * 1e3:.0f} ms, {STEPS} "
              f"decisions per round, best of {ROUNDS} rounds, us per decision")
        for label, make in policies.items():
            for what, fn in (("DecisionCycle.step", time_cycle),
                             ("StreamingSession.decide", time_session)):
                best = None
                for _ in range(ROUNDS):
                    t, share = fn(make(), limits, run, ws, centre)
                    t = t[200:]  # warm-up
                    if best is None or np.median(t) < np.median(best[0]):
                        best = (t, share)
                t, share = best
                print(f"  {label:14s} {what:24s} median {np.median(t):6.1f}  "
                      f"p99 {np.percentile(t, 99):6.1f}  (following {share:.0%})")
    print("  target: median <= 150 us (MLP)")


if __name__ == "__main__":
    main()
