# SPDX-License-Identifier: Apache-2.0
"""Watchdog core: parameter checks, each trigger's condition and reason, latching and the
reset rules (ROS-free).

Expected values are worked by hand beside each check (thresholds, ages, wrap-around of a
continuous joint: angles differ modulo 2 pi, common practice).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from adaptive_streamer.core.watchdog import (EVENTS_KEPT, KINDS, PERSISTENT, InputAges, Watchdog,
                                             WatchdogConfig, WatchdogError)

JOINTS = ("j1", "j2", "j3")


def dog(**cfg) -> Watchdog:
    return Watchdog(WatchdogConfig(**cfg), JOINTS)


@pytest.mark.parametrize("field, value", [
    ("deviation_joint", 0.0), ("deviation_norm", -1.0), ("following_error", math.nan),
    ("joint_states_timeout", 0.0), ("feedback_timeout", math.inf), ("reference_timeout", -0.1),
    ("command_latency", -0.001),
])
def test_config_errors_name_the_parameter(field, value):
    with pytest.raises(WatchdogError, match=field):
        WatchdogConfig(**{field: value})


def test_config_overrun_counts():
    with pytest.raises(WatchdogError, match="max_overruns"):
        WatchdogConfig(max_overruns=0)
    with pytest.raises(WatchdogError, match="overrun_window"):
        WatchdogConfig(max_overruns=5, overrun_window=4)


def test_first_trip_latches_later_ones_are_counted():
    w = dog()
    assert not w.tripped
    first = w.fire("deviation", 1.0, "first", deviation_max=0.1)
    w.fire("overruns", 2.0, "second")
    assert w.tripped and w.trip is first and first.values == {"deviation_max": 0.1}
    assert w.counts["deviation"] == 1 and w.counts["overruns"] == 1
    assert [e.kind for e in w.events] == ["deviation", "overruns"]
    with pytest.raises(WatchdogError, match="unknown trigger 'bogus'"):
        w.fire("bogus", 3.0, "")
    assert set(PERSISTENT) <= set(KINDS)


def test_events_keep_the_latest_and_count_them_all():
    w = dog()
    for i in range(EVENTS_KEPT + 5):
        w.fire("external_stop", float(i), f"stop {i}")
    assert len(w.events) == EVENTS_KEPT and w.total_events == EVENTS_KEPT + 5
    assert w.events[0].message == "stop 5" and w.events[-1].message == f"stop {EVENTS_KEPT + 4}"
    assert w.trip.message == "stop 0" and w.counts["external_stop"] == EVENTS_KEPT + 5


def test_deviation_per_joint_norm_and_continuous_wrap():
    w = dog(deviation_joint=0.05, deviation_norm=0.08)
    none = np.zeros(3, bool)
    worst, norm, reason = w.deviation(np.array([0.04, 0.0, 0.0]), np.zeros(3), none)
    assert reason is None and worst == pytest.approx(0.04) and norm == pytest.approx(0.04)
    _, _, reason = w.deviation(np.array([0.0, -0.06, 0.0]), np.zeros(3), none)
    assert "'j2'" in reason and "deviation_joint" in reason
    # 0.049 on each joint: within the per-joint bound, norm sqrt(3) 0.049 = 0.0849 > 0.08
    _, norm, reason = w.deviation(np.full(3, 0.049), np.zeros(3), none)
    assert norm == pytest.approx(math.sqrt(3) * 0.049) and "deviation_norm" in reason
    # a continuous joint at +pi - 0.01 vs -pi + 0.01 is 0.02 rad away, not 2 pi - 0.02
    cont = np.array([False, False, True])
    worst, _, reason = w.deviation(np.array([0, 0, math.pi - 0.01]),
                                   np.array([0, 0, -math.pi + 0.01]), cont)
    assert reason is None and worst == pytest.approx(0.02)


def test_following_error():
    w = dog(following_error=0.05, command_latency=0.012)
    err, reason = w.following(np.array([0.0, 0.03, 0.0]), np.zeros(3))
    assert reason is None and err == pytest.approx(0.03)
    err, reason = w.following(np.array([0.0, 0.0, -0.07]), np.zeros(3))
    assert err == pytest.approx(0.07)
    assert "'j3'" in reason and "following_error" in reason and "12.0 ms" in reason
    err, reason = w.following(np.array([np.nan, 0.0, 0.0]), np.zeros(3))
    assert math.isinf(err) and "not finite" in reason and "'j1'" in reason


def test_stale_inputs_name_input_and_parameter():
    w = dog(joint_states_timeout=0.1, feedback_timeout=0.25, reference_timeout=0.25)
    assert w.stale_inputs(InputAges(0.05, 0.1, 0.1, 0.0, True)) == []
    kinds = dict(w.stale_inputs(InputAges(0.15, 0.3, 0.3, 1.0, True)))
    assert set(kinds) == {"joint_states_stale", "feedback_stale", "reference_stale"}
    assert "150 ms old" in kinds["joint_states_stale"] and "joint_states_timeout" in kinds[
        "joint_states_stale"]
    assert "feedback_timeout" in kinds["feedback_stale"]
    assert "reference_timeout" in kinds["reference_stale"]
    # feedback the policy does not need is not checked
    assert w.stale_inputs(InputAges(0.0, math.inf, 0.0, 1.0, False)) == []
    never = dict(w.stale_inputs(InputAges()))
    assert "no joint_states received" in never["joint_states_stale"]
    # a fresh window that ends 20 ms before the horizon the decision needs
    ended = dict(w.stale_inputs(InputAges(0.0, 0.0, 0.01, -0.02)))
    assert "20.0 ms before the decision horizon" in ended["reference_stale"]


def test_overruns_counted_in_a_sliding_window():
    w = dog(max_overruns=3, overrun_window=5)
    seq = [True, False, True, False, False, False, True, True]
    reasons = [w.overrun(x) for x in seq]
    # the 3rd late one comes when the window (last 5) holds only 2 late: no reason yet
    assert all(r is None for r in reasons[:7])
    w2 = dog(max_overruns=3, overrun_window=5)
    out = [w2.overrun(x) for x in (True, False, True, True)]
    assert out[:3] == [None, None, None] and "3 late decisions in the last 4" in out[3]
    assert w2.overrun(False) is None   # an on-time decision never reports


def test_reset_rules():
    w = dog()
    assert w.reset([]) == (True, "nothing to reset")
    w.fire("joint_states_stale", 1.0, "no joint_states")
    ok, msg = w.reset([("joint_states_stale", "joint_states is 300 ms old"),
                       ("feedback_stale", "feedback is 400 ms old")])
    assert not ok and msg.startswith("reset refused") and "300 ms" in msg and "400 ms" in msg
    assert w.tripped
    w.stop_requested = "stop topic is true"
    ok, msg = w.reset([])
    assert not ok and "a stop is still requested: stop topic is true" in msg
    w.stop_requested = None
    w.overrun(True)
    ok, msg = w.reset([])
    assert ok and "reset after joint_states_stale" in msg and not w.tripped
    # the overrun window starts empty after a reset
    w3 = dog(max_overruns=2, overrun_window=5)
    w3.overrun(True)
    w3.fire("overruns", 0.0, "x")
    w3.reset([])
    assert w3.overrun(True) is None


def test_thresholds_only_tighten_while_running():
    wd = Watchdog(WatchdogConfig(deviation_joint=0.05), ("a", "b"))
    planned, ref = np.array([0.03, 0.0]), np.zeros(2)
    assert wd.deviation(planned, ref, np.zeros(2, bool))[2] is None
    wd.tighten("deviation_joint", 0.02)
    assert "exceeds deviation_joint 0.02 rad" in wd.deviation(planned, ref, np.zeros(2, bool))[2]
    with pytest.raises(WatchdogError, match="can only be lowered"):
        wd.tighten("deviation_joint", 0.03)
    with pytest.raises(WatchdogError, match="cannot change while running"):
        wd.tighten("command_latency", 0.0)
    with pytest.raises(WatchdogError, match="max_overruns"):
        wd.tighten("max_overruns", 0)
    wd.tighten("max_overruns", 1)
    assert wd.overrun(True) is not None   # one late decision is now too many
