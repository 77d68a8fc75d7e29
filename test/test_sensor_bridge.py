# SPDX-License-Identifier: Apache-2.0
"""sensor_bridge: real rclpy nodes over DDS, one single-threaded executor in the test process.

A test node publishes real sensor messages; an independent subscriber on the same executor
receives ``feedback`` and ``/diagnostics``. Staleness and restamping run under sim time
(the test publishes ``/clock``), so ages are exact and nothing depends on the wall clock.
"""
import math
import time

import numpy as np
import pytest
import rclpy
from builtin_interfaces.msg import Time as TimeMsg
from diagnostic_msgs.msg import DiagnosticArray
from geometry_msgs.msg import (PointStamped, PoseStamped, PoseWithCovarianceStamped,
                               Vector3Stamped, WrenchStamped)
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.parameter import Parameter
from rclpy.qos import qos_profile_sensor_data
from rosgraph_msgs.msg import Clock
from scipy import signal
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64, Float64MultiArray

from adaptive_streamer.io.stamps import sec_to_stamp, stamp_to_sec
from adaptive_streamer.nodes.common import reliable_qos
from adaptive_streamer.io.field_paths import (FieldPathError, compile_fields, is_stamped,
                                                 message_class)
from adaptive_streamer.nodes.sensor_bridge import BridgeConfigError, SensorBridge, main

pytestmark = pytest.mark.ros
WAIT_S = 15.0     # upper bound for DDS discovery/delivery; not a speed assertion


@pytest.fixture(scope="module")
def ctx():
    context = Context()
    rclpy.init(context=context)
    yield context
    rclpy.shutdown(context=context)


def _overrides(params):
    return [Parameter(k, value=v) for k, v in params.items()]


class Rig:
    """The bridge under test, a test node, and an executor spinning both."""

    def __init__(self, ctx, params, sim_time=False):
        self.ex = SingleThreadedExecutor(context=ctx)
        self.bridge = SensorBridge(context=ctx, parameter_overrides=_overrides(
            {**params, "use_sim_time": sim_time}))
        self.node = rclpy.create_node("bridge_test", context=ctx)
        self.feedback: list[JointState] = []
        self.diagnostics: list[DiagnosticArray] = []
        self.fb_sub = self.node.create_subscription(JointState, "feedback",
                                                    self.feedback.append, reliable_qos(100))
        self.node.create_subscription(DiagnosticArray, "/diagnostics", self.diagnostics.append,
                                      reliable_qos(100))
        self.clock = self.node.create_publisher(Clock, "/clock", 10) if sim_time else None
        self.ex.add_node(self.bridge)
        self.ex.add_node(self.node)
        self.pubs = {}
        self.spin_until(lambda: self.fb_sub.get_publisher_count() > 0)

    def close(self):
        self.ex.remove_node(self.bridge)
        self.ex.remove_node(self.node)
        self.bridge.destroy_node()
        self.node.destroy_node()
        self.ex.shutdown()

    def spin_until(self, pred, action=None):
        end = time.monotonic() + WAIT_S
        while not pred():
            if time.monotonic() > end:
                raise AssertionError("condition not met within the wait bound")
            if action is not None:
                action()
            self.ex.spin_once(timeout_sec=0.02)

    def publisher(self, topic, msg_type, qos):
        pub = self.node.create_publisher(msg_type, topic, qos)
        self.pubs[topic] = pub
        self.spin_until(lambda: pub.get_subscription_count() > 0)
        return pub

    def set_clock(self, t):
        target = int(round(t * 1e9))
        msg = Clock(clock=sec_to_stamp(t))
        self.spin_until(lambda: self.bridge.get_clock().now().nanoseconds == target,
                        lambda: self.clock.publish(msg))

    def latest(self):
        return dict(zip(self.feedback[-1].name, self.feedback[-1].position))

    def diag_values(self):
        """Key/values of the latest sensor_bridge status (empty before the first)."""
        for arr in reversed(self.diagnostics):
            for status in arr.status:
                if status.name == "sensor_bridge":
                    return {kv.key: kv.value for kv in status.values}, status
        return {}, None


@pytest.fixture
def rig_factory(ctx):
    rigs = []

    def make(params, sim_time=False):
        rigs.append(Rig(ctx, params, sim_time))
        return rigs[-1]

    yield make
    for r in rigs:
        r.close()


