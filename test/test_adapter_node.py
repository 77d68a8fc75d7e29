# SPDX-License-Identifier: Apache-2.0
"""The adapter lifecycle node over real rclpy/DDS with the simulated cell.

Configure refusals, activation refused while the arm moves or joint_states is stale,
approach then hand-over to the policy, limit_scale changes mid-run, deactivation mid-motion
(a controlled stop while streaming; publishers deactivated at rest). Every streamed sample
is checked by an independent subscriber (`adapter_harness.check_stream`: finite
differences on the nominal stamps against the streamed derivatives and the limits).
"""
from __future__ import annotations

import time

import numpy as np
import pytest
import rclpy
from lifecycle_msgs.msg import Transition
from lifecycle_msgs.srv import ChangeState
from rclpy.parameter import Parameter
from std_msgs.msg import Float64MultiArray

import adapter_harness as h
from adaptive_streamer.core.limits import JointLimits

pytestmark = pytest.mark.ros


@pytest.fixture(scope="module")
def cell(tmp_path_factory):
    rclpy.init()
    folder = tmp_path_factory.mktemp("adapter_node")
    tracker = h.write_card(folder, "tracker", "tracker")
    # generous deviation thresholds: the limit_scale test makes the plan lag on purpose
    c = h.Cell(folder, tracker, watchdog__deviation_joint=0.5, watchdog__deviation_norm=1.0)
    try:
        c.wait_cell()
        yield c
    finally:
        try:
            c.close()
        finally:
            rclpy.shutdown()


def adapter_logs(cell: h.Cell, since: int) -> list[str]:
    return [m for name, m in cell.probe.logs[since:] if name == "adapter"]


def test_configure_refuses_bad_files_and_names_them(cell):
    assert cell.state() == "unconfigured"
    good_limits = str(h.LIMITS_FILE)
    n_logs = len(cell.probe.logs)
    assert all(r.successful for r in cell.set_params(limits_file="/nonexistent/limits.yaml"))
    assert not cell.transition(Transition.TRANSITION_CONFIGURE)
    assert cell.state() == "unconfigured"
    logs = adapter_logs(cell, n_logs)
    assert any("configure refused" in m and "/nonexistent/limits.yaml" in m for m in logs), logs
    # a card made for other joints: refused, the message names the card and the joints
    other = h.REPO / "test" / "data" / "policies" / "hold3.card.yaml"
    good_policy = cell.get_param("policy")
    cell.set_params(limits_file=good_limits, policy=str(other))
    n_logs = len(cell.probe.logs)
    assert not cell.transition(Transition.TRANSITION_CONFIGURE)
    logs = adapter_logs(cell, n_logs)
    assert any("hold3.card.yaml" in m and "joints" in m for m in logs), logs
    # a policy path that does not exist is refused at once (the parameter keeps its value)
    res = cell.set_params(policy="/nonexistent/card.yaml")[0]
    assert not res.successful and "/nonexistent/card.yaml" in res.reason
    cell.set_params(policy=good_policy)
    assert cell.transition(Transition.TRANSITION_CONFIGURE)
    assert cell.state() == "inactive"


def test_activation_refused_while_joint_states_is_stale(cell):
    assert cell.state() == "inactive"
    cell.probe.js_block = True
    try:
        time.sleep(0.5)  # older than watchdog.joint_states_timeout (0.3 s here)
        n_logs = len(cell.probe.logs)
        assert not cell.transition(Transition.TRANSITION_ACTIVATE)
        assert cell.state() == "inactive"
        logs = adapter_logs(cell, n_logs)
        assert any("activate refused" in m and "joint_states" in m for m in logs), logs
        assert not cell.probe.setpoints, "streamed while inactive"
    finally:
        cell.probe.js_block = False


def test_activation_refused_while_the_arm_moves(cell):
    # move the simulated arm directly (the adapter's publishers are inactive): j2 ramps away
    msg = Float64MultiArray()
    start = h.P0.copy()
    t0 = time.monotonic()
    refused = None
    n_logs = len(cell.probe.logs)
    while time.monotonic() - t0 < 3.0:
        s = time.monotonic() - t0
        target = start.copy()
        target[1] -= 0.25 * min(s, 1.6)   # 0.25 rad/s for 1.6 s
        msg.data = target.tolist()
        cell.probe.driver_pub.publish(msg)
        if refused is None and s > 0.6:
            refused = cell.transition(Transition.TRANSITION_ACTIVATE)
        time.sleep(0.004)
    assert refused is False
    logs = adapter_logs(cell, n_logs)
    assert any("activate refused" in m and "'j2' is moving" in m for m in logs), logs
    assert cell.state() == "inactive"
    assert not cell.probe.setpoints, "streamed while inactive"


