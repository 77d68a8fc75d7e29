# SPDX-License-Identifier: Apache-2.0
"""Every watchdog trigger of the live adapter over real rclpy/DDS.

For each trigger the fault is injected through the probe (relayed inputs blocked, offset or
truncated; feedback withheld or set to a value that makes the ONNX policy fail; a slow
policy; the stop service and topic; limits that put the parked arm outside its range),
then, from outside the adapter:

* the stream comes to rest within the limits (independent finite-difference check of every
  sample, `adapter_harness.check_stream`);
* /diagnostics of the adapter names the reason (values ``trip`` and ``trip_message``);
* the reference server was paused (its own /diagnostics ``state``);
* ``~/reset`` is refused while a persistent cause is still present (the message says why)
  and accepted once it is gone (or at rest, for one-shot causes) and the inputs have been
  fresh, the feedback changing, for ``watchdog.reset_hold``; the adapter then re-approaches
  and follows again.

Input provenance: a rogue second publisher of each input (a node of this process that
echoes the input's latest message) stops the arm as ``input_source`` naming the rogue, and
so do windows off the whole reference path;
activation is refused while one is there; a stop set on the stop topic by one node is not
released by another node's ``false`` (only by ``~/reset``, once no ``true`` came for the
hold time).

The setpoint guard cannot be reached from outside: the committed plan stays within the
limits by construction and activation refuses an arm outside its position range
(test_adapter_node); its trigger is tested on the session (test_session.py).

The policy is an ONNX model of the tracking law with a fault input (see
`adapter_harness.write_tracking_onnx`): feature ``fault`` = 1 gives +inf, 2 NaN, 3 one
output too many, 4 a reshape onnxruntime refuses.
"""
from __future__ import annotations

import time
from typing import Any, Callable

import numpy as np
import pytest
import rclpy
from lifecycle_msgs.msg import Transition
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Bool
from trajectory_msgs.msg import JointTrajectory

import adapter_harness as h

pytestmark = pytest.mark.ros
HOLD = 0.5 + 0.2   # watchdog.reset_hold (default 0.5 s) and a margin for the last messages


@pytest.fixture(scope="module")
def cards(tmp_path_factory):
    folder = tmp_path_factory.mktemp("triggers")
    return folder, {"fault": h.write_tracking_onnx(folder, "fault_tracker", fault_input=True),
                    "slow": h.write_tracking_onnx(folder, "slow_tracker", fault_input=True,
                                                  slow_seconds=0.1)}


@pytest.fixture(scope="module")
def cell(cards):
    rclpy.init()
    folder, c = cards
    cell = h.Cell(folder, c["fault"])
    try:
        cell.fault_card = c["fault"]
        cell.probe.feedback = {"fault": 0.0}
        cell.start_following()
        cell.start_reference()
        time.sleep(1.0)
        yield cell
    finally:
        try:
            logs = [m for name, m in cell.probe.logs if name == "adapter"]
            cell.close()
        finally:
            rclpy.shutdown()
    # every trip paused the reference server; a refused pause is logged, never an error
    assert not [m for m in logs if "reference pause failed" in m], logs


def moving(cell: h.Cell) -> None:
    """Wait until the plan follows the reference at some speed (after a failed test: clear
    every injection and reset first, so one failure does not cascade)."""
    p = cell.probe
    p.js_block = p.ref_block = p.ref_truncate = False
    p.js_offset, p.ref_offset, p.feedback, p.feedback_live = None, 0.0, {"fault": 0.0}, True
    if cell.mode() in ("stopping", "stopped"):
        if cell.get_param("policy_active") != str(cell.fault_card):
            cell.set_params(policy=str(cell.fault_card))
        cell.wait_rest()
        time.sleep(HOLD)
        cell.trigger("/adapter/reset")
        cell.wait_mode("following")
        cell.start_reference()
    cell.wait_mode("following")
    h.wait_until(lambda: np.abs(cell.probe.setpoints[-1].velocity).max() > 0.05,
                 "motion", timeout=10.0)


def trip(cell: h.Cell, kind: str, words: str, inject: Callable[[], None]) -> dict[str, str]:
    """Inject a fault while moving; check the stop from outside; return the diagnostics."""
    moving(cell)
    t0 = cell.now()
    inject()
    vals = cell.wait_diag(lambda v: v.get("trip") == kind, f"trip '{kind}' on /diagnostics")[3]
    assert words in vals["trip_message"], vals["trip_message"]
    cell.wait_rest(hold=0.2)
    stop = cell.samples_since(t0 - 0.5)
    check = h.check_stream(stop)
    assert check.ok, check.describe()
    assert h.at_rest(stop[-5:])
    ref = cell.wait_diag(lambda v: v.get("state") in ("pausing", "paused"),
                         "reference server paused", name="reference_server")
    assert ref[3]["state"] in ("pausing", "paused")
    return vals