def _entry(name, topic, type_, fields, features, **extra):
    out = {f"{name}.topic": topic, f"{name}.type": type_, f"{name}.fields": fields,
           f"{name}.features": features}
    out.update({f"{name}.{k}": v for k, v in extra.items()})
    return out


# ---------------------------------------------------------------------------- field paths
def test_field_paths_read_nested_fields_array_elements_and_joint_names():
    js = JointState(name=["j1", "j2", "3"], position=[0.1, 0.2, 0.3], velocity=[1.0, 2.0, 3.0])
    get = compile_fields(JointState, ["position[j2]", "velocity[0]", "position['3']"])
    assert get(js) == [0.2, 1.0, 0.3]
    js.name = ["j2", "j1", "3"]                   # joint order may change between messages
    assert get(js)[0] == 0.1
    pose = PoseWithCovarianceStamped()
    pose.pose.pose.orientation.w = 0.5
    pose.pose.covariance[35] = 9.0
    assert compile_fields(PoseWithCovarianceStamped, ["pose.pose.orientation.w",
                                                      "pose.covariance[35]"])(pose) == [0.5, 9.0]
    assert is_stamped(PointStamped) and not is_stamped(Float64)
    assert message_class("geometry_msgs/PointStamped") is PointStamped
    with pytest.raises(FieldPathError, match=r"field 'position\[j9\]': the joint name is not in "
                                             "the message's name list"):
        compile_fields(JointState, ["position[j9]"])(js)
    with pytest.raises(FieldPathError, match=r"field 'effort\[0\]': the message's array is too "
                                             "short"):
        compile_fields(JointState, ["effort[0]"])(js)


# ---------------------------------------------------------------------------- every type
def test_each_supported_type_reaches_feedback(rig_factory):
    params = {"inputs": ["pt", "vec", "pose", "wrench", "scalar", "array", "joints"],
              **_entry("pt", "s/pt", "geometry_msgs/msg/PointStamped", ["point.y", "point.z"],
                       ["edge_mm", "height"], scale=[1000.0, 1.0], offset=[-5.0, 0.0],
                       max_age=30.0),
              **_entry("vec", "s/vec", "geometry_msgs/msg/Vector3Stamped", ["vector.x"],
                       ["vx"], max_age=30.0),
              **_entry("pose", "s/pose", "geometry_msgs/msg/PoseStamped",
                       ["pose.position.z", "pose.orientation.w"], ["pz", "qw"], max_age=30.0),
              **_entry("wrench", "s/wrench", "geometry_msgs/msg/WrenchStamped",
                       ["wrench.force.z", "wrench.torque.x"], ["fz", "tx"], max_age=30.0),
              **_entry("scalar", "s/scalar", "std_msgs/Float64", ["data"], ["level"],
                       max_age=30.0),
              **_entry("array", "s/array", "std_msgs/msg/Float64MultiArray", ["data[2]"],
                       ["third"], max_age=30.0),
              **_entry("joints", "s/joints", "sensor_msgs/msg/JointState",
                       ["position[j3]", "velocity[1]", 'effort["j1"]'], ["p3", "v1", "e1"],
                       max_age=30.0)}
    rig = rig_factory(params)
    t0 = rig.bridge.get_clock().now().nanoseconds * 1e-9 - 1.0
    stamp = sec_to_stamp(t0)
    pt = PointStamped()
    pt.header.stamp = stamp
    pt.point.y, pt.point.z = 0.0125, 0.3
    vec = Vector3Stamped()
    vec.header.stamp = stamp
    vec.vector.x = -1.5
    pose = PoseStamped()
    pose.header.stamp = stamp
    pose.pose.position.z, pose.pose.orientation.w = 0.75, 0.25
    wrench = WrenchStamped()
    wrench.header.stamp = stamp
    wrench.wrench.force.z, wrench.wrench.torque.x = 12.0, -0.5
    joints = JointState(name=["j1", "j2", "j3"], position=[0.1, 0.2, 0.3],
                        velocity=[1.0, 2.0, 3.0], effort=[10.0, 20.0, 30.0])
    joints.header.stamp = stamp
    msgs = {"s/pt": pt, "s/vec": vec, "s/pose": pose, "s/wrench": wrench,
            "s/scalar": Float64(data=4.5), "s/array": Float64MultiArray(data=[1.0, 2.0, 3.0]),
            "s/joints": joints}
    pubs = {topic: rig.publisher(topic, type(m), qos_profile_sensor_data)
            for topic, m in msgs.items()}

    def all_valid():
        return rig.feedback and not any(math.isnan(v) for v in rig.feedback[-1].position)

    def publish_all():    # best-effort inputs (the default QoS): repeat until all arrived
        for topic, msg in msgs.items():
            pubs[topic].publish(msg)

    rig.spin_until(all_valid, publish_all)
    last = rig.feedback[-1]
    assert list(last.name) == ["edge_mm", "height", "vx", "pz", "qw", "fz", "tx", "level",
                               "third", "p3", "v1", "e1"]
    got = rig.latest()
    assert got["edge_mm"] == pytest.approx(1000.0 * 0.0125 - 5.0)    # 12.5 mm - 5 mm
    expected = {"height": 0.3, "vx": -1.5, "pz": 0.75, "qw": 0.25, "fz": 12.0, "tx": -0.5,
                "level": 4.5, "third": 3.0, "p3": 0.3, "v1": 2.0, "e1": 10.0}
    assert {k: got[k] for k in expected} == expected
    assert len(last.velocity) == 0 and len(last.effort) == 0
    # Oldest valid sample: the stamped inputs carry t0; Float64 types are stamped on arrival.
    assert abs(stamp_to_sec(last.header.stamp) - t0) < 1e-6


