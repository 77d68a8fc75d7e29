# SPDX-License-Identifier: Apache-2.0
"""The plan-ahead output (ROS-free): knots, the braking continuation, and the rule that what
was last sent is the committed plan.

Checked: quintic Hermite interpolation of two knots reproduces a constant-jerk segment
exactly (against scipy's BPoly and the constant-jerk closed forms); every plan message
ends at rest within all limits (test/oracle_lp.py); a session driven with a late clock
drops late decisions and commits the sent continuation, so a follower of the messages
(test/plan_follower.py, written for the tests) never jumps and stays within the limits.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.interpolate import BPoly

import oracle_lp as o
from adaptive_streamer.core.plan_ahead import PlanGrid, PlanKnots, braking_tail
from adaptive_streamer.core.limit_stage import LimitStage
from adaptive_streamer.core.segment import MotionState, sample
from adaptive_streamer.core.session import StreamingSession
from plan_follower import PlanMessage, follow, hermite5, late, switch_jumps
from test_cycle import LIMITS, N, T, TOL
from test_session import Emulator, session

REST = 1e-6


def _message(knots: PlanKnots, received_ns: int) -> PlanMessage:
    times = knots.stamp_ns + np.array(knots.offsets_ns, dtype=np.int64)
    return PlanMessage(received_ns, times, knots.positions, knots.velocities,
                       knots.accelerations)


def test_quintic_hermite_of_two_knots_is_the_constant_jerk_segment():
    rng = np.random.default_rng(3)
    for _ in range(200):
        p, v, a, u = rng.normal(size=(4, N)) * np.array([[1.0], [1.5], [6.0], [6.0]])
        s = np.linspace(0.0, T, 51)
        # constant-jerk closed forms (Biagiotti & Melchiorri 2008, ch. 3; from memory)
        ref = sample(p, v, a, u, T, s)
        end = sample(p, v, a, u, T, T)
        got = hermite5(p, v, a, end.position, end.velocity, end.acceleration, T, s[:, None])
        np.testing.assert_allclose(got[0], ref.position, rtol=0, atol=1e-12)
        np.testing.assert_allclose(got[1], ref.velocity, rtol=0, atol=1e-11)
        np.testing.assert_allclose(got[2], ref.acceleration, rtol=0, atol=1e-9)
        np.testing.assert_allclose(got[3], np.broadcast_to((u - a) / T, got[3].shape),
                                   rtol=1e-7, atol=1e-7)
        # and the test's Hermite formulas against scipy's Bernstein-basis Hermite
        # interpolant (scipy.interpolate.BPoly.from_derivatives)
        for j in range(N):
            bp = BPoly.from_derivatives([0.0, T], [[p[j], v[j], a[j]],
                                                   [end.position[j], end.velocity[j],
                                                    end.acceleration[j]]])
            np.testing.assert_allclose(got[0][:, j], bp(s), rtol=0, atol=1e-12)
            np.testing.assert_allclose(got[1][:, j], bp(s, 1), rtol=0, atol=1e-10)


def test_braking_tail_reaches_rest_within_the_limits():
    stage = LimitStage(LIMITS, T)
    rng = np.random.default_rng(5)
    mid = 0.5 * (LIMITS.position_min + LIMITS.position_max)
    for _ in range(50):
        v = rng.uniform(-0.8, 0.8, N) * LIMITS.velocity_max
        state = MotionState(mid.copy(), v, np.zeros(N))
        tail = braking_tail(stage, state, REST, 1e-5)
        us, states = tail.decisions, tail.states
        np.testing.assert_array_equal(tail.first.lo, stage.evaluate(*state).lo)
        assert us and np.all(np.abs(states[-1].velocity) <= REST)
        assert np.all(np.abs(states[-1].acceleration) <= 1e-5)
        s = state
        for u, nxt in zip(us, states):
            assert o.segment_violation(*s, u, T, LIMITS.position_min, LIMITS.position_max,
                                       LIMITS.velocity_max, LIMITS.acceleration_max,
                                       LIMITS.jerk_max) <= TOL
            s = nxt
    rest = braking_tail(stage, MotionState(mid, np.zeros(N), np.zeros(N)), REST, 1e-5)
    assert rest.decisions == [] and rest.states == [] and rest.first is None


def test_grid_keeps_consecutive_messages_on_the_same_nanoseconds():
    # at epoch-sized times a float instant resolves 2.4e-7 s; the grid is exact integers
    grid = PlanGrid.anchored(1_796_000_000.012, T)
    t = grid.t0
    for k in range(1, 100_000):
        t += T
        if k % 9973 == 0:
            assert grid.ns(t) == grid.t0_ns + k * 50_000_000


class LateClock:
    """The node's clock as the session sees it at a commit: on time, or late by ``late``."""

    def __init__(self) -> None:
        self.now = 0.0
        self.late = 0.0

    def __call__(self) -> float:
        return self.now + self.late