def recover(cell: h.Cell) -> None:
    """Reset (must be accepted), re-approach, resume the reference."""
    res = cell.trigger("/adapter/reset")
    assert res.success, res.message
    cell.wait_mode("following")
    cell.start_reference()
    cell.wait_diag(lambda v: v.get("trip") == "none", "trip cleared on /diagnostics")


def refused(cell: h.Cell, words: str) -> None:
    """~/reset must be refused, naming the persisting cause."""
    res = cell.trigger("/adapter/reset")
    assert not res.success and "refused" in res.message and words in res.message, res.message


def test_deviation(cell):
    def inject() -> None:
        cell.probe.ref_offset = 0.1   # the reference jumps 0.1 rad on every joint
    trip(cell, "deviation", "deviation", inject)
    cell.probe.ref_offset = 0.0
    time.sleep(HOLD)   # until the windows on the path reached the adapter
    recover(cell)   # one-shot cause: accepted once at rest


def test_following_error(cell):
    offset = np.zeros(h.N)
    offset[2] = 0.1

    def inject() -> None:
        cell.probe.js_offset = offset  # the measured j3 is 0.1 rad off the command
    trip(cell, "following_error", "'j3'", inject)
    refused(cell, "following error")
    cell.probe.js_offset = None
    time.sleep(0.1)
    recover(cell)


def test_joint_states_stale(cell):
    def inject() -> None:
        cell.probe.js_block = True
    trip(cell, "joint_states_stale", "joint_states", inject)
    refused(cell, "joint_states")
    cell.probe.js_block = False
    time.sleep(HOLD)
    recover(cell)


def test_feedback_stale(cell):
    def inject() -> None:
        cell.probe.feedback = None
    trip(cell, "feedback_stale", "feedback", inject)
    refused(cell, "feedback")
    cell.probe.feedback = {"fault": 0.0}
    time.sleep(HOLD)
    recover(cell)


def test_reference_stale(cell):
    def inject() -> None:
        cell.probe.ref_block = True
    trip(cell, "reference_stale", "reference/window", inject)
    refused(cell, "reference/window")
    cell.probe.ref_block = False
    time.sleep(HOLD)
    recover(cell)


def test_window_off_the_path(cell):
    """Windows 0.02 rad off on every joint (0.049 rad from the path, under both deviation
    thresholds: the tracker follows them) disagree with the whole reference/path."""
    def inject() -> None:
        cell.probe.ref_offset = 0.02
    vals = trip(cell, "input_source", "from the reference path", inject)
    assert "over path_tolerance 0.01 rad" in vals["trip_message"], vals["trip_message"]
    refused(cell, "from the reference path")
    cell.probe.ref_offset = 0.0
    time.sleep(HOLD)
    recover(cell)


def test_reference_ended(cell):
    def inject() -> None:
        cell.probe.ref_truncate = True  # windows end at their first point
    trip(cell, "reference_stale", "before the decision horizon", inject)
    refused(cell, "before the decision horizon")
    cell.probe.ref_truncate = False
    time.sleep(0.2)
    recover(cell)


@pytest.mark.parametrize("value, words", [(1.0, "NaN or infinite"), (2.0, "NaN or infinite"),
                                          (3.0, "shape"), (4.0, "raised")])
def test_policy_fault(cell, value, words):
    # 1: +inf, 2: NaN, 3: one output too many (onnxruntime refuses it for the bound output
    # buffer, so this is raised too, naming the shapes), 4: an exception inside the model
    def inject() -> None:
        cell.probe.feedback = {"fault": value}
    vals = trip(cell, "policy_fault", words, inject)
    assert vals["trip"] == "policy_fault"
    refused(cell, "the policy still")
    cell.probe.feedback = {"fault": 0.0}
    time.sleep(0.1)
    recover(cell)


def test_overruns_with_a_slow_policy(cell, cards):
    _, c = cards
    before = int(cell.wait_diag(lambda v: "late_decisions" in v, "diagnostics")[3]
                 ["late_decisions"])

    def inject() -> None:  # ~0.1 s per decision at a 0.05 s period
        swapped = cell.set_params(policy=str(c["slow"]))[0]   # loads fast, runs fast ...
        assert swapped.successful, swapped.reason
        cell.probe.feedback = {"fault": h.SLOW_FAULT}           # ... until the feedback says

    vals = trip(cell, "overruns", "late decisions", inject)
    late = int(vals["late_decisions"]) - before
    assert late >= 3, vals   # watchdog.max_overruns (default 3)
    # the stream went on through the late decisions (braking committed in their place):
    # no gap in the stamps longer than a few ticks while the slow policy ran
    slow = cell.samples_since(cell.now() - 3.0)
    assert h.check_stream(slow).ok
    cell.probe.feedback = {"fault": 0.0}
    assert cell.set_params(policy=str(c["fault"]))[0].successful
    h.wait_until(lambda: cell.get_param("policy_active") == str(c["fault"]), "fast policy back")
    recover(cell)


def test_external_stop_service(cell):
    def inject() -> None:
        res = cell.trigger("/adapter/stop")
        assert res.success, res.message
    trip(cell, "external_stop", "~/stop", inject)
    recover(cell)   # a service stop is a one-shot request