# ---------------------------------------------------------------------------- filter
def test_butter_filter_matches_scipy_lfilter_per_feature(rig_factory):
    params = {"inputs": ["f"],
              **_entry("f", "s/f", "std_msgs/msg/Float64MultiArray", ["data[0]", "data[1]"],
                       ["a", "b"], filter="butter", order=2, cutoff_hz=5.0,
                       sample_rate_hz=50.0, max_age=60.0, qos="reliable")}
    rig = rig_factory(params)
    pub = rig.publisher("s/f", Float64MultiArray, reliable_qos(100))
    rng = np.random.default_rng(7)
    x = np.stack([0.2 + 0.05 * rng.standard_normal(30),
                  np.r_[np.zeros(10), np.ones(20)]])
    for i in range(x.shape[1]):
        pub.publish(Float64MultiArray(data=x[:, i].tolist()))
        rig.spin_until(lambda: len(rig.feedback) >= i + 1)
    out = np.array([m.position for m in rig.feedback]).T
    # Reference: scipy.signal.butter + scipy.signal.lfilter on the same samples, started at
    # steady state for the first sample (scipy.signal.lfilter_zi).
    b, a = signal.butter(2, 5.0, fs=50.0)
    for f in range(2):
        ref, _ = signal.lfilter(b, a, x[f], zi=signal.lfilter_zi(b, a) * x[f, 0])
        np.testing.assert_allclose(out[f], ref, rtol=0, atol=1e-12)


# ---------------------------------------------------------------------------- staleness
def test_stale_feature_goes_nan_and_stamp_is_oldest_valid(rig_factory):
    params = {"inputs": ["edge", "angle"],
              **_entry("edge", "s/edge", "geometry_msgs/msg/PointStamped", ["point.y"],
                       ["edge"], max_age=0.2, qos="reliable"),
              **_entry("angle", "s/angle", "geometry_msgs/msg/Vector3Stamped", ["vector.z"],
                       ["angle"], max_age=1.0, qos="reliable")}
    rig = rig_factory(params, sim_time=True)
    edge_pub = rig.publisher("s/edge", PointStamped, reliable_qos(10))
    angle_pub = rig.publisher("s/angle", Vector3Stamped, reliable_qos(10))
    rig.set_clock(100.0)
    edge = PointStamped()
    edge.header.stamp = sec_to_stamp(99.95)
    edge.point.y = 0.004
    angle = Vector3Stamped()
    angle.header.stamp = sec_to_stamp(99.9)
    angle.vector.z = 0.02
    edge_pub.publish(edge)
    angle_pub.publish(angle)
    rig.spin_until(lambda: rig.feedback and not any(map(math.isnan, rig.feedback[-1].position)))
    assert rig.latest() == {"edge": 0.004, "angle": 0.02}
    assert rig.feedback[-1].header.stamp == sec_to_stamp(99.9)

    rig.set_clock(100.3)            # edge is 0.35 s old (> 0.2 s), angle 0.4 s (< 1.0 s)
    rig.spin_until(lambda: math.isnan(rig.latest()["edge"]))
    assert rig.latest()["angle"] == 0.02
    assert rig.feedback[-1].header.stamp == sec_to_stamp(99.9)

    edge.header.stamp = sec_to_stamp(100.25)
    edge.point.y = 0.005
    edge_pub.publish(edge)
    rig.spin_until(lambda: rig.latest()["edge"] == 0.005)
    assert rig.feedback[-1].header.stamp == sec_to_stamp(99.9)     # angle is now the oldest

    rig.set_clock(101.2)            # both stale
    rig.spin_until(lambda: all(map(math.isnan, rig.feedback[-1].position)))
    assert rig.feedback[-1].header.stamp == TimeMsg()              # nothing valid -> zero
    rig.set_clock(102.5)            # let the 1 s (sim time) diagnostics timer fire
    rig.spin_until(lambda: rig.diag_values()[0].get("angle.state") == "stale")
    values, status = rig.diag_values()
    assert values["edge.stale_events"] == "2" and values["angle.stale_events"] == "1"
    assert values["edge.accepted"] == "2" and values["callback_errors"] == "0"
    assert status.message == "stale: edge, angle"


