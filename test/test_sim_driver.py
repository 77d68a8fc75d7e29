# SPDX-License-Identifier: Apache-2.0
"""sim_driver: a real rclpy node over DDS under sim time driven by the test's /clock.

The test node publishes commands and ``/clock`` one tick at a time, waiting for the driver
to receive each command and for the ``joint_states`` of each tick, so the run is
deterministic and can be compared sample by sample with the closed-form response and with
the core plant.
"""
import math
import time

import numpy as np
import pytest
import rclpy
from diagnostic_msgs.msg import DiagnosticArray
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.parameter import Parameter
from rosgraph_msgs.msg import Clock
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from adaptive_streamer.sim.plant import PlantConfig, SimPlant
from adaptive_streamer.io.stamps import sec_to_stamp, stamp_to_sec
from adaptive_streamer.nodes.common import reliable_qos
from adaptive_streamer.nodes.sim_driver import SimDriver, SimDriverError
from test_sim_plant import underdamped_step

pytestmark = pytest.mark.ros
WAIT_S = 15.0     # upper bound for DDS discovery/delivery; not a speed assertion
DT = 0.004
T0 = 100.0
JOINTS = ["a", "b", "c"]


@pytest.fixture(scope="module")
def ctx():
    context = Context()
    rclpy.init(context=context)
    yield context
    rclpy.shutdown(context=context)


class Rig:
    """The driver under test, a test node with command/clock publishers, one executor."""

    def __init__(self, ctx, params, topic="driver/position_command", msg_type=Float64MultiArray):
        overrides = [Parameter(k, value=v) for k, v in
                     {"joints": JOINTS, "use_sim_time": True, **params}.items()]
        self.ex = SingleThreadedExecutor(context=ctx)
        self.driver = SimDriver(context=ctx, parameter_overrides=overrides)
        self.node = rclpy.create_node("sim_driver_test", context=ctx)
        self.states: list[JointState] = []
        self.diagnostics: list[DiagnosticArray] = []
        self.sub = self.node.create_subscription(JointState, "joint_states", self.states.append,
                                                 reliable_qos(1000))
        self.node.create_subscription(DiagnosticArray, "/diagnostics", self.diagnostics.append,
                                      reliable_qos(100))
        self.cmd = self.node.create_publisher(msg_type, topic, reliable_qos(10))
        self.clock = self.node.create_publisher(Clock, "/clock", 10)
        self.ex.add_node(self.driver)
        self.ex.add_node(self.node)
        self.spin_until(lambda: self.sub.get_publisher_count() > 0
                        and self.cmd.get_subscription_count() > 0)
        self.t = None

    def close(self):
        for n in (self.driver, self.node):
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
        """Set the clock to t and wait for the joint_states stamped t."""
        self.t = t
        msg = Clock(clock=sec_to_stamp(t))
        self.spin_until(lambda: bool(self.states) and
                        abs(stamp_to_sec(self.states[-1].header.stamp) - t) < 1e-9,
                        lambda: self.clock.publish(msg))

    def send(self, msg):
        """Publish a command and wait until the driver has taken or rejected it."""
        before = self.driver.plant.commands_received + self.driver.rejected
        self.cmd.publish(msg)
        self.spin_until(lambda: self.driver.plant.commands_received + self.driver.rejected
                        > before)

    def positions(self):
        return np.array([s.position for s in self.states])

    def status(self):
        for arr in reversed(self.diagnostics):
            for st in arr.status:
                if st.name == "sim_driver":
                    return st, {kv.key: kv.value for kv in st.values}
        return None, {}


@pytest.fixture
def rig(ctx):
    rigs = []

    def make(params, **kw):
        rigs.append(Rig(ctx, params, **kw))
        return rigs[-1]

    yield make
    for r in rigs:
        r.close()


QUIET = {"position_noise": 0.0, "velocity_noise": 0.0}


