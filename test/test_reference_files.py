# SPDX-License-Identifier: Apache-2.0
"""Reference files: CSV, own YAML, rosbag2 (written here with rosbags and with
rclpy.serialization), and every refusal with its message."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from rosbags.rosbag2 import StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore

from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.io.reference_bags import (ReferenceFileError, load_bag, load_csv,
                                                    load_reference, load_yaml)

DATA = Path(__file__).parent / "data"
LIMITS = JointLimits.from_file(DATA / "reference_limits.yaml")
NAMES = ["j1", "j2", "j3"]
TS = get_typestore(Stores.ROS2_JAZZY)
JointState = TS.types["sensor_msgs/msg/JointState"]
JointTrajectory = TS.types["trajectory_msgs/msg/JointTrajectory"]
JointTrajectoryPoint = TS.types["trajectory_msgs/msg/JointTrajectoryPoint"]
Header = TS.types["std_msgs/msg/Header"]
Time = TS.types["builtin_interfaces/msg/Time"]
Duration = TS.types["builtin_interfaces/msg/Duration"]
String = TS.types["std_msgs/msg/String"]


def stamp(t: float) -> Time:
    sec, nsec = divmod(int(round(t * 1e9)), 1_000_000_000)
    return Time(sec=sec, nanosec=nsec)


def joint_state(t: float, names, pos) -> JointState:
    return JointState(header=Header(stamp=stamp(t), frame_id=""), name=list(names),
                      position=np.asarray(pos, float), velocity=np.zeros(0), effort=np.zeros(0))


def point(pos, tfs: float) -> JointTrajectoryPoint:
    s = stamp(tfs)
    return JointTrajectoryPoint(positions=np.asarray(pos, float), velocities=np.zeros(0),
                                accelerations=np.zeros(0), effort=np.zeros(0),
                                time_from_start=Duration(sec=s.sec, nanosec=s.nanosec))


def write_bag(path: Path, topic: str, msgs: list, msgtype: str,
              storage: StoragePlugin = StoragePlugin.SQLITE3) -> Path:
    with Writer(path, version=9, storage_plugin=storage) as writer:
        conn = writer.add_connection(topic, msgtype, typestore=TS)
        for k, msg in enumerate(msgs):
            raw = msg if isinstance(msg, (bytes, bytearray, memoryview)) else TS.serialize_cdr(msg, msgtype)
            writer.write(conn, 1_000_000_000 + k * 10_000_000, raw)
    return path


def smooth_samples(count: int = 41, dt: float = 0.1) -> tuple[np.ndarray, np.ndarray]:
    t = np.arange(count) * dt
    f = (1 - np.cos(2 * np.pi * t / t[-1])) ** 2 / 4
    return t, np.stack([0.8 * f + 0.1, -0.5 * f + 0.2, 0.6 * f - 0.3], axis=1)


# ---------------------------------------------------------------- good files
def test_csv_loads_values_and_times():
    ref = load_csv(DATA / "reference_smooth.csv", limits=LIMITS)
    assert ref.names == tuple(NAMES) and ref.times.size == 41
    t, p = smooth_samples()
    np.testing.assert_allclose(ref.times, t, atol=1e-12)
    np.testing.assert_allclose(ref.positions, p, atol=1e-9)  # file has 9 decimals
    np.testing.assert_allclose(ref.evaluate(ref.times), ref.positions, atol=1e-12)
    np.testing.assert_allclose(ref.velocities[[0, -1]], 0.0, atol=1e-12)


def test_csv_reorders_to_requested_joints_and_shifts_time(tmp_path):
    f = tmp_path / "reference_shifted.csv"
    f.write_text("time,j2,j1\n5.0,0.2,0.1\n5.5,0.25,0.15\n6.0,0.3,0.2\n")
    ref = load_csv(f, joints=["j1", "j2"])
    assert ref.names == ("j1", "j2")
    np.testing.assert_allclose(ref.times, [0.0, 0.5, 1.0])
    np.testing.assert_allclose(ref.positions[:, 0], [0.1, 0.15, 0.2])
    with pytest.raises(ReferenceFileError, match="joint 'j3' is missing; the file has"):
        load_csv(f, joints=["j1", "j2", "j3"])
    with pytest.raises(ReferenceFileError, match="unknown joint 'j2'; expected joints \\['j1'\\]"):
        load_csv(f, joints=["j1"])


def test_yaml_points_and_waypoints():
    ref = load_yaml(DATA / "reference_points.yaml", limits=LIMITS)
    np.testing.assert_allclose(ref.times, [0, 1, 2, 3])
    np.testing.assert_allclose(ref.positions[2], [0.6, -0.1, 0.4])
    way = load_reference(DATA / "reference_waypoints.yaml", limits=LIMITS, fraction=0.8)
    np.testing.assert_allclose(way.positions[1], [0.8, -0.4, 0.5])
    ratios = (way.peaks().velocity / LIMITS.velocity_max).max()
    assert ratios == pytest.approx(0.8, rel=1e-6)
    with pytest.raises(ReferenceFileError, match="untimed 'waypoints' need joint limits"):
        load_yaml(DATA / "reference_waypoints.yaml")


def test_joint_state_bag_sqlite3(tmp_path):
    t, p = smooth_samples()
    msgs = [joint_state(100.0 + tk, ["j3", "j1", "j2"], pk[[2, 0, 1]]) for tk, pk in zip(t, p)]
    bag = write_bag(tmp_path / "js", "/recorded/joint_states", msgs, JointState.__msgtype__)
    ref = load_bag(bag, "/recorded/joint_states", joints=NAMES, limits=LIMITS)
    assert ref.names == tuple(NAMES)
    np.testing.assert_allclose(ref.times, t, atol=1e-9)
    np.testing.assert_allclose(ref.positions, p, atol=1e-12)


def test_zero_stamps_fall_back_to_receive_time(tmp_path):
    t, p = smooth_samples(5, 0.1)
    msgs = [joint_state(0.0, NAMES, pk) for pk in p]
    bag = write_bag(tmp_path / "zero", "/js", msgs, JointState.__msgtype__)  # 10 ms apart
    ref = load_bag(bag, "/js")
    np.testing.assert_allclose(ref.times, np.arange(5) * 0.01, atol=1e-9)


def test_joint_state_bag_from_rclpy_serialization_mcap(tmp_path):
    # Messages serialised by rclpy (the ROS client library), stored by rosbags as MCAP.
    from rclpy.serialization import serialize_message
    from sensor_msgs.msg import JointState as RclJointState

    t, p = smooth_samples(21, 0.1)
    raw = []
    for tk, pk in zip(t, p):
        m = RclJointState(name=NAMES, position=pk.tolist())
        s = stamp(7.0 + tk)
        m.header.stamp.sec, m.header.stamp.nanosec = s.sec, s.nanosec
        raw.append(serialize_message(m))
    bag = write_bag(tmp_path / "mc", "/js", raw, JointState.__msgtype__, StoragePlugin.MCAP)
    ref = load_reference(bag, topic="/js", limits=LIMITS)
    np.testing.assert_allclose(ref.times, t, atol=1e-9)
    np.testing.assert_allclose(ref.positions, p, atol=1e-12)
    storage_file = next(bag.glob("*.mcap"))
    assert load_reference(storage_file, topic="/js").times.size == 21


def test_joint_trajectory_bag_whole_and_stream(tmp_path):
    t, p = smooth_samples(11, 0.2)
    whole = JointTrajectory(header=Header(stamp=stamp(3.0), frame_id=""), joint_names=NAMES,
                            points=[point(pk, tk) for tk, pk in zip(t, p)])
    bag = write_bag(tmp_path / "whole", "/reference/path", [whole], JointTrajectory.__msgtype__)
    ref = load_bag(bag, "/reference/path", limits=LIMITS)
    np.testing.assert_allclose(ref.times, t, atol=1e-9)
    np.testing.assert_allclose(ref.positions, p)
    stream = [JointTrajectory(header=Header(stamp=stamp(50.0 + tk), frame_id=""), joint_names=NAMES,
                              points=[point(pk, 0.0)]) for tk, pk in zip(t, p)]
    bag = write_bag(tmp_path / "stream", "/setpoints", stream, JointTrajectory.__msgtype__)
    ref = load_bag(bag, "/setpoints", limits=LIMITS)
    np.testing.assert_allclose(ref.times, t, atol=1e-9)


# ---------------------------------------------------------------- refusals (files)
@pytest.mark.parametrize("name, fragment", [
    ("reference_bad_unknown_joint.csv", "unknown joint 'j9': not in the limits"),
    ("reference_bad_non_monotonic.csv", "line 4: time 0.1 s is not after the previous time 0.1 s"),
    ("reference_bad_nan.csv", "line 3: joint 'j2' position is nan"),
    ("reference_bad_gap.csv", "line 4: gap of 2.5 s after the previous sample; the largest "
                              "allowed gap is 1 s"),
    ("reference_bad_outside_limits.csv", r"line 3: joint 'j2' position 2.3 is outside its limits "
                                         r"\[-2, 2\]"),
    ("reference_bad_waypoint_unknown_joint.yaml", "unknown joint 'wrist': not in the limits"),
    ("reference_bad_point_nan.yaml", r"points\[1\] \(line 4\): joint 'j2' position is nan"),
])
def test_bad_files_refused_with_file_row_and_reason(name, fragment):
    with pytest.raises(ReferenceFileError) as err:
        load_reference(DATA / name, limits=LIMITS)
    assert str(err.value).startswith(str(DATA / name))
    assert err.match(fragment)


@pytest.mark.parametrize("text, fragment", [
    ("j1,j2\n0,0\n", "line 1: expected a header 'time,<joint>,...'"),
    ("time,j1\n0,0\n1,x\n", "line 3: joint 'j1': not a number: 'x'"),
    ("time,j1,j2\n0,0,0\n1,0\n", "line 3: expected 3 values"),
    ("# only a comment\n", "empty file"),
    ("time,j1\n0,0\n", "needs at least 2 samples"),
])
def test_bad_csv_text(tmp_path, text, fragment):
    f = tmp_path / "reference_bad.csv"
    f.write_text(text)
    with pytest.raises(ReferenceFileError, match=fragment):
        load_csv(f)


@pytest.mark.parametrize("text, fragment", [
    ("joints: [j1]\n", "exactly one of 'points'"),
    ("joints: [j1]\npoints: []\nwaypoints: []\n", "exactly one of 'points'"),
    ("joints: [j1]\nspeed: 3\npoints: [{time: 0, positions: [0]}]\n", "unknown key"),
    ("joints: [j1]\npoints:\n  - {time: 0, positions: [0]}\n  - {t: 1, positions: [1]}\n",
     r"points\[1\] \(line 4\): expected \{time: t, positions"),
    ("joints: [j1]\npoints:\n  - {time: 0, positions: [0]}\n  - {time: 1, positions: [1, 2]}\n",
     r"points\[1\] \(line 4\): expected a list of 1 positions"),
    ("joints: [j1]\npoints:\n  - {time: 0, positions: [0]}\n  - {time: one, positions: [1]}\n",
     r"points\[1\] \(line 4\): time: not a number: 'one'"),
    ("joints: j1\npoints: []\n", "'joints' must be a non-empty list"),
    ("joints: [j1\n", "not valid YAML"),
])
def test_bad_yaml_text(tmp_path, text, fragment):
    f = tmp_path / "reference_bad.yaml"
    f.write_text(text)
    with pytest.raises(ReferenceFileError, match=fragment):
        load_yaml(f, limits=JointLimits(["j1"], [-3], [3], [2], [8], [80]))


def test_missing_file_and_unknown_kind(tmp_path):
    with pytest.raises(ReferenceFileError, match="cannot read reference file '.*nothing.csv'"):
        load_reference(tmp_path / "nothing.csv")
    f = tmp_path / "ref.txt"
    f.write_text("x")
    with pytest.raises(ReferenceFileError, match="unknown reference file kind '.txt'"):
        load_reference(f)


# ---------------------------------------------------------------- refusals (bags)
def test_bad_bag_topic_type_and_messages(tmp_path):
    t, p = smooth_samples(6, 0.1)
    t = t + 100.0  # non-zero stamps (a zero stamp means "use the receive time")
    good = [joint_state(tk, NAMES, pk) for tk, pk in zip(t, p)]
    bag = write_bag(tmp_path / "js", "/js", good, JointState.__msgtype__)
    with pytest.raises(ReferenceFileError, match=r"no topic '/joint_states' in the bag; topics: \['/js'\]"):
        load_bag(bag, "/joint_states")
    with pytest.raises(ReferenceFileError, match="needs the topic to read"):
        load_reference(bag)
    strings = write_bag(tmp_path / "str", "/text", [String(data="hi")], String.__msgtype__)
    with pytest.raises(ReferenceFileError, match="type std_msgs/msg/String is not usable"):
        load_bag(strings, "/text")
    empty = write_bag(tmp_path / "empty", "/js", [], JointState.__msgtype__)
    with pytest.raises(ReferenceFileError, match="the topic has no messages"):
        load_bag(empty, "/js")
    not_a_bag = tmp_path / "plain"
    not_a_bag.mkdir()
    with pytest.raises(ReferenceFileError, match="cannot read rosbag2"):
        load_bag(not_a_bag, "/js")

    def bad(k: int, msg) -> list:
        msgs = list(good)
        msgs[k] = msg
        return msgs

    cases = [
        (bad(3, joint_state(t[3], ["j1", "j2", "elbow"], p[3])), "message 3: unknown joint 'elbow'"),
        (bad(2, joint_state(t[2], ["j1", "j2"], p[2, :2])), "message 2: joint 'j3' is missing"),
        (bad(4, joint_state(t[2], NAMES, p[4])), "message 4: time .* is not after the previous"),
        (bad(1, joint_state(t[1], NAMES, [0.0, math.nan, 0.0])), "message 1: joint 'j2' position is nan"),
        (bad(5, joint_state(t[5] + 3.0, NAMES, p[5])), "message 5: gap of 3.1 s"),
        (bad(2, joint_state(t[2], NAMES, [0.0, 0.0, 3.5])), "message 2: joint 'j3' position 3.5 is "
                                                            "outside its limits"),
        (bad(1, joint_state(t[1], NAMES, [0.0])), "message 1: 3 joint names but 1 positions"),
    ]
    for k, (msgs, fragment) in enumerate(cases):
        b = write_bag(tmp_path / f"bad{k}", "/js", msgs, JointState.__msgtype__)
        with pytest.raises(ReferenceFileError, match=fragment) as err:
            load_bag(b, "/js", limits=LIMITS)
        assert "topic '/js'" in str(err.value)


def test_joint_trajectory_stream_refuses_multi_point_messages(tmp_path):
    t, p = smooth_samples(4, 0.1)
    msgs = [JointTrajectory(header=Header(stamp=stamp(tk), frame_id=""), joint_names=NAMES,
                            points=[point(pk, 0.0)]) for tk, pk in zip(t, p)]
    msgs[2] = JointTrajectory(header=Header(stamp=stamp(t[2]), frame_id=""), joint_names=NAMES,
                              points=[point(p[2], 0.0), point(p[2], 0.1)])
    bag = write_bag(tmp_path / "win", "/reference/window", msgs, JointTrajectory.__msgtype__)
    with pytest.raises(ReferenceFileError, match="message 2: has 2 points; expected either one "
                                                 "message holding the whole trajectory"):
        load_bag(bag, "/reference/window")
