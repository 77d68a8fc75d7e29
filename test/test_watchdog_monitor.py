# SPDX-License-Identifier: Apache-2.0
"""The outside watchdog: `StreamMonitor` (core) and the ``watchdog`` node over real DDS.

Core: a plan at its jerk limit sampled at 250 Hz from epoch-sized times passes; limit and
continuity failures are named; the following error compares the measurement with the
command ``command_latency`` earlier (a linearly moving command makes the interpolated
command exact, so the expected error is worked by hand).

Node: next to the live adapter it reports a clean run; a following error below the
adapter's own threshold but above its own makes it call the adapter's ``~/stop`` (the
adapter stops, naming the request); a synthetic stream with a jump is reported.
"""
from __future__ import annotations

import math
import subprocess
import time

import numpy as np
import pytest
import rclpy
import yaml
from lifecycle_msgs.msg import Transition
from trajectory_msgs.msg import JointTrajectory

import adapter_harness as h
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.monitor import MonitorError, StreamMonitor
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.core.stream import CommandPlan, Segment
from adaptive_streamer.bringup import child_command
from adaptive_streamer.core.watchdog import WatchdogConfig
from adaptive_streamer.nodes.common import reliable_qos
from adaptive_streamer.nodes.driver_outputs import fill_setpoint, setpoint_message
from adaptive_streamer.nodes.watchdog_monitor import WatchdogMonitor, WatchdogMonitorError

pytestmark = pytest.mark.ros

EPOCH = 1_796_000_000.0
LIM2 = JointLimits(["a", "b"], [-2.0, -1.0], [2.0, 1.0], [2.0, 1.5], [8.0, 6.0], [80.0, 60.0])


def ms(p=(0.0, 0.0), v=(0.0, 0.0), a=(0.0, 0.0)) -> MotionState:
    return MotionState(np.array(p, float), np.array(v, float), np.array(a, float))


# ---------------------------------------------------------------------------- core
def test_a_plan_at_its_jerk_limit_passes():
    T, rate = 0.05, 250.0
    t0 = math.ceil(EPOCH * rate) / rate
    plan = CommandPlan(T, keep=100)
    p, v, a, t = np.zeros(2), np.zeros(2), np.zeros(2), t0
    for u in [[4.0, -3.0], [0.0, 0.0], [-4.0, 3.0], [0.0, 0.0]] * 5:  # |u - a| = J T
        u = np.array(u)
        plan.commit(Segment(t, MotionState(p, v, a), u))
        p, v, a = p + T * v + T * T * (2 * a + u) / 6, v + T * (a + u) / 2, u
        t += T
    mon = StreamMonitor(LIM2, WatchdogConfig())
    for i in range(int(20 * T * rate)):
        assert mon.setpoint(t0 + i / rate, plan.sample(t0 + i / rate)) is None, i
    assert mon.stats.setpoint_violations == 0 and mon.stats.setpoints == 250


def test_limit_and_continuity_failures_are_named():
    mon = StreamMonitor(LIM2, WatchdogConfig())
    assert mon.setpoint(1.0, ms()) is None
    r = mon.setpoint(1.004, ms(v=(0.0, 1.6)))
    assert "velocity over its limit on joint 'b'" in r
    r = mon.setpoint(1.008, ms(p=(0.02, 0.0)))   # V dt = 2 * 0.008 = 0.016
    assert "position jumps" in r and "'a'" in r
    assert mon.stats.setpoint_violations == 2 and mon.stats.last_setpoint_violation == r
    with pytest.raises(MonitorError, match="2 positions"):
        mon.setpoint(1.1, ms(p=(0.0, 0.0, 0.0), v=(0, 0, 0), a=(0, 0, 0)))


def test_following_error_against_the_command_latency_earlier():
    cfg = WatchdogConfig(following_error=0.05, command_latency=0.012)
    mon = StreamMonitor(LIM2, cfg)
    speed = np.array([0.5, -0.25])   # a command moving linearly: interpolation is exact
    for i in range(100):
        t = 10.0 + i * 0.004
        mon.setpoint(t, ms(p=speed * (t - 10.0), v=speed))
    # measured at 10.2 s, exactly the command of 10.188 s: no error
    stamp = 10.2
    assert mon.joint_state(stamp, speed * (stamp - 0.012 - 10.0)) is None
    assert mon.stats.following_error_max == pytest.approx(0.0, abs=1e-12)
    # 0.06 rad behind on 'b'
    r = mon.joint_state(stamp, speed * (stamp - 0.012 - 10.0) + [0.0, 0.06])
    assert r is not None and "'b'" in r and "following_error" in r
    assert mon.stats.following_violations == 1
    assert mon.stats.following_error_max == pytest.approx(0.06)
    # older than the kept setpoints, or ahead of the stream: not judged
    judged = mon.stats.judged
    assert mon.joint_state(9.0, np.zeros(2)) is None
    assert mon.joint_state(11.0, np.zeros(2)) is None
    assert mon.stats.judged == judged
    with pytest.raises(MonitorError, match="2 positions"):
        mon.joint_state(10.2, np.zeros(3))