def test_stop_topic_is_released_by_reset_only(cell):
    """The probe sets the stop; another node's ``false`` leaves it latched; while the
    probe repeats ``true`` the reset is refused; once it stopped for the hold time, the
    operator's ``~/reset`` releases it."""
    other = Node("other_operator")
    release = other.create_publisher(Bool, "stop", h.reliable_qos(1))
    try:
        def inject() -> None:
            cell.probe.stop_pub.publish(Bool(data=True))
        vals = trip(cell, "external_stop", "stop topic", inject)
        assert "'/adapter_probe'" in vals["trip_message"], vals["trip_message"]
        h.wait_until(lambda: release.get_subscription_count() > 0, "other_operator matched")
        for _ in range(5):
            release.publish(Bool(data=False))
            time.sleep(0.05)
        held = cell.wait_diag(lambda v: "stop_request" in v, "adapter status")[3]
        assert held["stop_request"] == "stop topic is true", held
        assert held["trip"] == "external_stop", held
        cell.probe.stop_pub.publish(Bool(data=True))   # the owner still holds it
        refused(cell, "a stop is still requested")
        time.sleep(HOLD)
        recover(cell)
        assert cell.wait_diag(lambda v: "stop_request" in v, "adapter status")[3][
            "stop_request"] == "none"
    finally:
        other.destroy_node()


class Rogue:
    """A second publisher of one of the adapter's inputs: a node of its own in the probe's
    executor that republishes the input's latest message at 20 Hz (an echo)."""

    def __init__(self, cell: h.Cell, topic: str, msg_type: Any, qos: Any) -> None:
        self.cell, self.topic = cell, topic
        self.name = "rogue_" + topic.replace("/", "_")
        self.node = Node(self.name)
        self.latest: Any = None
        self.pub = self.node.create_publisher(msg_type, topic, qos)
        self.node.create_subscription(msg_type, topic, self._keep, qos)
        self.node.create_timer(0.05, self._echo)
        cell.cell_ex.add_node(self.node)

    def _keep(self, msg: Any) -> None:
        self.latest = msg

    def _echo(self) -> None:
        if self.latest is not None:
            self.pub.publish(self.latest)

    def close(self) -> None:
        """Remove the rogue and wait until the graph has one publisher of its topic."""
        self.cell.cell_ex.remove_node(self.node)
        self.node.destroy_node()
        h.wait_until(lambda: self.cell.probe.count_publishers(self.topic) == 1,
                     f"the rogue's publisher of {self.topic} gone")


ROGUES = {"joint_states": (JointState, 10), "reference/window": (JointTrajectory, None),
          "feedback": (JointState, 10)}


@pytest.mark.parametrize("topic", list(ROGUES))
def test_rogue_publisher_is_an_input_source_stop(cell, topic):
    msg_type, depth = ROGUES[topic]
    rogue: list[Rogue] = []

    def inject() -> None:
        rogue.append(Rogue(cell, topic, msg_type, depth or h.reliable_qos(5)))
    try:
        vals = trip(cell, "input_source", f"'/{rogue_name(topic)}'", inject)
        assert f"of '{topic}'" in vals["trip_message"], vals["trip_message"]
        refused(cell, f"unexpected publisher of '{topic}'")
    finally:
        for r in rogue:
            r.close()
    time.sleep(HOLD)
    recover(cell)


def rogue_name(topic: str) -> str:
    return "rogue_" + topic.replace("/", "_")


def test_activation_refused_with_an_extra_publisher(cell):
    moving(cell)
    assert cell.transition(Transition.TRANSITION_DEACTIVATE)
    rogue = Rogue(cell, "joint_states", JointState, 10)
    try:
        since = len(cell.probe.logs)
        assert not cell.transition(Transition.TRANSITION_ACTIVATE)
        h.wait_until(lambda: [m for n, m in cell.probe.logs[since:]
                              if n == "adapter" and "activate refused" in m], "the refusal log")
        why = [m for n, m in cell.probe.logs[since:] if n == "adapter" and "refused" in m][0]
        assert "'joint_states' has 2 publishers" in why and "'/rogue_joint_states'" in why, why
        assert "'/cell_relay'" in why and "sources.joint_states" in why, why
    finally:
        rogue.close()
    cell.start_following()
    cell.start_reference()
    moving(cell)


def test_reset_needs_changing_feedback_for_the_hold_time(cell):
    """Feedback that arrives fresh but frozen (the same values each time) blocks the reset;
    once it changes again for the hold time the reset is accepted."""
    def inject() -> None:
        cell.probe.feedback_live = False   # the same values from here on
        res = cell.trigger("/adapter/stop")
        assert res.success, res.message
    trip(cell, "external_stop", "~/stop", inject)
    time.sleep(HOLD)
    refused(cell, "the feedback values have not changed")
    cell.probe.feedback_live = True
    time.sleep(HOLD)
    recover(cell)


