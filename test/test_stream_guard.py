# SPDX-License-Identifier: Apache-2.0
"""The committed plan, the stream clock and the setpoint guard (ROS-free).

* `CommandPlan.sample` against the constant-jerk closed forms written out here
  (Biagiotti & Melchiorri, Trajectory Planning for Automatic Machines and Robots, Springer
  2008, ch. 3; from memory), including at epoch-sized ROS times where segment starts are
  sums of float64 periods;
* `StreamClock`: worked examples of due ticks and skipped-tick counting;
* `SetpointGuard`: every reason, a plan at its jerk limit passes, and a step judged over the
  real time since the previous setpoint left (send time) when that is shorter;
* `StreamTimeline`: ROS time carried on the monotonic clock, to the nanosecond.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from adaptive_streamer.core.guard import SetpointGuard
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.core.stream import (CommandPlan, Segment, StreamClock, StreamError,
                                          StreamTimeline)

T = 0.05
EPOCH = 1_796_000_000.0  # ROS time of today's order: float64 resolves 2.4e-7 s there
LIMITS = JointLimits(["a", "b"], [-2.0, -1.0], [2.0, 1.0], [2.0, 1.5], [8.0, 6.0],
                     [80.0, 60.0])


def closed_form(p, v, a, j, tau):
    """Constant-jerk motion after ``tau`` (from memory, see the module docstring)."""
    return (p + v * tau + a * tau ** 2 / 2 + j * tau ** 3 / 6, v + a * tau + j * tau ** 2 / 2,
            a + j * tau)


def plan_from(t0: float, decisions: np.ndarray, state: MotionState) -> CommandPlan:
    """Segments with starts accumulated as the decision cycle does (start + T)."""
    plan = CommandPlan(T, keep=len(decisions))
    t, (p, v, a) = t0, state
    for u in decisions:
        plan.commit(Segment(t, MotionState(p, v, a), u))
        p, v, a = closed_form(p, v, a, (u - a) / T, T)
        p, v, a = np.asarray(p), np.asarray(v), u.copy()
        t = t + T
    return plan


def test_sample_matches_the_constant_jerk_closed_form():
    rng = np.random.default_rng(1)
    s0 = MotionState(np.array([0.1, -0.2]), np.array([0.5, -0.3]), np.array([1.0, 2.0]))
    us = rng.uniform(-3, 3, (6, 2))
    plan = plan_from(10.0, us, s0)
    seg = plan.segment_at(10.0 + 2 * T + 0.01)
    assert seg.start == pytest.approx(10.0 + 2 * T)
    for t in 10.0 + np.linspace(0.0, 6 * T, 97):
        seg = plan.segment_at(t)
        got = plan.sample(t)
        want = closed_form(*seg.state, (seg.u - seg.state.acceleration) / T, t - seg.start)
        for g, w in zip(got, want):
            np.testing.assert_allclose(g, w, atol=1e-12)
        np.testing.assert_allclose(plan.jerk_at(t), (seg.u - seg.state.acceleration) / T)
    assert plan.end == pytest.approx(10.0 + 6 * T)
    assert plan.start == 10.0


def test_segment_boundaries_at_epoch_times_pick_the_covering_segment():
    # starts accumulated in float64 at epoch times drift from t0 + k T by about 5e-8 s per
    # period; ticks on the grid t0 + i / rate must still land in the segment whose
    # [start, next start) holds them, so the sampled plan stays continuous
    rate = 250.0
    t0 = math.ceil(EPOCH * rate) / rate
    n = 60
    us = np.zeros((n, 2))
    us[::2] = [2.0, -1.5]   # full-jerk reversals every period (J T = 4 and 3)
    us[1::2] = [-2.0, 1.5]
    plan = plan_from(t0, us, MotionState(np.zeros(2), np.zeros(2), np.zeros(2)))
    starts = np.array([s.start for s in plan._segments])
    assert abs(starts[-1] - (t0 + (n - 1) * T)) > 1e-6  # the drift is really there
    prev = None
    for i in range(int((n - 1) * T * rate)):
        t = t0 + i / rate
        seg = plan.segment_at(t)
        k = int(np.searchsorted(starts, t, side="right")) - 1
        assert seg.start == starts[k], (i, t - t0)
        sp = plan.sample(t)
        if prev is not None:
            dt = t - prev[0]
            # jerk bound with the float time resolution (two spacings of t)
            bound = LIMITS.jerk_max * (dt + 2 * np.spacing(t)) + 1e-9
            assert np.all(np.abs(sp.acceleration - prev[1].acceleration) <= bound), (i,)
        prev = (t, sp)


def test_plan_refuses_gaps_and_times_outside():
    plan = CommandPlan(T)
    with pytest.raises(StreamError, match="no segment"):
        plan.sample(0.0)
    s = MotionState(np.zeros(1), np.zeros(1), np.zeros(1))
    plan.commit(Segment(1.0, s, np.zeros(1)))
    with pytest.raises(StreamError, match="expected"):
        plan.commit(Segment(1.2, s, np.zeros(1)))
    with pytest.raises(StreamError, match="outside the plan"):
        plan.sample(0.9)
    with pytest.raises(StreamError, match="outside the plan"):
        plan.sample(1.0 + T + 1e-3)
    assert plan.sample(1.0 + T).position[0] == 0.0  # the end itself is covered
    plan.clear()
    assert plan.empty


def test_stream_clock_worked_example():
    c = StreamClock(100.0, 250.0)
    assert c.time_of(3) == pytest.approx(100.012)
    assert c.due(99.999) is None          # before the first tick
    assert c.due(100.0) == 0
    assert c.due(100.001) is None         # tick 0 already published
    assert c.due(100.0041) == 1
    assert c.skipped == 0
    assert c.due(100.0161) == 4           # woke 12 ms late: ticks 2 and 3 skipped
    assert c.skipped == 2
    assert c.due(100.020) == 5
    assert c.due(100.0400001) == 10       # ticks 6..9 skipped
    assert c.skipped == 6
    with pytest.raises(StreamError, match="positive"):
        StreamClock(0.0, 0.0)


def test_stream_clock_at_epoch_times():
    rate = 1000.0
    t0 = math.ceil(EPOCH * rate) / rate
    c = StreamClock(t0, rate)
    for i in range(2000):
        assert c.due(c.time_of(i)) == i   # each nominal time is due exactly at itself
    assert c.skipped == 0


def guard_with(prev: MotionState | None = None, t0: float = 1.0) -> SetpointGuard:
    g = SetpointGuard(LIMITS)
    if prev is not None:
        assert g.check(t0, prev) is None
    return g


def state(p=(0.0, 0.0), v=(0.0, 0.0), a=(0.0, 0.0)) -> MotionState:
    return MotionState(np.array(p, float), np.array(v, float), np.array(a, float))


@pytest.mark.parametrize("sp, words", [
    (state(p=(np.nan, 0.0)), "position of joint 'a' is not finite"),
    (state(v=(0.0, np.inf)), "velocity of joint 'b' is not finite"),
    (state(p=(-2.1, 0.0)), "position below its minimum on joint 'a'"),
    (state(p=(0.0, 1.01)), "position above its maximum on joint 'b'"),
    (state(v=(2.01, 0.0)), "velocity over its limit on joint 'a'"),
    (state(a=(0.0, -6.01)), "acceleration over its limit on joint 'b'"),
])
def test_guard_static_reasons(sp, words):
    g = guard_with()
    reason = g.check(1.0, sp)
    assert reason is not None and words in reason
    assert g.failures == 1


@pytest.mark.parametrize("sp, words", [
    (state(p=(0.0081, 0.0)), "position jumps"),     # V dt = 2 * 0.004 = 0.008
    (state(v=(0.0, 0.025)), "velocity jumps"),      # A dt = 6 * 0.004 = 0.024
    (state(a=(0.33, 0.0)), "acceleration jumps"),   # J dt = 80 * 0.004 = 0.32
])
def test_guard_continuity_reasons(sp, words):
    g = guard_with(state())
    reason = g.check(1.004, sp)
    assert reason is not None and words in reason and "joint" in reason
    # the failed setpoint does not become the reference for the next one
    assert g.check(1.008, state()) is None


def test_guard_time_must_advance_and_reset_forgets():
    g = guard_with(state())
    assert "does not advance" in g.check(1.0, state())
    g.reset()
    assert g.check(0.5, state(p=(1.0, 0.5))) is None


def test_guard_passes_a_plan_at_its_jerk_limit():
    # full-jerk reversals sampled at 1 kHz from epoch-sized times: always accepted
    rate = 1000.0
    t0 = math.ceil(EPOCH * rate) / rate
    us = np.array([[4.0, -3.0], [0.0, 0.0], [-4.0, 3.0], [0.0, 0.0]] * 5)
    plan = plan_from(t0, us, state())
    g = SetpointGuard(LIMITS)
    for i in range(int(len(us) * T * rate)):
        t = t0 + i / rate
        assert g.check(t, plan.sample(t)) is None, i
    assert g.failures == 0


def test_guard_judges_over_the_real_time_since_the_last_setpoint_left():
    # stamps 0.3 s apart, but the setpoint follows the previous one 1 ms after it left:
    # 0.05 rad in 1 ms + 10 ms jitter is a jump (V = 2: at most 0.022 rad) and is refused
    g = SetpointGuard(LIMITS, jitter=0.01)
    assert g.check(1.0, state()) is None
    reason = g.check(1.3, state(p=(0.05, 0.0)), since_sent=0.001)
    assert reason is not None and "position jumps" in reason and "11.000 ms judged" in reason
    # the same step after 0.3 s of real time is within the limits
    assert g.check(1.3, state(p=(0.05, 0.0)), since_sent=0.3) is None
    # without a send time the stamps alone measure the elapsed time
    g = SetpointGuard(LIMITS, jitter=0.01)
    g.check(1.0, state())
    assert g.check(1.3, state(p=(0.05, 0.0))) is None


def test_guard_refuses_a_negative_jitter_and_names_it():
    with pytest.raises(ValueError, match="stream_jitter"):
        SetpointGuard(LIMITS, jitter=-0.001)


def test_timeline_carries_ros_time_on_the_monotonic_clock():
    tl = StreamTimeline(1_796_000_000_123_456_789, 5_000_000_000)
    assert tl.ns(5_000_000_000) == 1_796_000_000_123_456_789
    assert tl.ns(5_004_000_000) == 1_796_000_000_127_456_789   # 4 ms later
    assert tl.at(5_004_000_000) == pytest.approx(1_796_000_000.127456789, abs=3e-7)


def test_check_all_equals_checking_one_by_one():
    """`SetpointGuard.check_all` (vectorised) reports the failures `check` reports when
    called setpoint by setpoint: the same rows and reasons, for random streams with
    non-finite values, jumps, limit violations, repeated times and moving starts."""
    rng = np.random.default_rng(17)
    lim = JointLimits(["a", "b", "c"], [-1] * 3, [1] * 3, [1] * 3, [5] * 3, [50] * 3)
    seen = 0
    for trial in range(120):
        m = 150
        t = 1000 + np.arange(m) * 0.004
        p = np.cumsum(rng.normal(0, 0.001, (m, 3)), axis=0)
        v, a = rng.normal(0, 0.002, (m, 3)), rng.normal(0, 0.01, (m, 3))
        if trial % 3 == 0:
            v[0] = a[0] = 0
        for _ in range(int(rng.integers(0, 6))):
            i, kind = int(rng.integers(1, m)), int(rng.integers(0, 6))
            if kind == 0:
                p[i, rng.integers(3)] = np.nan
            elif kind == 1:
                p[i:, 0] += 0.05
            elif kind == 2:
                v[i, 1] = 2
            elif kind == 3:
                t[i] = t[i - 1]
            elif kind == 4:
                a[i] += 1
            else:
                p[i, 2] = 1.5
        one, all_ = SetpointGuard(lim), SetpointGuard(lim)
        if trial % 2:
            rest = MotionState(np.zeros(3), np.zeros(3), np.zeros(3))
            one.check(999.996, rest)
            all_.check(999.996, rest)
        expected = [(i, r) for i in range(m)
                    if (r := one.check(float(t[i]), MotionState(p[i], v[i], a[i])))][:20]
        assert all_.check_all(t, p, v, a, 20) == expected
        seen += len(expected)
    assert seen > 300