def test_following_error_with_a_driver_clock_half_a_second_behind():
    # the driver stamps on its own clock, 0.5 s behind this one (not synchronised): its
    # stamps fall before the kept setpoints; with the arrival times the monitor maps them
    # onto this clock and judges every message
    cfg = WatchdogConfig(following_error=0.05, command_latency=0.012)
    mon = StreamMonitor(LIM2, cfg, history=100)
    speed = np.array([0.5, -0.25])
    for i in range(100):
        t = 10.0 + i * 0.004
        mon.setpoint(t, ms(p=speed * (t - 10.0), v=speed))
    for arrival in (10.2, 10.24, 10.3):
        measured = speed * (arrival - 0.002 - 0.012 - 10.0)   # taken 2 ms before arrival
        assert mon.joint_state(arrival - 0.002 - 0.5, measured, arrival=arrival) is None
    assert mon.stats.judged == 3 and mon.driver_clock.correction == pytest.approx(0.502)
    r = mon.joint_state(10.35 - 0.002 - 0.5, speed * (10.35 - 0.014 - 10.0) + [0.06, 0.0],
                        arrival=10.35)
    assert r is not None and "'a'" in r


# ---------------------------------------------------------------------------- node
@pytest.fixture(scope="module")
def cell(tmp_path_factory):
    rclpy.init()
    folder = tmp_path_factory.mktemp("monitor")
    # the adapter's own following check at 0.1 rad, the monitor's at 0.04: the simulated
    # driver's lag alone reaches 0.025 rad in a loaded test run (j6, measured)
    c = h.Cell(folder, h.write_card(folder, "tracker", "tracker"),
               watchdog__following_error=0.1)
    # the watchdog in its own process, as it runs next to a real cell
    params = folder / "watchdog.yaml"
    params.write_text(yaml.safe_dump({"watchdog": {"ros__parameters": {
        "limits_file": str(h.LIMITS_FILE),
        "following_error": 0.04,   # stricter than the adapter's 0.1
        "stop_on_violation": True}}}))
    monitor = subprocess.Popen(child_command(["watchdog"], str(params)))
    try:
        c.wait_diag(lambda v: True, "the watchdog's first diagnostics", name="watchdog",
                    timeout=60.0)
        c.start_following()
        c.start_reference()
        yield c
    finally:
        try:
            h.stop_process(monitor)
        finally:
            try:
                c.close()
            finally:
                rclpy.shutdown()


def test_node_refuses_missing_limits(cell):
    with pytest.raises(WatchdogMonitorError, match="limits_file"):
        WatchdogMonitor()


def test_clean_run_is_reported_clean(cell):
    time.sleep(2.0)
    vals = cell.wait_diag(lambda v: int(v.get("joint_states_judged", 0)) > 100,
                          "watchdog diagnostics", name="watchdog")[3]
    assert int(vals["setpoints_checked"]) > 300
    assert vals["setpoint_violations"] == "0" and vals["following_violations"] == "0"
    assert float(vals["following_error_max"]) < 0.04


def test_following_error_makes_it_stop_the_adapter(cell):
    offset = np.zeros(h.N)
    offset[1] = 0.06   # over the monitor's 0.04, under the adapter's own 0.1
    cell.probe.js_offset = offset
    vals = cell.wait_diag(lambda v: int(v.get("following_violations", 0)) > 0,
                          "following violation", name="watchdog")[3]
    assert "'j2'" in vals["last_following_violation"]
    d = cell.wait_diag(lambda v: v.get("trip") == "external_stop", "adapter stopped")[3]
    assert "~/stop" in d["trip_message"]
    cell.wait_rest()
    cell.probe.js_offset = None
    stop = cell.samples_since(cell.now() - 3.0)
    check = h.check_stream(stop)
    assert check.ok, check.describe()
    assert int(cell.wait_diag(lambda v: True, "diagnostics", name="watchdog")[3]["stop_calls"]) >= 1


def test_a_jump_in_the_stream_is_reported(cell):
    assert cell.transition(Transition.TRANSITION_DEACTIVATE)   # the adapter stops publishing
    pub = cell.probe.create_publisher(JointTrajectory, "setpoints", reliable_qos(10))
    h.wait_until(lambda: pub.get_subscription_count() >= 2, "setpoints subscribers")
    msg = setpoint_message(h.JOINTS)
    t0 = cell.now()
    here = cell.probe.setpoints[-1].position.copy()
    for i in range(20):
        p = here.copy()
        if i >= 15:
            p[4] += 0.05   # a 0.05 rad step on j5 in 4 ms (V dt = 0.0112)
        fill_setpoint(msg, t0 + i * 0.004, MotionState(p, np.zeros(h.N), np.zeros(h.N)))
        pub.publish(msg)
        time.sleep(0.004)
    vals = cell.wait_diag(lambda v: int(v.get("setpoint_violations", 0)) > 0,
                          "setpoint violation", name="watchdog")[3]
    assert "position jumps" in vals["last_setpoint_violation"]
    assert "'j5'" in vals["last_setpoint_violation"]
    cell.probe.destroy_publisher(pub)