# ---------------------------------------------------------------------------- restamp
def test_restamp_replaces_a_bad_sensor_clock_and_unstamped_types_use_arrival(rig_factory):
    params = {"inputs": ["raw", "fixed", "level"],
              **_entry("raw", "s/probe", "geometry_msgs/msg/PointStamped", ["point.x"],
                       ["raw"], max_age=0.5, qos="reliable"),
              **_entry("fixed", "s/probe", "geometry_msgs/msg/PointStamped", ["point.x"],
                       ["fixed"], max_age=0.5, qos="reliable", restamp=True),
              **_entry("level", "s/level", "std_msgs/msg/Float64", ["data"], ["level"],
                       max_age=0.5, qos="reliable")}
    rig = rig_factory(params, sim_time=True)
    probe = rig.publisher("s/probe", PointStamped, reliable_qos(10))
    level = rig.publisher("s/level", Float64, reliable_qos(10))
    rig.set_clock(50.0)
    msg = PointStamped()
    msg.header.stamp = sec_to_stamp(1.0e6)        # a sensor clock far from ROS time
    msg.point.x = 1.25
    probe.publish(msg)
    rig.spin_until(lambda: rig.feedback and not math.isnan(rig.latest()["fixed"]))
    got = rig.latest()
    assert math.isnan(got["raw"]) and got["fixed"] == 1.25
    assert rig.feedback[-1].header.stamp == sec_to_stamp(50.0)
    rig.set_clock(50.25)
    level.publish(Float64(data=3.0))
    rig.spin_until(lambda: rig.latest()["level"] == 3.0)
    assert rig.feedback[-1].header.stamp == sec_to_stamp(50.0)      # oldest valid = fixed
    rig.set_clock(51.5)
    rig.spin_until(lambda: rig.diag_values()[0].get("raw.received") == "1"
                   and rig.diag_values()[0].get("level.accepted") == "1")
    values, _ = rig.diag_values()
    assert values["raw.dropped_stamp"] == "1" and values["raw.accepted"] == "0"
    assert values["fixed.accepted"] == "1" and values["level.accepted"] == "1"


