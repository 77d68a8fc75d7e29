# SPDX-License-Identifier: Apache-2.0
"""Replay's message reading against the reference (de)serialisers.

The fast layout readers (`io.fast_cdr`, `io.messages`) must give exactly what the
node gets from rclpy: checked against ``rclpy.serialization`` (the ROS 2 middleware's own
CDR, Fast CDR in Jazzy) and ``rosbags`` (an independent implementation), on random
messages including empty arrays and the trailing bytes rclpy leaves after a message.
"""
import numpy as np
from hypothesis import given, settings, strategies as st
from rclpy.serialization import deserialize_message, serialize_message
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray, MultiArrayDimension
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from adaptive_streamer.core import decision_record
from adaptive_streamer.core.cycle import Decision
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.io.trajectory_conversions import TrajectoryMessageError, msg_to_window
from adaptive_streamer.io import fast_cdr
from adaptive_streamer.io.bag_io import decode, encode
from adaptive_streamer.io.messages import JointStateReader, WindowReader, decision_records

import pytest

floats = st.floats(allow_nan=True, allow_infinity=True, width=64)
names = st.lists(st.text("abcxyz_", min_size=1, max_size=6), min_size=1, max_size=7,
                 unique=True)


@st.composite
def trajectories(draw):
    joints = draw(names)
    n = len(joints)
    msg = JointTrajectory()
    msg.header.stamp.sec = draw(st.integers(0, 2 ** 31 - 1))
    msg.header.stamp.nanosec = draw(st.integers(0, 999_999_999))
    msg.header.frame_id = draw(st.text("abc", max_size=5))
    msg.joint_names = joints
    points = []
    for _ in range(draw(st.integers(1, 12))):
        p = JointTrajectoryPoint()
        p.positions = draw(st.lists(floats, min_size=n, max_size=n))
        p.velocities = draw(st.lists(floats, min_size=n, max_size=n))
        p.accelerations = draw(st.lists(floats, min_size=n, max_size=n))
        p.effort = draw(st.lists(floats, max_size=2))
        p.time_from_start.sec = draw(st.integers(-3, 3))
        p.time_from_start.nanosec = draw(st.integers(0, 999_999_999))
        points.append(p)
    msg.points = points
    return msg


def same(a, b):
    return a.stamp == b.stamp and a.names == b.names and all(
        x.shape == y.shape and np.array_equal(x, y, equal_nan=True) for x, y in zip(a[1:5], b[1:5]))


@settings(max_examples=60, deadline=None)
@given(trajectories(), st.randoms())
def test_window_reader_matches_rclpy(msg, rnd):
    # reference: rclpy's own deserialisation + the node's msg_to_window
    raw = serialize_message(msg)
    joints = list(msg.joint_names)
    rnd.shuffle(joints)
    expected = msg_to_window(deserialize_message(raw, JointTrajectory), joints)
    reader = WindowReader(joints)
    assert same(reader.read(raw), expected)          # first message: walked
    assert same(reader.read(raw), expected)          # same layout: gathered
    exact = encode(decode(raw, "trajectory_msgs/msg/JointTrajectory"),
                   "trajectory_msgs/msg/JointTrajectory")  # rosbags' exact-size bytes
    assert same(WindowReader(joints).read(exact), expected)


def test_window_reader_follows_a_changed_layout():
    # the same size but other names must not reuse the cached layout (rclpy as reference)
    def window(names, value):
        m = JointTrajectory(joint_names=names)
        m.points = [JointTrajectoryPoint(positions=[value] * 2, velocities=[0.0] * 2,
                                         accelerations=[0.0] * 2)]
        return serialize_message(m)
    reader = WindowReader(["a", "b"])
    assert reader.read(window(["a", "b"], 1.0)).positions.tolist() == [[1.0, 1.0]]
    with pytest.raises(TrajectoryMessageError, match="joint 'a' is not in the trajectory"):
        reader.read(window(["x", "b"], 2.0))
    w = reader.read(window(["b", "a"], 3.0))
    assert w.positions.tolist() == [[3.0, 3.0]] and w.names == ("a", "b")


@settings(max_examples=60, deadline=None)
@given(names, st.data())
def test_joint_state_reader_matches_rclpy(joints, data):
    n = len(joints)
    msg = JointState(name=joints)
    msg.header.stamp.sec = data.draw(st.integers(0, 2 ** 31 - 1))
    msg.header.stamp.nanosec = data.draw(st.integers(0, 999_999_999))
    msg.position = data.draw(st.lists(floats, min_size=n, max_size=n))
    msg.velocity = data.draw(st.lists(floats, max_size=n))
    msg.effort = data.draw(st.lists(floats, max_size=n))
    raw = serialize_message(msg)
    ref = deserialize_message(raw, JointState)  # reference: rclpy
    got = JointStateReader().read(raw)
    assert got[0] == tuple(ref.name)
    assert np.array_equal(got[1], np.array(ref.position), equal_nan=True)
    assert np.array_equal(got[2], np.array(ref.velocity), equal_nan=True)
    assert got[3:] == (ref.header.stamp.sec, ref.header.stamp.nanosec)
    assert fast_cdr.header_stamp(raw) == (ref.header.stamp.sec, ref.header.stamp.nanosec)


def _decision(n, seed):
    rng = np.random.default_rng(seed)
    v = lambda: rng.standard_normal(n)  # noqa: E731
    return Decision(time=1.7e9 + seed * 0.05, mode="following",
                    state=MotionState(v(), v(), v()), window_stamp=1.7e9, feedback_stamp=np.nan,
                    action=v(), lo=v() - 5, hi=v() + 5, u=v(), viable=True, deviation_max=0.01,
                    deviation_norm=0.02, verdict="ok", message="", policy_time=1e-5,
                    next_mode="following")


def test_decision_records_round_trip():
    # encoded as the adapter publishes them, serialised by rclpy (reference)
    raws, expected = [], []
    for k in range(5):
        d = _decision(7, k)
        msg = Float64MultiArray()
        msg.layout.dim = [MultiArrayDimension(label=decision_record.LABEL)]
        msg.data = decision_record.encode(d).tolist()
        raws.append(serialize_message(msg))
        expected.append(decision_record.encode(d))
    other = Float64MultiArray()
    other.layout.dim = [MultiArrayDimension(label="something else")]
    other.data = [1.0, 2.0]
    raws.insert(2, serialize_message(other))
    got, index = decision_records(raws)
    assert index == [0, 1, 3, 4, 5]
    for d, e in zip(got, expected):
        assert np.array_equal(decision_record.encode(d), e, equal_nan=True)
