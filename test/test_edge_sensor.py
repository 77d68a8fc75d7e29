# SPDX-License-Identifier: Apache-2.0
"""edge_sensor: a real rclpy node over DDS under sim time driven by the test's /clock.

The test publishes joint states for known nozzle poses and checks the published reading
against plane geometry worked by hand, the stamp/latency, and the measuring range.
"""
import math
import time
from pathlib import Path

import numpy as np
import pytest
import rclpy
import yaml
from geometry_msgs.msg import PointStamped
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.parameter import Parameter
from rosgraph_msgs.msg import Clock
from sensor_msgs.msg import JointState

from adaptive_streamer.sim.arm import DEMO_ARM
from adaptive_streamer.sim.config import load_scenario
from adaptive_streamer.sim.nominal_path import nozzle_poses
from adaptive_streamer.io.stamps import sec_to_stamp, stamp_to_sec
from adaptive_streamer.nodes.common import reliable_qos
from adaptive_streamer.nodes.edge_sensor import EdgeSensor, EdgeSensorError

pytestmark = pytest.mark.ros
WAIT_S = 15.0     # upper bound for DDS discovery/delivery; not a speed assertion
DEMO = Path(__file__).resolve().parents[1] / "config" / "demo" / "scenario.yaml"
T0 = 50.0
SEED_Q = np.array([0.0, 0.72, 0.36, 0.0, 0.5, -1.57])


@pytest.fixture(scope="module")
def ctx():
    context = Context()
    rclpy.init(context=context)
    yield context
    rclpy.shutdown(context=context)


@pytest.fixture
def quiet_scenario(tmp_path):
    data = yaml.safe_load(DEMO.read_text())
    data["sensor"].update(offset_noise_mm=0.0, angle_noise_deg=0.0)
    path = tmp_path / "quiet.yaml"
    path.write_text(yaml.safe_dump(data))
    return str(path)


class Rig:
    def __init__(self, ctx, params):
        overrides = [Parameter(k, value=v) for k, v in {"use_sim_time": True, **params}.items()]
        self.ex = SingleThreadedExecutor(context=ctx)
        self.sensor = EdgeSensor(context=ctx, parameter_overrides=overrides)
        self.node = rclpy.create_node("edge_sensor_test", context=ctx)
        self.readings: list[PointStamped] = []
        self.sub = self.node.create_subscription(PointStamped, "edge_sensor/offset",
                                                 self.readings.append, reliable_qos(100))
        self.js = self.node.create_publisher(JointState, "joint_states", reliable_qos(10))
        self.clock = self.node.create_publisher(Clock, "/clock", 10)
        self.ex.add_node(self.sensor)
        self.ex.add_node(self.node)
        self.spin_until(lambda: self.sub.get_publisher_count() > 0
                        and self.js.get_subscription_count() > 0)

    def close(self):
        for n in (self.sensor, self.node):
            self.ex.remove_node(n)
            n.destroy_node()
        self.ex.shutdown()

    def spin_until(self, pred, action=None):
        end = time.monotonic() + WAIT_S
        while not pred():
            if time.monotonic() > end:
                raise AssertionError("condition not met within the wait bound")
            if action is not None:
                action()
            self.ex.spin_once(timeout_sec=0.01)

    def tick_to(self, t):
        """Set the clock to t and wait until the sensor's timer has run at t."""
        ticks = self.sensor.ticks
        msg = Clock(clock=sec_to_stamp(t))
        self.spin_until(lambda: self.sensor.ticks > ticks
                        and self.sensor.get_clock().now().nanoseconds == round(t * 1e9),
                        lambda: self.clock.publish(msg))

    def joint_state(self, q, t, names=None):
        received = self.sensor.joint_states_received + self.sensor.joint_states_rejected
        msg = JointState(name=names or list(DEMO_ARM.joints), position=list(q))
        sec_to_stamp(t, msg.header.stamp)
        self.js.publish(msg)
        self.spin_until(lambda: self.sensor.joint_states_received
                        + self.sensor.joint_states_rejected > received)


@pytest.fixture
def rig(ctx):
    rigs = []

    def make(params):
        rigs.append(Rig(ctx, params))
        return rigs[-1]

    yield make
    for r in rigs:
        r.close()


def pose_at(x, y, z):
    """Joint positions putting the nozzle at (x, y, z), pointing down, travelling along +y."""
    cfg = load_scenario(DEMO).nominal_pass
    target = nozzle_poses(cfg, 0.0, np.array([0.0]))[0]
    target[:3, 3] = (x, y, z)
    return DEMO_ARM.inverse(target, SEED_Q)