# ---------------------------------------------------------------------------- bad input
def test_malformed_and_nan_inputs_are_dropped_and_counted(rig_factory):
    params = {"inputs": ["joints", "array"], "publish_rate": 20.0,
              **_entry("joints", "s/js", "sensor_msgs/msg/JointState", ["position[j3]"],
                       ["p3"], max_age=60.0, qos="reliable"),
              **_entry("array", "s/arr", "std_msgs/msg/Float64MultiArray", ["data[2]"],
                       ["third"], max_age=60.0, qos="reliable")}
    rig = rig_factory(params)
    js_pub = rig.publisher("s/js", JointState, reliable_qos(20))
    arr_pub = rig.publisher("s/arr", Float64MultiArray, reliable_qos(20))
    now = rig.bridge.get_clock().now().to_msg()

    def js(names, positions):
        m = JointState(name=names, position=positions)
        m.header.stamp = now
        return m

    js_pub.publish(js(["j1", "j2", "j3"], [0.1, 0.2, 0.5]))
    arr_pub.publish(Float64MultiArray(data=[0.0, 0.0, 7.0]))
    rig.spin_until(lambda: rig.feedback and rig.latest() == {"p3": 0.5, "third": 7.0})
    first_good = len(rig.feedback)
    for bad in (js(["j1", "j2"], [0.1, 0.2]),              # no j3: malformed
                js(["j1", "j2", "j3"], [0.1, 0.2]),        # position too short: malformed
                js(["j1", "j2", "j3"], [0.1, 0.2, math.nan]),
                js(["j1", "j2", "j3"], [0.1, 0.2, math.inf])):
        js_pub.publish(bad)
    arr_pub.publish(Float64MultiArray(data=[1.0, 2.0]))    # too short: malformed
    arr_pub.publish(Float64MultiArray(data=[1.0, 2.0, math.nan]))
    rig.spin_until(lambda: rig.diag_values()[0].get("array.received") == "3"
                   and rig.diag_values()[0].get("joints.received") == "5")
    values, status = rig.diag_values()
    assert (values["joints.accepted"], values["joints.dropped_malformed"],
            values["joints.dropped_nan"]) == ("1", "2", "2")
    assert (values["array.accepted"], values["array.dropped_malformed"],
            values["array.dropped_nan"]) == ("1", "1", "1")
    assert values["callback_errors"] == "0" and status.message == "all 2 input(s) fresh"
    # Rate mode keeps publishing the last good values; no bad value is ever forwarded.
    assert len(rig.feedback) > first_good
    assert all(dict(zip(m.name, m.position)) == {"p3": 0.5, "third": 7.0}
               for m in rig.feedback[first_good - 1:])


# ---------------------------------------------------------------------------- bad config
GOOD = {"inputs": ["edge"],
        **_entry("edge", "s/edge", "geometry_msgs/msg/PointStamped", ["point.y"], ["edge"])}


@pytest.mark.parametrize("change, message", [
    ({"inputs": ["edge", "edge"]}, "parameter 'inputs': entry 'edge' is listed twice"),
    ({"inputs": ["9lives"]}, "parameter 'inputs': entry name '9lives' must be letters, digits "
                             "and '_' and start with a letter or '_'"),
    ({"edge.type": "geometry_msgs/msg/Nope"},
     "input 'edge': unknown message type 'geometry_msgs/msg/Nope': package 'geometry_msgs' "
     "has no message 'Nope'"),
    ({"edge.type": "PointStamped"},
     "input 'edge': message type 'PointStamped' is not of the form 'package/msg/Type' "
     "(e.g. geometry_msgs/msg/PointStamped)"),
    ({"edge.fields": ["point.q"]},
     "input 'edge': field 'point.q': geometry_msgs/msg/Point has no field 'q' "
     "(fields: x, y, z)"),
    ({"edge.fields": ["point"]},
     "input 'edge': field 'point': ends at geometry_msgs/msg/Point, not a number"),
    ({"edge.fields": ["point[0]"]},
     "input 'edge': field 'point[0]': 'point' is geometry_msgs/msg/Point, not an array; it "
     "cannot be indexed"),
    ({"edge.type": "std_msgs/msg/Float64MultiArray", "edge.fields": ["data[j3]"]},
     "input 'edge': field 'data[j3]': 'j3' is a name, but std_msgs/msg/Float64MultiArray has "
     "no 'name' list of strings to look it up in (use a number as index)"),
    ({"edge.type": "geometry_msgs/msg/PoseWithCovarianceStamped",
      "edge.fields": ["pose.covariance[36]"]},
     "input 'edge': field 'pose.covariance[36]': index 36 is out of range for 'covariance' "
     "(double[36])"),
    ({"edge.features": ["a", "b"]},
     "input 'edge': 1 fields but 2 features (give one feature name per field)"),
    ({"edge.fields": ["point.y", "point.z"], "edge.features": ["a", "a"]},
     "input 'edge': feature 'a' is listed twice"),
    ({"inputs": ["edge", "other"],
      **_entry("other", "s/o", "std_msgs/msg/Float64", ["data"], ["edge"])},
     "feature 'edge' is produced by inputs 'edge' and 'other'; feature names must be unique"),
    ({"edge.scale": [1.0, 2.0]},
     "parameter 'edge.scale': has 2 values but there are 1 fields (give one per field, or "
     "omit it)"),
    ({"edge.filter": "median"},
     "parameter 'edge.filter' is 'median'; expected one of none, butter"),
    ({"edge.filter": "butter", "edge.cutoff_hz": 60.0, "edge.sample_rate_hz": 100.0},
     "input 'edge': cutoff_hz must be above 0 and below half of sample_rate_hz (50 Hz), "
     "got 60.0"),
    ({"edge.filter": "butter", "edge.cutoff_hz": 5.0},
     "input 'edge': sample_rate_hz must be positive (the rate the sensor publishes at), "
     "got 0.0"),
    ({"edge.filter": "butter", "edge.order": 12, "edge.cutoff_hz": 5.0,
      "edge.sample_rate_hz": 100.0},
     "parameter 'edge.order' is 12; expected an integer in [1, 8]"),
    ({"edge.cutoff_hz": "fast"}, "parameter 'edge.cutoff_hz' is 'fast'; expected a number "
                                 "in [0, inf)"),
    ({"edge.max_age": -1.0},
     "parameter 'edge.max_age' is -1.0; expected a number in (0, inf)"),
    ({"edge.qos": "fastest"},
     "parameter 'edge.qos' is 'fastest'; expected one of sensor_data, best_effort, "
     "reliable, transient_local"),
    ({"edge.topic": "bad topic"}, "input 'edge': cannot subscribe to topic 'bad topic'"),
    ({"publish_rate": -5.0}, "parameter 'publish_rate' is -5.0; expected a number in [0, inf)"),
])
def test_bad_config_is_refused_naming_the_entry(ctx, change, message):
    with pytest.raises(BridgeConfigError) as err:
        SensorBridge(context=ctx, parameter_overrides=_overrides({**GOOD, **change}))
    assert str(err.value).startswith(message)