def test_activation_approaches_then_hands_over_to_the_policy(cell):
    # the arm now rests about 0.4 rad from the reference start on j2: approach first
    time.sleep(0.3)  # the driver timed out and holds
    assert cell.transition(Transition.TRANSITION_ACTIVATE)
    cell.wait_mode("following", timeout=30.0)
    approach = list(cell.probe.setpoints)
    assert approach, "nothing streamed"
    # the approach runs at approach_scale (0.3) of the velocity/acceleration/jerk limits
    check = h.check_stream(approach, scale=0.3)
    assert check.ok, check.describe()
    assert np.abs(approach[0].position - h.P0)[1] > 0.3           # it started away ...
    assert np.allclose(approach[-1].position, h.P0, atol=5e-3)   # ... and reached the reference
    cell.start_reference()
    time.sleep(2.5)
    check = h.check_stream(cell.probe.setpoints)
    assert check.ok, check.describe()
    assert check.peak_ratio["velocity"] > 0.05, "the reference did not move the arm"
    assert check.off_grid == 0
    print("follow:", check.describe())
    # the driver output carries exactly the streamed positions
    streamed = {tuple(s.position) for s in cell.probe.setpoints}
    outputs = cell.probe.driver_positions[-200:]
    assert outputs and all(o in streamed for o in outputs)


def test_limit_scale_takes_effect_smoothly_and_is_respected(cell):
    assert cell.mode() == "following"
    res = cell.set_params(limit_scale=1.5)[0]
    assert not res.successful and "limit_scale" in res.reason
    t_set = cell.now()
    assert cell.set_params(limit_scale=0.1)[0].successful
    cell.wait_diag(lambda v: v.get("limit_scale") == "0.1", "limit_scale 0.1 on /diagnostics")
    time.sleep(2.0)
    t_back = cell.now()
    # raising it while active is refused (a faster arm needs a new configure, which runs
    # every check again); the reason says how
    res = cell.set_params(limit_scale=1.0)[0]
    assert not res.successful and "can only be lowered" in res.reason, res.reason
    assert "clean up" in res.reason and cell.get_param("limit_scale") == 0.1
    time.sleep(1.0)
    everything = h.check_stream(cell.samples_since(t_set - 0.5))
    assert everything.ok, everything.describe()
    # from one full stop after the change on, the scaled limits hold (a stop from the
    # hardware limits takes V/A + A/J < 0.5 s for these limits)
    scaled = [s for s in cell.samples_since(t_set + 0.6) if s.stamp < t_back]
    check = h.check_stream(scaled, scale=0.1)
    assert check.ok, check.describe()
    assert check.peak_ratio["velocity"] > 0.9, "the scaled limit never bound: test too weak"
    print("scaled:", check.describe())
    assert cell.mode() == "following"
    # the way back to full speed: deactivate (a controlled stop), clean up, set, configure
    for t in (Transition.TRANSITION_DEACTIVATE, Transition.TRANSITION_CLEANUP):
        assert cell.transition(t)
    assert cell.set_params(limit_scale=1.0)[0].successful
    assert cell.transition(Transition.TRANSITION_CONFIGURE)
    # the configure made new input subscriptions: activation is refused until a window and
    # joint states reached them (asked again, as bringup does)
    cell.start_following()
    cell.wait_diag(lambda v: float(v.get("limit_scale", 0)) == 1.0, "limit_scale 1 on /diagnostics")


def test_deactivate_mid_motion_stops_smoothly_then_deactivates_publishers(cell):
    assert cell.mode() == "following"
    fast = [s for s in cell.probe.setpoints[-25:]]
    assert max(np.abs(s.velocity).max() for s in fast) > 0.05, "not moving"
    t_req = cell.now()
    assert cell.transition(Transition.TRANSITION_DEACTIVATE)
    assert cell.state() == "inactive"
    count, outputs = len(cell.probe.setpoints), len(cell.probe.driver_positions)
    time.sleep(0.5)
    assert len(cell.probe.setpoints) == count, "setpoints after deactivation"
    assert len(cell.probe.driver_positions) == outputs, "driver output after deactivation"
    stop = cell.samples_since(t_req - 0.2)
    check = h.check_stream(stop)
    assert check.ok, check.describe()
    # the last setpoint (and the driver's last command) is at rest
    assert h.at_rest(stop[-1:]), (stop[-1].velocity, stop[-1].acceleration)
    assert cell.probe.driver_positions[-1] == tuple(stop[-1].position)
    cell.wait_diag(lambda v: v.get("status") == "inactive", "inactive on /diagnostics")


