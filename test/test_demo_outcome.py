# SPDX-License-Identifier: Apache-2.0
"""The demo's verdict on a run, without DDS: every watchdog event of the summary has a reason
that says what exceeded what (the decision records carry no text: the reason comes from the
adapter's latched trip, or from the record's own figures), and the exit code follows from
the events and the injected faults (`adaptive_streamer.demo.outcome`): 0 only when every
injected fault led to its expected stop and no stop happened that was not injected.

The events are those of real runs of the offline closed loop (the same session code as the
live adapter), sent through the decision record encoding as the adapter publishes them."""
from __future__ import annotations

import math
import re

import numpy as np
import pytest

from adaptive_streamer.core import decision_record
from adaptive_streamer.demo.faults import InjectionRecord, PlannedFault, outcomes
from adaptive_streamer.demo.followed import followed_motion
from adaptive_streamer.demo.outcome import RunVerdict, judge, watchdog_events
from adaptive_streamer.sim.closed_loop import run_closed_loop

DEVIATION = (0.07, 0.08)   # deviation_joint, deviation_norm [rad] of config/demo/params.yaml


@pytest.fixture(scope="module")
def hold_run():
    """The hold policy over the demo pass: it stays put while the reference moves away, so
    the planned deviation stops it (the demo's watchdog thresholds)."""
    from adaptive_streamer.sim.closed_loop import CellSettings
    from adaptive_streamer.core.watchdog import WatchdogConfig
    settings = CellSettings(watchdog=WatchdogConfig(deviation_joint=DEVIATION[0],
                                                    deviation_norm=DEVIATION[1]))
    return run_closed_loop("hold", seed=7, duration=5.0, settings=settings)


def as_published(decisions):
    """The records as the monitor receives them: encoded and decoded (no message text)."""
    return [decision_record.decode(decision_record.encode(d)) for d in decisions]


def diag_of(trip) -> dict[str, str]:
    """The adapter's diagnostics values of a latched trip (strings, as on /diagnostics)."""
    if trip is None:
        return {"trip": "none", "trip_message": "", "trip_time": "nan"}
    return {"trip": trip.kind, "trip_message": trip.message, "trip_time": repr(trip.time)}


NUMBER = r"\d+(\.\d+)?(e-?\d+)?"


def says_what_exceeded_what(reason: str) -> bool:
    """A value, the word 'exceeds' or a threshold in brackets, and a threshold with its
    parameter name (deviation_joint / deviation_norm) and unit."""
    return bool(re.search(rf"{NUMBER} rad", reason)
                and re.search(rf"deviation_(joint|norm) {NUMBER} rad", reason))


def test_the_hold_policys_deviation_stop_has_its_reason(hold_run):
    trips = hold_run.trips
    assert trips and trips[0].kind == "deviation", trips
    records = as_published(hold_run.decisions)
    assert all(d.message == "" for d in records)           # the record carries no text
    events = watchdog_events(records, diag_of(trips[0]), DEVIATION)
    assert [e.kind for e in events] == ["deviation"], events
    assert events[0].reason == trips[0].message and says_what_exceeded_what(events[0].reason)


def test_a_record_without_its_trip_gets_a_reason_from_its_figures(hold_run):
    # as if the diagnostics had been missed: the record's own deviation figures and the
    # thresholds make the reason
    events = watchdog_events(as_published(hold_run.decisions), diag_of(None), DEVIATION)
    (event,) = events
    record = next(d for d in hold_run.decisions if d.verdict == "deviation")
    assert f"{record.deviation_norm:.4g} rad" in event.reason, event
    assert says_what_exceeded_what(event.reason), event