def test_missing_required_parameters_are_named(ctx):
    with pytest.raises(BridgeConfigError, match="parameter 'inputs' is empty; expected a non-empty "
                                                "list of strings"):
        SensorBridge(context=ctx)
    params = {k: v for k, v in GOOD.items() if k != "edge.topic"}
    with pytest.raises(BridgeConfigError, match="parameter 'edge.topic' is empty; expected a "
                                                "non-empty string"):
        SensorBridge(context=ctx, parameter_overrides=_overrides(params))


def test_params_file_layout_loads_with_integer_values(ctx, tmp_path):
    path = tmp_path / "bridge.yaml"
    path.write_text(
        "sensor_bridge:\n"
        "  ros__parameters:\n"
        "    inputs: [edge]\n"
        "    publish_rate: 50\n"
        "    edge:\n"
        "      topic: edge_sensor/offset\n"
        "      type: geometry_msgs/PointStamped\n"
        "      fields: [point.y, point.z]\n"
        "      features: [edge_offset, edge_angle]\n"
        "      scale: [1000, 1]\n"
        "      offset: [0.0, 0.5]\n"   # rcl refuses mixed int/float lists
        "      filter: butter\n"
        "      order: 2\n"
        "      cutoff_hz: 8\n"
        "      sample_rate_hz: 100\n"
        "      max_age: 1\n")
    node = SensorBridge(context=ctx, cli_args=["--ros-args", "--params-file", str(path)])
    try:
        spec = node.inputs[0]
        assert spec.scale == (1000.0, 1.0) and spec.offset == (0.0, 0.5)
        assert spec.filter.cutoff_hz == 8.0 and spec.max_age == 1.0
    finally:
        node.destroy_node()


def test_executable_reports_bad_config_without_traceback(capsys):
    code = main(["--ros-args", "-p", "inputs:=[edge]", "-p", "edge.topic:=x",
                 "-p", "edge.type:=geometry_msgs/msg/Nope", "-p", "edge.fields:=[point.y]",
                 "-p", "edge.features:=[edge_y]"])
    assert code == 1
    assert "error: BridgeConfigError: input 'edge': unknown message type 'geometry_msgs/msg/Nope'" in \
        capsys.readouterr().err
    # YAML 1.1 reads an unquoted y as a boolean (YAML 1.1 spec, bool type; from memory).
    code = main(["--ros-args", "-p", "inputs:=[edge]", "-p", "edge.topic:=x",
                 "-p", "edge.type:=geometry_msgs/msg/PointStamped", "-p",
                 "edge.fields:=[point.y]", "-p", "edge.features:=[y]"])
    assert code == 1
    assert "error: BridgeConfigError: parameter 'edge.features' is [True]; expected a " \
           "non-empty list of strings (YAML reads unquoted y, n, yes, no, on, off, true, false as booleans: " \
           "quote such names)" in capsys.readouterr().err
