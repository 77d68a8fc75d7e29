# SPDX-License-Identifier: Apache-2.0
"""JointStateMerger: joint_states split over several messages, as drivers send it.

Messages are real ``sensor_msgs/JointState`` objects and their CDR bytes from rclpy's
serializer (what the adapter's raw subscription receives). sensor_msgs/JointState
semantics (ROS message definition, from memory): ``name``, ``position``, ``velocity`` and
``effort`` are parallel arrays; ``velocity`` and ``effort`` may be empty when the driver
does not measure them; a message may carry any subset of a robot's joints.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from rclpy.serialization import serialize_message
from sensor_msgs.msg import JointState

from adaptive_streamer.io.joint_states import (JointStateError, JointStateMerger,
                                               cdr_decoder, joint_positions, structure_key)

ARM = ["a1", "a2", "a3", "wrist"]


def js(names, pos, vel=(), stamp=0.0, raw=True):
    msg = JointState(name=list(names), position=[float(p) for p in pos],
                     velocity=[float(v) for v in vel])
    msg.header.stamp.sec, msg.header.stamp.nanosec = int(stamp), int(round(stamp % 1 * 1e9))
    return serialize_message(msg) if raw else msg


def test_subsets_merge_in_the_adapter_order_once_every_joint_was_seen():
    m = JointStateMerger(ARM)
    m.add(js(["gripper", "a3", "a1", "a2"], [0.02, 3.0, 1.0, 2.0], stamp=10.0), received=10.001)
    assert m.state() is None                     # the wrist was not seen yet
    m.add(js(["wrist"], [4.0], raw=False, stamp=10.004), received=10.005)
    s = m.state()
    assert s.position.tolist() == [1.0, 2.0, 3.0, 4.0]
    assert s.velocity is None                    # empty velocity arrays
    assert s.received == 10.001                  # the oldest joint counts
    assert s.stamps.tolist() == [10.0, 10.0, 10.0, 10.004]   # each joint's message


def test_a_stale_subset_makes_the_state_stale():
    m = JointStateMerger(ARM)
    m.add(js(["wrist"], [0.5]), received=1.0)
    for k in range(50):                          # the arm keeps coming, the wrist stopped
        t = 1.0 + 0.002 * (k + 1)
        m.add(js(ARM[:3], [k, k, k], [0.0] * 3, stamp=t), received=t)
    s = m.state()
    assert s.received == 1.0 and s.stamps[3] == 1.0  # unstamped wrist: its receive time
    assert s.position[:3].tolist() == [49.0] * 3 and s.position[3] == 0.5


def test_velocity_is_given_only_when_every_joint_has_one():
    m = JointStateMerger(ARM)
    m.add(js(ARM[:3], [0, 0, 0], [0.1, 0.2, 0.3]), received=1.0)
    m.add(js(["wrist"], [0.0], [0.4]), received=1.0)
    assert m.state().velocity.tolist() == [0.1, 0.2, 0.3, 0.4]
    m.add(js(["wrist"], [0.0], [math.nan]), received=1.1)   # a non-finite velocity: missing
    assert m.state().velocity is None
    m.add(js(["wrist"], [0.0], [0.0]), received=1.2)
    assert m.state().velocity is not None
    m.add(js(["wrist", "x"], [0.0, 0.0], [0.0]), received=1.3)  # not one per name: missing
    assert m.state().velocity is None


def test_a_bad_message_is_rejected_whole_and_counted():
    m = JointStateMerger(ARM)
    m.add(js(ARM, [1, 2, 3, 4]), received=1.0)
    m.add(js(["a1", "a2"], [9.0, math.nan]), received=1.1)      # NaN on a commanded joint
    m.add(js(["a3", "gripper"], [3.5, math.nan]), received=1.2)  # NaN on a joint not commanded
    m.add(b"\x00\x01\x00\x00garbage", received=1.3)
    s = m.state()
    assert s.position.tolist() == [1.0, 2.0, 3.5, 4.0]   # a1 kept: its message was rejected
    assert m.take_rejected() == 2 and m.take_rejected() == 0
    with pytest.raises(JointStateError, match="joint 'a2': position missing"):
        joint_positions(js(["a1", "a2"], [0.0]), ARM)


def test_the_newest_value_wins_and_a_repeated_name_counts_first():
    m = JointStateMerger(ARM)
    m.add(js(ARM, [1, 1, 1, 1]), received=1.0)
    m.add(js(["a1", "a1"], [2, 7]), received=1.1)
    m.add(js(["a2"], [3]), received=1.2)
    assert m.state().position.tolist() == [2.0, 3.0, 1.0, 1.0]


def test_many_messages_without_a_state_request_are_folded_in():
    m = JointStateMerger(ARM, pending_limit=8)
    m.add(js(["wrist"], [0.7]), received=0.5)
    for k in range(100):
        m.add(js(ARM[:3], [k, k, k]), received=1.0 + k)
    s = m.state()
    assert s.position.tolist() == [99.0, 99.0, 99.0, 0.7] and s.received == 0.5


def test_the_state_is_reused_until_a_message_arrives():
    m = JointStateMerger(ARM)
    m.add(js(ARM, [0, 0, 0, 0]), received=1.0)
    first = m.state()
    assert m.state() is first
    m.add(js(["a1"], [1.0]), received=2.0)
    assert m.state() is not first and np.array_equal(first.position, [0, 0, 0, 0])


def test_the_fast_cdr_decoder_reads_what_rclpy_deserializes():
    # rclpy's deserializer is the reference; the merged numbers must agree bit for bit
    msgs = [js(["gripper", "a3", "a1", "a2"], [0.02, 3.1, 1.1, -2.2], [0.5, 0.3, 0.1, 0.2],
               stamp=5.25), js(["wrist"], [4.4], stamp=5.5), js(["a1"], [math.nan]),
            b"\x00\x01\x00\x00garbage"]
    ref, fast = JointStateMerger(ARM), JointStateMerger(ARM, decode=cdr_decoder())
    for i, m in enumerate(msgs):
        ref.add(m, received=10.0 + i)
        fast.add(m, received=10.0 + i)
    a, b = ref.state(), fast.state()
    assert a.position.tobytes() == b.position.tobytes() and a.velocity is b.velocity is None
    assert a.received == b.received == 10.0
    assert a.stamps.tobytes() == b.stamps.tobytes() and a.stamps[0] == 5.25
    assert ref.take_rejected() == fast.take_rejected() == 2


def test_messages_with_the_same_names_share_a_structure_key():
    a = js(["a1", "a2"], [0.1, 0.2], [0.0, 0.0], stamp=3.0)
    b = js(["a1", "a2"], [9.0, 8.0], [], stamp=4.5)
    c = js(["a1", "a3"], [0.1, 0.2], stamp=3.0)
    framed = JointState(name=["a1", "a2"], position=[0.1, 0.2])
    framed.header.frame_id = "tern_base"
    assert structure_key(a) == structure_key(b) != structure_key(c)
    assert structure_key(serialize_message(framed)) != structure_key(a)
    assert structure_key(js(["a1", "a2"], [0, 0], raw=False)) == ("", ("a1", "a2"))
    assert structure_key(b"\x00\x01") == b"\x00\x01"      # not walkable: its own key


def test_a_fold_while_adding_renews_the_state():
    m = JointStateMerger(["a1"], pending_limit=2)
    m.add(js(["a1"], [1.0]), received=1.0)
    assert m.state().received == 1.0
    for k, names in enumerate((["a1", "x"], ["a1", "y"], ["a1", "z"])):  # 3 name sets > 2
        m.add(js(names, [2.0 + k, 0.0]), received=2.0 + k)
    assert m.state().received == 4.0 and m.state().position.tolist() == [4.0]