def test_a_stop_outside_a_decision_is_an_event_with_its_reason():
    # joint_states stop arriving: the session's staleness check latches, no record says so
    from adaptive_streamer.core.watchdog import InputAges, Watchdog, WatchdogConfig
    dog = Watchdog(WatchdogConfig(), ("j1", "j2"))
    ((kind, reason),) = dog.stale_inputs(InputAges(joint_states=0.3, reference=0.0))
    trip = dog.fire(kind, 12.5, reason)
    (event,) = watchdog_events([], diag_of(trip), DEVIATION)
    assert (event.kind, event.time) == ("joint_states_stale", 12.5)
    assert "300 ms old" in event.reason and "joint_states_timeout 100 ms" in event.reason


NO_MOTION = followed_motion(np.zeros(0, np.int64), np.zeros((0, 6)), None, None)
PASS_START = 100.0


def judged(trip, planned: list[PlannedFault], injected_at: list[float]):
    """The verdict of a run with the latched ``trip`` and the ``planned`` faults injected at
    the ROS times ``injected_at`` (NaN: not injected, with the demo's note)."""
    records = [InjectionRecord(p, t, "" if math.isfinite(t) else "the adapter was already "
                               "stopped (see the watchdog events)")
               for p, t in zip(planned, injected_at)]
    status = diag_of(trip)
    faults = outcomes(records, status, np.zeros(0), np.zeros((0, 6)), NO_MOTION, None)
    events = watchdog_events([], status, DEVIATION)
    return judge(0, events, status["trip"], float(status["trip_time"]), faults, PASS_START)


def trip_of(kind: str, at: float):
    from adaptive_streamer.core.watchdog import Trip
    return Trip(kind, PASS_START + at, f"{kind} reason: 0.3 over 0.1")


def test_an_injected_fault_with_its_expected_stop_passes():
    fault = PlannedFault("feedback_dropout", 1.0, "feedback_stale")
    out = judged(trip_of("feedback_stale", 1.3), [fault], [PASS_START + 1.0])
    assert out.verdict is RunVerdict.PASSED and out.exit_code == 0, out
    assert out.line.startswith("outcome: passed"), out


def test_a_stop_nobody_injected_fails_and_says_so():
    out = judged(trip_of("joint_states_stale", 2.4), [], [])
    assert out.verdict is RunVerdict.UNEXPECTED_STOP and out.exit_code == 1, out
    assert out.line == ("outcome: FAILED: a joint_states_stale stop at +2.40 s from the pass "
                        "start that was not injected (no fault was injected): "
                        "joint_states_stale reason: 0.3 over 0.1"), out


def test_an_injection_the_run_never_made_fails():
    # the run stopped (un-injected) before the fault was due: both are wrong, the fault
    # is named first
    fault = PlannedFault("nan_policy", 3.0, "policy_fault")
    out = judged(trip_of("joint_states_stale", 2.0), [fault], [math.nan])
    assert out.verdict is RunVerdict.FAULT_NOT_AS_EXPECTED and out.exit_code == 1, out
    assert "--inject nan_policy@3 was not injected (the adapter was already stopped" in out.line


def test_a_fault_followed_by_another_stop_fails():
    fault = PlannedFault("reference_jump", 1.0, "deviation")
    out = judged(trip_of("following_error", 1.2), [fault], [PASS_START + 1.0])
    assert out.verdict is RunVerdict.FAULT_NOT_AS_EXPECTED, out
    assert "--inject reference_jump@1 expected stop deviation, got following_error" in out.line


def test_an_injected_fault_without_any_stop_fails():
    fault = PlannedFault("joint_state_stall", 1.0, "joint_states_stale")
    out = judged(None, [fault], [PASS_START + 1.0])
    assert out.verdict is RunVerdict.FAULT_NOT_AS_EXPECTED, out
    assert "expected stop joint_states_stale, got no stop" in out.line, out


def test_limit_violations_fail_first():
    out = judge(3, [], "none", math.nan, [], PASS_START)
    assert out.verdict is RunVerdict.LIMIT_VIOLATIONS and "3 limit" in out.line, out


def test_a_clean_run_passes():
    out = judge(0, [], "none", math.nan, [], PASS_START)
    assert out.verdict is RunVerdict.PASSED and out.exit_code == 0, out
