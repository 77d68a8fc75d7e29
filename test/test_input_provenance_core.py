# SPDX-License-Identifier: Apache-2.0
"""Input provenance and the reset hold, ROS-free: the expected publishers of an input and the
verdict on the ones seen (`core.provenance`), the inputs' freshness and changing feedback
over a hold time (`core.input_hold`), the stop topic's latch (`core.watchdog`), and windows
against the whole reference path (`core.path_agreement`).

Expected values are worked by hand beside each check (times in seconds).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from adaptive_streamer.core.input_hold import InputHold
from adaptive_streamer.core.path_agreement import PathError, ReferencePath
from adaptive_streamer.core.provenance import (UNIDENTIFIED, InputTopic, expected_sources,
                                               source_fault)
from adaptive_streamer.core.watchdog import KINDS, PERSISTENT, Watchdog, WatchdogConfig, \
    WatchdogError

JS, REF, FB = InputTopic.JOINT_STATES, InputTopic.REFERENCE, InputTopic.FEEDBACK


def test_parameters_of_the_inputs():
    assert [t.parameter for t in InputTopic] == ["sources.joint_states", "sources.reference",
                                                "sources.feedback"]
    assert "input_source" in KINDS and "input_source" in PERSISTENT


def test_default_pins_the_one_publisher_at_activation():
    e = expected_sources(JS, [], ["/driver"])
    assert e.refusal is None and e.nodes == ("/driver",)
    assert expected_sources(JS, [""], []).nodes == ()   # none yet: staleness says so
    e = expected_sources(REF, [], ["/reference_server", "/rogue"])
    assert e.refusal is not None and "'/reference_server', '/rogue'" in e.refusal
    assert "sources.reference" in e.refusal and "2 publishers" in e.refusal


def test_allow_list_at_activation():
    allowed = ["/cell/arm", "/cell/wrist"]
    assert expected_sources(JS, allowed, ["/cell/wrist", "/cell/arm"]).nodes == tuple(allowed)
    assert expected_sources(JS, allowed, ["/cell/arm"]).refusal is None   # fewer: fine
    e = expected_sources(JS, allowed, ["/cell/arm", "/cell/arm"])   # one node name twice
    assert e.refusal is not None and "'/cell/arm'" in e.refusal
    e = expected_sources(JS, allowed, ["/cell/arm", "/other"])
    assert e.refusal is not None and "'/other'" in e.refusal


def test_source_fault_names_extra_and_changed_publishers():
    assert source_fault(FB, ["/bridge"], ["/bridge"]) is None
    assert source_fault(FB, ["/bridge"], []) is None          # gone: a staleness matter
    extra = source_fault(FB, ["/bridge"], ["/bridge", "/rogue"])
    assert extra.startswith("unexpected publisher of 'feedback': '/rogue'"), extra
    changed = source_fault(FB, ["/bridge"], ["/other"])
    assert "'/other'" in changed and "expected: '/bridge'" in changed
    twin = source_fault(FB, ["/bridge"], ["/bridge", "/bridge"])   # same name, two nodes
    assert "'/bridge'" in twin and "publishers now: '/bridge', '/bridge'" in twin
    none = source_fault(FB, [], ["/late"])
    assert "expected: none" in none


def hold_after(messages: list[tuple[float, tuple[float, ...] | None]],
               topic: InputTopic = FB, timeout: float = 0.25) -> InputHold:
    h = InputHold()
    for t, values in messages:
        h.note(topic, t, timeout, values)
    return h


TIMEOUTS = {JS: 0.1, REF: 0.25, FB: 0.25}


def test_a_publisher_not_yet_named_by_the_graph_is_not_judged_until_it_is():
    # the graph can report a publisher before its node's name: rclpy then gives the
    # placeholder '_NODE_NAME_UNKNOWN_' (seen on a loaded machine), which the adapter maps
    # to UNIDENTIFIED
    at_start = expected_sources(InputTopic.JOINT_STATES, [], [UNIDENTIFIED])
    assert at_start.refusal is not None and "not identified yet" in at_start.refusal
    assert source_fault(InputTopic.JOINT_STATES, ("/driver",), ["/driver", UNIDENTIFIED]) is None
    assert "'/rogue'" in source_fault(InputTopic.JOINT_STATES, ("/driver",), ["/driver", "/rogue"])


def test_hold_needs_fresh_inputs_for_the_hold_time():
    h = InputHold()
    for i in range(100):       # 0.00 .. 0.99 s at 100 Hz
        h.note(JS, i * 0.01, 0.1)
    assert h.problems(1.0, 0.5, TIMEOUTS, [JS]) == []
    assert h.problems(1.0, 0.0, TIMEOUTS, [JS, REF, FB]) == []       # 0: off
    assert "'reference/window' is not fresh" in h.problems(1.0, 0.5, TIMEOUTS, [REF])[0]
    for i in range(7):          # a 0.21 s gap (over 0.1): fresh again only from 1.2 s
        h.note(JS, 1.2 + i * 0.05, 0.1)
    p = h.problems(1.5, 0.5, TIMEOUTS, [JS])
    assert p and "fresh for only 0.300 s" in p[0], p
    assert "is not fresh" in h.problems(1.65, 0.1, TIMEOUTS, [JS])[0]   # 0.15 s old


def test_hold_needs_changing_feedback():
    live = [(i * 0.02, (0.0, float(i))) for i in range(50)]           # 0 .. 0.98 s, changing
    assert hold_after(live).problems(1.0, 0.5, TIMEOUTS, [FB]) == []
    frozen = [(i * 0.02, (0.1, 7.0)) for i in range(50)]               # fresh, identical
    p = hold_after(frozen).problems(1.0, 0.5, TIMEOUTS, [FB])
    assert p and "have not changed for 1.000 s" in p[0], p
    # frozen until 0.5 s, then changing: changing for 0.48 s at 1.0 s, 0.5 s only at 1.02 s
    thawed = frozen[:26] + [(i * 0.02, (0.1, float(i))) for i in range(26, 52)]
    h = hold_after(thawed)
    p = h.problems(1.0, 0.5, TIMEOUTS, [FB])
    assert p and "changing for only 0.480 s" in p[0], p
    assert h.problems(1.02, 0.5, TIMEOUTS, [FB]) == []


def test_hold_counts_a_non_finite_value_as_a_gap():
    msgs = [(i * 0.02, (0.0, float(i))) for i in range(50)]
    msgs[40] = (0.8, (math.nan, 40.0))
    p = hold_after(msgs).problems(1.0, 0.5, TIMEOUTS, [FB])
    assert p and "fresh for only 0.180 s" in p[0], p   # fresh again from 0.82 s


def test_stop_topic_latch_is_released_by_the_reset_only():
    w = Watchdog(WatchdogConfig(reset_hold=0.5), ("j1",))
    assert w.request_stop_topic(1.0) and not w.request_stop_topic(1.1)   # latched once
    w.fire("external_stop", 1.0, "stop requested on the stop topic")
    ok, msg = w.reset([], 1.3)          # the latest true 0.2 s ago: still held
    assert not ok and "the stop topic said true 200 ms ago" in msg, msg
    ok, msg = w.reset([])               # a recorded reset: the request is still there
    assert not ok and "a stop is still requested" in msg
    ok, msg = w.reset([], 1.7)          # 0.6 s after the latest true: released
    assert ok and w.stop_requested is None and not w.tripped, msg
    with pytest.raises(WatchdogError, match="reset_hold"):
        WatchdogConfig(reset_hold=-1.0)


def lap(n_samples: int = 61) -> np.ndarray:
    """A closed lap p0 + amplitude (1 - cos(2 pi s)) / 2 of two joints, sampled evenly."""
    s = np.linspace(0.0, 1.0, n_samples)[:, None]
    return np.array([0.1, -0.2]) + 0.5 * (1.0 - np.cos(2.0 * np.pi * s)) * np.array([0.3, 0.5])


def test_window_on_the_path_at_any_speed_and_off_it():
    path = ReferencePath(lap(), ("j1", "j2"))
    fine = lap(601)      # the same curve, ten times finer: between the path's samples
    for start, stride in [(0, 10), (3, 7), (250, 1), (595, 1)]:   # speeds, pause, the end
        window = fine[start:start + 10 * stride:stride]
        check = path.check(window, 1e-3)
        # chord error of the polyline: at most curvature * h^2 / 8 ~ 0.5 * (2 pi)^2 * (1/60)^2
        # / 8 ~ 7e-4 rad (from memory: chord-to-arc deviation of a sampled curve)
        assert check.reason is None and check.distance < 7e-4, (start, stride, check)
    off = fine[100:110] + np.array([0.0, 0.004])   # 4 mm-rad off on j2
    check = path.check(off, 1e-3)
    assert check.reason is not None and "over path_tolerance 0.001 rad" in check.reason
    assert 0.002 < check.distance <= 0.004 + 1e-9, check
    seam = np.vstack([fine[595:601], fine[1:5]])   # a loop goes on from the start
    assert path.check(seam, 1e-3).reason is None
    nan = fine[10:20].copy()
    nan[4, 1] = math.nan
    bad = path.check(nan, 1e-3)
    assert bad.reason is not None and bad.point == 4, bad
    with pytest.raises(PathError):
        ReferencePath(np.zeros((0, 2)), ("j1", "j2"))
    assert ReferencePath(np.ones((1, 2)), ("j1", "j2")).check(np.ones((3, 2)), 1e-9).reason is None