def test_step_command_is_tracked_after_two_ticks_with_the_second_order_lag(rig):
    wn, zeta = 60.0, 0.7
    r = rig({**QUIET, "initial_positions": [0.1, 0.2, 0.3], "natural_frequency": wn,
             "damping": zeta, "delay_ticks": 2})
    r.tick_to(T0)                                        # tick 0: holding, no command yet
    for k in range(1, 61):
        r.send(Float64MultiArray(data=[0.2, 0.2, 0.3]))  # a step of +0.1 on the first joint
        r.tick_to(T0 + k * DT)
    st = r.states
    assert [s.name for s in st[-1:]] == [JOINTS]
    stamps = np.array([stamp_to_sec(s.header.stamp) for s in st])
    np.testing.assert_allclose(stamps, T0 + DT * np.arange(61), atol=1e-9)
    pos = r.positions()[:, 0]
    vel = np.array([s.velocity for s in st])[:, 0]
    # the command taken before tick 1 drives the lag during tick 3 (two ticks of delay), so
    # tick k shows the step response at (k - 2) dt (Ogata closed form, from memory)
    np.testing.assert_array_equal(pos[:3], 0.1)
    c, dc = underdamped_step(DT * (np.arange(3, 61) - 2), wn, zeta)
    np.testing.assert_allclose(pos[3:], 0.1 + 0.1 * c, atol=1e-12)
    np.testing.assert_allclose(vel[3:], 0.1 * dc, atol=1e-9)
    np.testing.assert_array_equal(r.positions()[:, 1:], [[0.2, 0.3]] * 61)


def test_noisy_stream_equals_the_seeded_core_plant_and_timeout_holds(rig):
    # a timeout that is not a multiple of the tick: no borderline float comparison
    params = {"initial_positions": [0.0, 0.5, -0.5], "seed": 9, "command_timeout": 0.098}
    r = rig(params)
    r.tick_to(T0)
    cmds = [[0.01 * k, 0.5, -0.5 + 0.02 * k] for k in range(1, 31)]
    for k, c in enumerate(cmds, start=1):
        r.send(Float64MultiArray(data=c))
        r.tick_to(T0 + k * DT)
    # the same inputs into the core plant: the node only converts
    plant = SimPlant(PlantConfig(dt=DT, command_timeout=0.098), params["initial_positions"],
                     seed=9)
    expected = [plant.step(T0)]
    for k, c in enumerate(cmds, start=1):
        plant.command(c, T0 + (k - 1) * DT)
        expected.append(plant.step(T0 + k * DT))
    np.testing.assert_allclose(r.positions(), [e.position for e in expected], atol=1e-12)
    np.testing.assert_allclose([s.velocity for s in r.states], [e.velocity for e in expected],
                               atol=1e-12)
    # commands stop: one clock jump of 0.2 s; the driver steps every tick it owes and holds
    # once the last command (received at T0 + 29 dt) is older than the timeout
    before = len(r.states)
    r.tick_to(T0 + 80 * DT)
    assert len(r.states) - before == 50 and r.driver.catch_up_ticks == 49
    true_state = []
    for k in range(31, 81):
        true_state.append(plant.step(T0 + k * DT))
    np.testing.assert_allclose(r.positions()[before:], [e.position for e in true_state],
                               atol=1e-12)
    holding = [e.holding for e in true_state]
    first_hold = holding.index(True)
    assert all(holding[first_hold:]) and 31 + first_hold == 29 + 25   # 0.1 s > 0.098 s
    assert r.driver.plant.timeouts == 1
    r.spin_until(lambda: r.status()[1].get("timeouts") == "1",       # diagnostics at ~1 Hz
                 lambda: r.tick_to(r.t + 25 * DT))
    st, values = r.status()
    assert st.level == st.WARN and values["timeouts"] == "1" and "holding" in st.message


