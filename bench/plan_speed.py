# SPDX-License-Identifier: Apache-2.0
"""Cost of the plan-ahead output per decision, for a 7-joint arm at a 50 ms period.

Times, per decision and in the same run:

* ``StreamingSession.decide`` with the tracker, without the plan output (the reference);
* the same with the plan output enabled (`enable_plan_ahead`): the difference is the cost
  of building the plan message (the committed segment and the braking continuation to
  rest, `adaptive_streamer.core.plan_ahead.plan_knots`);
* serialising the ``JointTrajectory`` (`io.plan_messages.PlanEncoder`) and publishing the
  bytes on a real rclpy publisher with a subscriber in another node of this process (DDS,
  loopback).

The reference is the smooth looping pass of bench/cycle_speed.py, at speeds that make the
braking continuation a few to a dozen knots long. Each figure is the best median of
``ROUNDS`` rounds. Target (issue #12): build + publish median <= 0.2 ms.
Run: ``.venv/bin/python bench/plan_speed.py``.
"""
from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from cycle_speed import WIDE, windows  # noqa: E402
from policy_speed import FEATURES, HORIZON, N, PERIOD, arm_limits  # noqa: E402

from adaptive_streamer.core.cycle import CycleConfig  # noqa: E402
from adaptive_streamer.core.feedback import FeatureVector  # noqa: E402
from adaptive_streamer.core.policies import RunningConfig, policy_for_kind  # noqa: E402
from adaptive_streamer.core.segment import MotionState  # noqa: E402
from adaptive_streamer.core.session import SessionInputs, StreamingSession  # noqa: E402

STEPS = 1500
ROUNDS = 3


def time_decide(limits, run: RunningConfig, ws: list, centre: np.ndarray, plan: bool
                ) -> tuple[np.ndarray, list]:
    """Microseconds per decide (with or without the plan output) and the plans made."""
    s = StreamingSession(limits, PERIOD, policy_for_kind("tracker", run),
                         policy_for_kind("tracker", run), CycleConfig(horizon=HORIZON + 5), WIDE)
    if plan:
        s.enable_plan_ahead(0.01)
    s.begin(ws[0].stamp, MotionState(centre.copy(), np.zeros(N), np.zeros(N)))
    s.cycle.mode = "following"
    fb = FeatureVector(FEATURES, np.array([0.002, 0.01]), np.ones(2, bool), ws[0].stamp)
    out, plans = np.empty(len(ws)), []
    clock = time.perf_counter_ns
    for k, w in enumerate(ws):
        now = s.next_decision_time - PERIOD
        inputs = SessionInputs(w, now, fb, now, s.cycle.state.position, now, now)
        t0 = clock()
        s.decide(now, inputs)
        out[k] = clock() - t0
        if plan:
            plans.append(s.last_plan)
    return out / 1e3, plans


def time_publish(plans: list, names: list[str]) -> np.ndarray:
    """Microseconds per fill_plan + publish on a real publisher with a subscriber."""
    import rclpy
    from rclpy.executors import SingleThreadedExecutor
    from trajectory_msgs.msg import JointTrajectory

    from adaptive_streamer.io.plan_messages import PlanEncoder
    from adaptive_streamer.nodes.common import reliable_qos

    os.environ.setdefault("ROS_AUTOMATIC_DISCOVERY_RANGE", "LOCALHOST")
    rclpy.init()
    try:
        pub_node, sub_node = rclpy.create_node("plan_bench_pub"), rclpy.create_node("plan_bench_sub")
        got = []
        sub_node.create_subscription(JointTrajectory, "bench/plan", got.append, reliable_qos(10))
        pub = pub_node.create_publisher(JointTrajectory, "bench/plan", reliable_qos(1))
        ex = SingleThreadedExecutor()
        ex.add_node(sub_node)
        deadline = time.monotonic() + 10.0
        while pub.get_subscription_count() == 0 and time.monotonic() < deadline:
            ex.spin_once(timeout_sec=0.05)
        encoder, index = PlanEncoder(names), np.arange(len(names))
        out = np.empty(len(plans))
        clock = time.perf_counter_ns
        for k, knots in enumerate(plans):
            t0 = clock()
            pub.publish(encoder.encode(knots, index))
            out[k] = clock() - t0
            ex.spin_once(timeout_sec=0.0)
        pub_node.destroy_node()
        sub_node.destroy_node()
    finally:
        rclpy.shutdown()
    return out / 1e3


def main() -> None:
    """Print the figures."""
    limits = arm_limits()
    run = RunningConfig(limits.names, PERIOD, limits, HORIZON + 5, FEATURES)
    ws, centre = windows(limits, STEPS + 100)
    best: dict[str, np.ndarray] = {}
    plans: list = []
    for _ in range(ROUNDS):
        ref, _ = time_decide(limits, run, ws, centre, plan=False)
        with_plan, made = time_decide(limits, run, ws, centre, plan=True)
        for key, t in (("decide", ref[100:]), ("decide+plan", with_plan[100:])):
            if key not in best or np.median(t) < np.median(best[key]):
                best[key] = t
        plans = made[100:]
    pub = time_publish(plans, list(limits.names))
    knots = np.array([len(p.positions) for p in plans])
    build = np.median(best["decide+plan"]) - np.median(best["decide"])
    total = build + np.median(pub)
    print(f"plan-ahead output: {N} joints, period {PERIOD * 1e3:.0f} ms, {STEPS} decisions, "
          f"best median of {ROUNDS} rounds, us per decision")
    print(f"  knots per plan          median {np.median(knots):.0f}  max {knots.max()}")
    print(f"  decide (reference)      median {np.median(best['decide']):6.1f}  "
          f"p99 {np.percentile(best['decide'], 99):6.1f}")
    print(f"  decide + plan build     median {np.median(best['decide+plan']):6.1f}  "
          f"p99 {np.percentile(best['decide+plan'], 99):6.1f}")
    print(f"  encode + publish (DDS)  median {np.median(pub):6.1f}  "
          f"p99 {np.percentile(pub, 99):6.1f}")
    print(f"  build + publish         median {total:6.1f} us = {total / 1e3:.3f} ms "
          f"(target <= 0.2 ms); {total / np.median(best['decide']):.2f}x the decision itself")


if __name__ == "__main__":
    main()