def _plan_emulator(**wd) -> tuple[Emulator, LateClock, list[PlanMessage]]:
    s = session(**wd)
    s.enable_plan_ahead(0.01)
    clock = LateClock()
    sent: list[PlanMessage] = []
    orig = s.decide

    def decide(now, inputs, _clock=None):
        clock.now = now
        before = s.last_plan
        d = orig(now, inputs, clock)
        if s.last_plan is not before:
            sent.append(_message(s.last_plan, int(round((now + clock.late) * 1e9))))
        return d

    s.decide = decide  # the emulator's decisions go through the node's path, with a clock
    emu = Emulator(s)
    sent.append(_message(s.last_plan, int(round(emu.t0 * 1e9))))
    return emu, clock, sent


def _check_followed(emu: Emulator, sent: list[PlanMessage]) -> dict[str, np.ndarray]:
    t0 = int(sent[0].times_ns[0])
    t1 = int(max(m.times_ns[-1] for m in sent)) + 100_000_000
    f = follow(sent, t0, t1)
    assert (f["msg"] >= 0).all()
    for key, lim in (("v", LIMITS.velocity_max), ("a", LIMITS.acceleration_max),
                     ("j", LIMITS.jerk_max)):
        assert np.all(np.abs(f[key]) <= lim * (1 + 1e-9) + 1e-9), key
    assert np.all(f["p"] >= LIMITS.position_min - 1e-9)
    assert np.all(f["p"] <= LIMITS.position_max + 1e-9)
    jumps = switch_jumps(sent)
    assert jumps and max(jumps) <= 1e-9
    assert late(sent[1:]) == 0  # every plan sent before its first point's time
    return f


def test_on_time_plans_follow_the_stream_exactly():
    emu, clock, sent = _plan_emulator()
    emu.run(3.0)
    assert emu.s.mode == "following" and emu.s.late_decisions == 0
    f = _check_followed(emu, sent)
    # the followed motion is the committed plan the stream samples
    for t, sp, _ in emu.samples[::25]:
        i = int(round((t - emu.t0) * 1e3))
        np.testing.assert_allclose(f["p"][i], sp.position, rtol=0, atol=2e-6 * 5)
    assert np.max(np.abs(f["v"])) > 0.2


def test_a_late_decision_is_dropped_and_the_sent_tail_committed_as_sent():
    emu, clock, sent = _plan_emulator(max_overruns=3)
    emu.run(1.5)
    assert emu.s.mode == "following"
    clock.late = 0.045   # the next commit comes 45 ms after its call: past the 10 ms lead
    tail = emu.s.last_plan
    emu.run(T)
    clock.late = 0.0
    assert emu.s.late_decisions >= 1
    seg = emu.s.plan.segment_at(tail.stamp_ns * 1e-9 + 1.5 * T)
    np.testing.assert_array_equal(seg.u, tail.tail[0])     # exactly the sent decision
    emu.run(1.0)
    assert emu.s.mode == "following" and emu.s.watchdog.trip is None
    _check_followed(emu, sent)


def test_a_stall_longer_than_the_plan_brakes_along_the_tail_then_latches_overruns():
    emu, clock, sent = _plan_emulator(max_overruns=3)
    emu.run(1.5)
    moving = float(np.max(np.abs(emu.s.last_plan.velocities[0])))
    assert moving > 0.05
    # a 0.3 s stall: no tick and no decision; then the process wakes up
    stall = int(round(0.3 * 250))
    emu.i += stall
    emu.run(1.5)
    assert emu.s.watchdog.trip is not None and emu.s.watchdog.trip.kind == "overruns"
    assert emu.s.mode == "stopped" and emu.s.cycle.at_rest
    f = _check_followed(emu, sent)
    assert np.all(np.abs(f["v"][-50:]) <= REST)


def test_plan_lead_is_checked():
    s = session()
    with pytest.raises(ValueError, match="plan_lead"):
        s.enable_plan_ahead(T)
    with pytest.raises(ValueError, match="plan_lead"):
        s.enable_plan_ahead(math.nan)
    assert isinstance(s, StreamingSession)