def test_velocity_interface_integrates(rig):
    r = rig({**QUIET, "command_interface": "velocity", "initial_positions": [0.0, 0.0, 1.0],
             "delay_ticks": 0}, topic="driver/velocity_command")
    r.tick_to(T0)
    for k in range(1, 201):
        r.send(Float64MultiArray(data=[0.5, 0.0, -0.25]))
        r.tick_to(T0 + k * DT)
    pos = r.positions()
    # after 0.8 s at constant velocity the lag trails the ramp v t by 2 zeta v / wn (ramp
    # error, Ogata sec. 5-8, from memory), less half a tick: the target held over each tick
    # is the integral at the tick's end (zero-order hold, common practice)
    lag = 2 * 0.7 / 60.0 - DT / 2
    assert pos[-1, 0] == pytest.approx(0.5 * (200 * DT - lag), abs=1e-5)
    assert pos[-1, 2] == pytest.approx(1.0 - 0.25 * (200 * DT - lag), abs=1e-5)
    assert pos[-1, 0] - pos[-2, 0] == pytest.approx(0.5 * DT, abs=1e-9)


def test_trajectory_interface_maps_joint_names_and_rejects_bad_messages(rig):
    r = rig({**QUIET, "command_interface": "trajectory", "delay_ticks": 0,
             "natural_frequency": 400.0, "damping": 1.0},
            topic="driver/trajectory_command", msg_type=JointTrajectory)
    r.tick_to(T0)

    def traj(names, points):
        return JointTrajectory(joint_names=names, points=[
            JointTrajectoryPoint(positions=p) for p in points])

    for k in range(1, 41):
        r.send(traj(["c", "a", "b"], [[0.3, 0.1, 0.2]]))
        r.tick_to(T0 + k * DT)
    np.testing.assert_allclose(r.positions()[-1], [0.1, 0.2, 0.3], atol=1e-6)
    # time_from_start: the target moves there linearly over that time (core plant twin)
    goal = traj(["a", "b", "c"], [[0.5, 0.2, 0.3]])
    goal.points[0].time_from_start.nanosec = 5 * 4_000_000
    r.send(goal)
    recv = r.t
    twin = SimPlant(PlantConfig(dt=DT, delay_ticks=0, natural_frequency=400.0, damping=1.0,
                                position_noise=0.0, velocity_noise=0.0), [0.0, 0.0, 0.0])
    twin.step(T0)
    for k in range(1, 41):                                 # the same inputs as the node's
        twin.command([0.1, 0.2, 0.3], T0 + (k - 1) * DT)
        twin.step(T0 + k * DT)
    twin.command([0.5, 0.2, 0.3], recv, reach_in=5 * DT)
    for k in range(1, 8):
        r.tick_to(recv + k * DT)
        np.testing.assert_allclose(r.positions()[-1], twin.step(recv + k * DT).position,
                                   atol=1e-12)
    assert r.positions()[-1, 0] == pytest.approx(0.5, abs=0.02)   # nearly there
    r.send(traj(["c", "a", "b"], [[0.3, 0.1, 0.2], [0.0, 0.0, 0.0]]))      # two points
    r.send(traj(["a", "b", "x"], [[0.3, 0.1, 0.2]]))                       # unknown joint
    r.send(traj(["a", "b", "c"], [[0.3, 0.1]]))                            # short point
    r.send(traj(["a", "b", "c"], [[0.3, math.nan, 0.1]]))                  # NaN
    assert r.driver.rejected == 4 and r.driver.plant.commands_received == 41


def test_bad_parameters_name_the_parameter(ctx):
    cases = [({"command_interface": "effort"}, "command_interface"),
             ({"initial_positions": [0.0, 1.0]}, "initial_positions"),
             ({"rate": 0.0}, "'rate'"),
             ({"damping": -1.0}, "damping"),
             ({"joints": ["a", "a"]}, "unique"),
             ({"command_qos": "loud"}, "command_qos")]
    for params, words in cases:
        overrides = [Parameter(k, value=v) for k, v in {"joints": JOINTS, **params}.items()]
        with pytest.raises(SimDriverError, match=words):
            SimDriver(context=ctx, parameter_overrides=overrides)


def test_wall_clock_run_publishes_on_the_tick_grid(rig):
    r = rig({**QUIET, "use_sim_time": False})
    r.spin_until(lambda: len(r.states) >= 20)
    ns = np.array([s.header.stamp.sec * 10 ** 9 + s.header.stamp.nanosec for s in r.states])
    steps = np.diff(ns)
    assert np.all(steps % 4_000_000 == 0) and np.all(steps > 0)   # on the grid, one per tick
