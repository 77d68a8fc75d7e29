# SPDX-License-Identifier: Apache-2.0
"""Plan messages written straight into CDR bytes (`io.plan_messages.PlanEncoder`) are the
message rclpy would serialise: checked against ``rclpy.serialization`` (the reference
implementation of ROS 2 message serialisation) both ways, for several knot counts and a
driver joint order that differs from the adapter's (rclpy's deserialiser reads the bytes
back, and the message rclpy builds for the same plan compares equal)."""
from __future__ import annotations

import numpy as np
from rclpy.serialization import deserialize_message, serialize_message
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from adaptive_streamer.core.plan_ahead import PlanKnots
from adaptive_streamer.io.plan_messages import PlanEncoder

NAMES = ["j1", "j2", "j3", "j4", "j5", "j6"]


def _knots(m: int, rng: np.random.Generator) -> PlanKnots:
    p, v, a = rng.normal(size=(3, m, len(NAMES)))
    return PlanKnots(1_796_000_000_123_456_789 + m, 50_000_000, p, v, a, ())


def test_encoded_plans_are_what_rclpy_serialises():
    rng = np.random.default_rng(11)
    index = np.array([5, 0, 1, 2, 3, 4])             # the driver lists j6 first
    order = [NAMES[i] for i in index]
    encoder = PlanEncoder(order)
    for m in (1, 2, 5, 12, 5):
        knots = _knots(m, rng)
        raw = encoder.encode(knots, index)
        msg = deserialize_message(raw, JointTrajectory)
        assert list(msg.joint_names) == order
        assert (msg.header.stamp.sec, msg.header.stamp.nanosec) == divmod(knots.stamp_ns, 10**9)
        assert len(msg.points) == m
        for i, pt in enumerate(msg.points):
            np.testing.assert_array_equal(pt.positions, knots.positions[i, index])
            np.testing.assert_array_equal(pt.velocities, knots.velocities[i, index])
            np.testing.assert_array_equal(pt.accelerations, knots.accelerations[i, index])
            assert len(pt.effort) == 0
            assert pt.time_from_start.sec * 10**9 + pt.time_from_start.nanosec == i * 50_000_000
        # the same message built with rclpy: equal field by field, and the same size as
        # rclpy serialises it (whose buffer may carry trailing bytes, and padding bytes it
        # does not clear)
        ref = JointTrajectory(joint_names=order)
        ref.header.stamp.sec, ref.header.stamp.nanosec = divmod(knots.stamp_ns, 10**9)
        for i in range(m):
            pt = JointTrajectoryPoint(positions=knots.positions[i, index].tolist(),
                                      velocities=knots.velocities[i, index].tolist(),
                                      accelerations=knots.accelerations[i, index].tolist())
            pt.time_from_start.sec, pt.time_from_start.nanosec = divmod(i * 50_000_000, 10**9)
            ref.points.append(pt)
        assert msg == ref
        assert deserialize_message(serialize_message(ref), JointTrajectory) == msg