def test_reconfigure_and_activation_refused_outside_the_position_range(cell):
    # cleanup -> configure again with limits whose j1 range ends 0.05 rad below the parked
    # arm: configure works again, activation is refused and names the joint and its range
    assert cell.state() == "inactive"
    assert cell.transition(Transition.TRANSITION_CLEANUP)
    here = cell.probe.setpoints[-1].position
    lim = h.LIMITS
    pmax = lim.position_max.copy()
    pmax[0] = here[0] - 0.05
    narrow = JointLimits(lim.names, lim.position_min, pmax, lim.velocity_max,
                         lim.acceleration_max, lim.jerk_max, lim.continuous)
    narrow_file = h.write_limits(cell.folder, "narrow", narrow)
    card = h.write_card(cell.folder, "narrow_tracker", "tracker", limits=str(narrow_file))
    cell.set_params(limits_file=str(narrow_file), policy=str(card))
    assert cell.transition(Transition.TRANSITION_CONFIGURE)
    count = len(cell.probe.setpoints)
    n_logs = len(cell.probe.logs)
    time.sleep(0.3)
    assert not cell.transition(Transition.TRANSITION_ACTIVATE)
    logs = adapter_logs(cell, n_logs)
    assert any("activate refused" in m and "'j1'" in m and "position range" in m
               for m in logs), logs
    time.sleep(0.3)
    assert len(cell.probe.setpoints) == count
    # back to the demo limits: activation works from the same place
    assert cell.transition(Transition.TRANSITION_CLEANUP)
    cell.set_params(limits_file=str(h.LIMITS_FILE), policy=str(cell.folder / "tracker.card.yaml"))
    assert cell.transition(Transition.TRANSITION_CONFIGURE)
    time.sleep(0.3)
    assert cell.transition(Transition.TRANSITION_ACTIVATE)
    cell.wait_mode("following")
    check = h.check_stream(cell.samples_since(cell.now() - 1.0))
    assert check.ok, check.describe()


def test_a_transition_not_valid_in_the_current_state_is_refused_and_the_arm_goes_on(cell):
    # configure, cleanup and activate are not transitions of 'active': each is answered
    # "refused" (the installed rclpy would raise in the callback and end the process)
    assert cell.state() == "active"
    n_logs = len(cell.probe.logs)
    t0 = cell.now()
    for transition in (Transition.TRANSITION_CONFIGURE, Transition.TRANSITION_CLEANUP,
                       Transition.TRANSITION_ACTIVATE):
        assert not cell.transition(transition)
    req = ChangeState.Request()
    req.transition.label = "configure"
    assert not cell.call(ChangeState, "/adapter/change_state", req).success
    assert cell.state() == "active"
    logs = adapter_logs(cell, n_logs)
    assert any("change_state refused" in m and "not valid in state 'active'" in m
               for m in logs), logs
    time.sleep(0.5)   # the stream went on, continuous and within the limits
    after = cell.samples_since(t0)
    assert len(after) > 100
    check = h.check_stream(after)
    assert check.ok, check.describe()


def test_configuration_is_locked_while_configured_and_thresholds_only_tighten(cell):
    cell.wait_mode("following")
    t0 = cell.now()
    # configure-time parameters: refused with the way to change them, value unchanged
    for name, value in (("limits_file", "/tmp/other_limits.yaml"), ("stream_rate", 500.0),
                        ("stop_timeout", 0.5), ("decision_period", 0.1),
                        ("watchdog__command_latency", 0.5)):
        before = cell.get_param(name.replace("__", "."))
        res = cell.set_params(**{name: value})[0]
        assert not res.successful, name
        assert name.replace("__", ".") in res.reason and "read at configure" in res.reason
        assert "clean up" in res.reason and "active" in res.reason, res.reason
        assert cell.get_param(name.replace("__", ".")) == before
    # an atomic change is judged as a whole: one refused entry keeps the other out too
    fut = cell.probe.params.set_parameters_atomically(
        [Parameter("limit_scale", value=0.5), Parameter("stream_rate", value=500.0)])
    h.wait_until(fut.done, "set_parameters_atomically")
    res = fut.result().result
    assert not res.successful and "stream_rate" in res.reason
    assert cell.get_param("limit_scale") == 1.0
    # loosening a threshold is refused; the range is in the ROS descriptor for any tool
    res = cell.set_params(watchdog__following_error=0.5)[0]
    assert not res.successful and "can only be lowered" in res.reason, res.reason
    fut = cell.probe.params.describe_parameters(["limit_scale", "watchdog.max_overruns"])
    h.wait_until(fut.done, "describe_parameters")
    scale, overruns = fut.result().descriptors
    assert (scale.floating_point_range[0].from_value, scale.floating_point_range[0].to_value) \
        == (0.0, 1.0)
    assert "only lowered" in scale.additional_constraints
    assert overruns.integer_range[0].from_value == 1
    # out of the descriptor's range: refused by rclpy before the adapter looks at it
    assert not cell.set_params(limit_scale=-1.0)[0].successful
    # tightening acts at once: a following-error threshold below the driver's lag stops the
    # arm with a reason naming the new threshold, smoothly and within the limits
    assert cell.set_params(watchdog__following_error=1e-6)[0].successful
    vals = cell.wait_diag(lambda v: v.get("trip") == "following_error",
                          "following_error trip after tightening")[3]
    assert "exceeds following_error 1e-06 rad" in vals["trip_message"], vals["trip_message"]
    cell.wait_rest()
    check = h.check_stream(cell.samples_since(t0))
    assert check.ok, check.describe()
