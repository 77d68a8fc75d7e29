# SPDX-License-Identifier: Apache-2.0
"""Cost of merging ``joint_states`` split over several messages, per decision.

A driver publishes 6 arm joints + 2 gripper fingers in one message at 500 Hz and a wrist
joint alone at 50 Hz; at a 50 ms decision period 25 arm and 2-3 wrist messages reach the
adapter's `JointStateMerger` between two decisions; it keeps the latest of each name set and
parses those (two here) when the decision asks for the state. Printed: the time of one `add` and of one
`state` (the best of ``ROUNDS`` rounds of ``STEPS`` decisions: a loaded machine
only adds to it), with the exact CDR decoder the
adapter uses and with rclpy's deserializer.
Run: ``.venv/bin/python bench/joint_states_merge.py``.
"""
from __future__ import annotations

import time

from rclpy.serialization import serialize_message
from sensor_msgs.msg import JointState

from adaptive_streamer.io.joint_states import JointStateMerger, cdr_decoder, ros_fields

JOINTS = ["a1", "a2", "a3", "a4", "a5", "a6", "wrist"]
ARM_MSG = serialize_message(JointState(name=["f2", "a3", "a1", "f1", "a2", "a6", "a5", "a4"],
                                       position=[0.01, 0.3, 0.1, 0.01, 0.2, 0.6, 0.5, 0.4]))
WRIST_MSG = serialize_message(JointState(name=["wrist"], position=[0.7], effort=[0.1]))
ROUNDS, STEPS = 9, 300


def run(decoder_name: str) -> tuple[float, float]:
    """(us per add, us per state), best round, for one decoder."""
    adds, states = [], []
    for _ in range(ROUNDS):
        m = JointStateMerger(JOINTS, decode=cdr_decoder() if decoder_name == "cdr"
                             else ros_fields)
        t_add = t_state = 0.0
        for k in range(STEPS):
            t0 = time.perf_counter()
            for i in range(25):
                m.add(ARM_MSG, k + i * 0.002)
                if i % 10 == 5:
                    m.add(WRIST_MSG, k + i * 0.002)
            t1 = time.perf_counter()
            m.state()
            t2 = time.perf_counter()
            t_add += (t1 - t0) / 27.5
            t_state += t2 - t1
        adds.append(t_add / STEPS * 1e6)
        states.append(t_state / STEPS * 1e6)
    return min(adds), min(states)


def main() -> None:
    """Print the figures."""
    for name in ("cdr", "rclpy"):
        add, state = run(name)
        print(f"{name:6s} decoder: add {add:6.2f} us/message, state {state:7.1f} us/decision "
              "(25 arm + 2-3 wrist messages pending)")


if __name__ == "__main__":
    main()