def test_reading_matches_hand_geometry_with_stamp_and_latency(rig, quiet_scenario):
    offset_mm, angle_deg = 3.0, 1.0
    r = rig({"scenario": quiet_scenario, "panel_offset_mm": offset_mm,
             "panel_angle_deg": angle_deg})
    r.tick_to(T0)
    q = pose_at(0.805, 0.05, 0.207)
    r.joint_state(q, T0)
    r.tick_to(T0 + 0.01)                           # sampled here, stamped T0
    r.tick_to(T0 + 0.02)                           # 20 ms after the sample time: held back
    assert r.sensor.sensor.samples == 1 and r.readings == [] and r.sensor.published == 0
    r.tick_to(T0 + 0.03)                           # 30 ms (the latency): delivered
    r.spin_until(lambda: len(r.readings) == 1)
    got = r.readings[0]
    assert stamp_to_sec(got.header.stamp) == pytest.approx(T0, abs=1e-9)
    # by hand: the panel is rotated by a about its centre c = (1, 0) and shifted by s along
    # the nominal left normal (-1, 0); the real edge has direction (-sin a, cos a), left
    # normal n = (-cos a, -sin a) and passes through c + R(a) (-0.2, 0) + s (-1, 0)
    a, s = math.radians(angle_deg), offset_mm * 1e-3
    through = np.array([1.0 - 0.2 * math.cos(a) - s, -0.2 * math.sin(a)])
    by_hand = (np.array([0.805, 0.05]) - through) @ np.array([-math.cos(a), -math.sin(a)])
    assert got.point.y == pytest.approx(by_hand, abs=1e-9)
    assert got.point.z == pytest.approx(a, abs=1e-9)     # travel axis +y, edge turned by a
    assert got.point.x == 0.0


def test_out_of_range_is_not_published_and_joint_order_is_by_name(rig, quiet_scenario):
    r = rig({"scenario": quiet_scenario, "panel_offset_mm": 0.0, "panel_angle_deg": 0.0})
    r.tick_to(T0)
    far = pose_at(0.78, 0.0, 0.207)                        # 20 mm off the edge (range 15 mm)
    r.joint_state(far, T0)
    r.tick_to(T0 + 0.01)
    near = pose_at(0.79, 0.0, 0.207)                       # 10 mm: in range
    order = [5, 3, 1, 0, 2, 4]
    r.joint_state(near[order], T0 + 0.01, names=[DEMO_ARM.joints[i] for i in order])
    for k in range(2, 6):
        r.tick_to(T0 + 0.01 * k)
    r.spin_until(lambda: len(r.readings) == 1)
    assert r.sensor.sensor.out_of_range == 1 and r.sensor.sensor.samples == 2
    assert stamp_to_sec(r.readings[0].header.stamp) == pytest.approx(T0 + 0.01, abs=1e-9)
    assert r.readings[0].point.y == pytest.approx(0.01, abs=1e-9)   # left of the edge: +
    r.joint_state(near[:5], T0 + 0.05, names=list(DEMO_ARM.joints[:5]))
    assert r.sensor.joint_states_rejected == 1


def test_placement_comes_from_the_seed_unless_given(ctx):
    scenario = load_scenario(DEMO)
    node = EdgeSensor(context=ctx, parameter_overrides=[Parameter("seed", value=5)])
    try:
        assert node.panel.offset == scenario.panel(5).offset
        assert node.panel.angle == scenario.panel(5).angle
        assert 2e-3 <= abs(node.panel.offset) <= 6e-3
    finally:
        node.destroy_node()
    node = EdgeSensor(context=ctx, parameter_overrides=[Parameter("panel_angle_deg", value=-0.8)])
    try:
        assert node.panel.offset == scenario.panel().offset          # the file's seed
        assert node.panel.angle == pytest.approx(math.radians(-0.8))
    finally:
        node.destroy_node()
    for params, words in (({"seed": -2}, "'seed'"), ({"scenario": "/nonexistent.yaml"},
                                                     "scenario.*cannot read"),
                          ({"output_qos": "x"}, "output_qos")):
        with pytest.raises(EdgeSensorError, match=words):
            EdgeSensor(context=ctx, parameter_overrides=[Parameter(k, value=v)
                                                         for k, v in params.items()])
