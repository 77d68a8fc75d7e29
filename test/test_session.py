# SPDX-License-Identifier: Apache-2.0
"""The streaming session (ROS-free), driven the way the adapter drives it: a stream of
nominal ticks at 250 Hz sampling the committed plan, a decision at each new segment.

Checked: the first holding segment, late decisions replaced by braking and counted, the
overruns trip, input faults (following error with the command latency, stale inputs, a
window ending early), reset rules, the setpoint guard trigger (a corrupt segment injected
into the plan: the only way to reach it, the plan is within the limits by construction),
the shadow plan, limit_scale changes, re-timing after a setpoint that left late. Committed segments are checked with test/oracle_lp.py
(exact constant-jerk extrema).
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

import oracle_lp as o
from adaptive_streamer.core.cycle import CycleConfig
from adaptive_streamer.core.playback import Playback
from adaptive_streamer.core.policies import policy_for_kind
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.core.session import SessionInputs, StreamingSession
from adaptive_streamer.core.stream import Segment, StreamClock
from adaptive_streamer.core.watchdog import EVENTS_KEPT, WatchdogConfig
from test_cycle import (LIMITS, N, P0, T, T0, TOL, approach_policy, reference, running)

RATE = 250.0
LATENCY = 0.012  # watchdog.command_latency default


class Emulator:
    """Stream ticks and decisions as the adapter's stream thread and executor do."""

    def __init__(self, session: StreamingSession, start: np.ndarray = P0) -> None:
        self.s = session
        self.t0 = math.ceil(T0 * RATE) / RATE
        session.begin(self.t0, MotionState(start.copy(), np.zeros(N), np.zeros(N)))
        self.clock = StreamClock(self.t0, RATE)
        self.playback = Playback(reference(), T, 10, end_mode="loop")
        self.playback.start(self.t0)
        self.i = 0
        self.last_segment = -1
        self.samples: list[tuple[float, MotionState, str | None]] = []
        self.segments: dict[float, Segment] = {}
        self.js_offset = np.zeros(N)
        self.js_age = 0.0
        self.js_clock = 0.0
        self.window_age = 0.0
        self.truncate = False

    def inputs(self, now: float) -> SessionInputs:
        w = self.playback.window(now)
        if self.truncate:
            w = w._replace(times=w.times[:1], positions=w.positions[:1],
                           velocities=w.velocities[:1], accelerations=w.accelerations[:1])
        # an ideal driver, LATENCY behind; its latest message was sent js_age ago, stamped
        # on its own clock (js_clock ahead of this one)
        sent = now - self.js_age
        cmd = self.s.commanded_at(sent - LATENCY)
        pos = (cmd.position if cmd is not None else P0) + self.js_offset
        return SessionInputs(w, now - self.window_age, None, None, pos, sent + self.js_clock,
                             sent)

    def tick(self, decide: bool = True) -> tuple[MotionState, str | None]:
        t = self.clock.time_of(self.i)
        self.i += 1
        sp, reason = self.s.sample(t)
        self.samples.append((t, sp, reason))
        seg = self.s.plan.segment_at(t)
        self.segments[seg.start] = seg
        if self.s.watchdog.tripped and self.playback.state == "running":
            self.playback.pause(t)  # as the adapter pauses the reference server on a trip
        k = math.floor((t - self.t0) / T + 1e-9)
        if k != self.last_segment:
            self.last_segment = k
            if decide:
                self.s.decide(t, self.inputs(t))
        return sp, reason

    def run(self, seconds: float, decide: bool = True) -> None:
        for _ in range(int(round(seconds * RATE))):
            self.tick(decide)

    def worst_violation(self, scale: float = 1.0) -> float:
        """Largest normalised violation over every committed segment seen (oracle_lp)."""
        return max(o.segment_violation(*seg.state, seg.u, T, LIMITS.position_min,
                                       LIMITS.position_max, LIMITS.velocity_max * scale,
                                       LIMITS.acceleration_max * scale,
                                       LIMITS.jerk_max * scale)
                   for seg in self.segments.values())


def session(**wd) -> StreamingSession:
    run = running()
    return StreamingSession(LIMITS, T, policy_for_kind("tracker", run), approach_policy(run),
                            CycleConfig(), WatchdogConfig(**wd))


def test_begin_holds_at_the_measured_state_then_follows():
    emu = Emulator(session())
    sp, reason = emu.tick()
    assert reason is None
    np.testing.assert_array_equal(sp.position, P0)
    assert not sp.velocity.any() and not sp.acceleration.any()
    emu.run(3.0)
    assert emu.s.mode == "following" and emu.s.late_decisions == 0
    assert emu.s.watchdog.trip is None and emu.clock.skipped == 0
    assert all(r is None for _, _, r in emu.samples)
    assert emu.worst_violation() <= TOL
    assert max(np.abs(sp.velocity).max() for _, sp, _ in emu.samples) > 0.2


def test_late_decisions_are_braked_counted_and_trip_overruns():
    emu = Emulator(session(max_overruns=3, overrun_window=20))
    emu.run(1.5)
    assert emu.s.mode == "following"
    # one late decision: the stream brakes in its place, the next one is on time again
    emu.run(2 * T, decide=False)   # the plan runs one period ahead: the 2nd one is late
    assert emu.s.late_decisions == 1 and emu.s.watchdog.trip is None
    emu.run(0.5)
    assert emu.s.mode == "following"
    # three more within the overrun window: the watchdog trips 'overruns'
    emu.run(3 * T, decide=False)
    assert emu.s.late_decisions == 4 and emu.s.watchdog.trip.kind == "overruns"
    assert "max_overruns 3" in emu.s.watchdog.trip.message
    emu.run(1.0)
    assert emu.s.mode == "stopped" and emu.s.cycle.at_rest
    assert emu.worst_violation() <= TOL
    assert all(r is None for _, _, r in emu.samples)


def test_following_error_uses_the_command_latency_earlier():
    emu = Emulator(session(following_error=0.05))
    emu.run(1.5)
    # an ideal driver exactly LATENCY behind: no following error although the arm moves
    assert emu.s.watchdog.trip is None
    emu.js_offset[3] = 0.06
    emu.run(2 * T)
    trip = emu.s.watchdog.trip
    assert trip.kind == "following_error" and "'j4'" in trip.message
    now = emu.clock.time_of(emu.i)
    faults = emu.s.input_faults(now, emu.inputs(now), False)
    assert [k for k, _ in faults] == ["following_error"]


@pytest.mark.parametrize("offset", [-0.5, 0.5, 0.03])
def test_following_error_is_checked_with_a_driver_clock_offset(offset):
    """A driver whose clock is off by ±0.5 s (not synchronised) stamps joint_states outside
    the kept plan; the check maps the stamps onto this clock (smallest arrival - stamp) and
    keeps checking. 30 ms counts as synchronised clocks: the stamps are used as they are."""
    emu = Emulator(session(following_error=0.05))
    emu.js_clock = offset
    emu.run(1.5)
    # every decision compared (but the first, at the plan's start: nothing commanded before)
    assert emu.s.watchdog.trip is None and emu.s.following_unchecked <= 1
    assert emu.s.driver_clock.estimate == pytest.approx(-offset, abs=1e-6)
    assert emu.s.driver_clock.correction == (0.0 if abs(offset) < 0.05 else -offset)
    emu.js_offset[3] = 0.1   # (30 ms of unsynchronised stamps shift the comparison a little)
    emu.run(2 * T)
    trip = emu.s.watchdog.trip
    assert trip is not None and trip.kind == "following_error" and "'j4'" in trip.message


@pytest.mark.parametrize("setup, kind, words", [
    (lambda e: setattr(e, "js_age", 0.2), "joint_states_stale", "joint_states_timeout"),
    (lambda e: setattr(e, "window_age", 0.4), "reference_stale", "reference_timeout"),
    (lambda e: setattr(e, "truncate", True), "reference_stale", "before the decision horizon"),
])
def test_stale_inputs_stop_and_persist_for_reset(setup, kind, words):
    emu = Emulator(session())
    emu.run(1.5)
    setup(emu)
    emu.run(2 * T)
    assert emu.s.watchdog.trip.kind == kind and words in emu.s.watchdog.trip.message
    ok, msg = emu.s.reset([])
    assert not ok and "still braking" in msg
    emu.run(1.0)
    now = emu.clock.time_of(emu.i)
    persisting = emu.s.input_faults(now, emu.inputs(now), False)
    ok, msg = emu.s.reset(persisting)
    assert not ok and words in msg
    emu.js_age, emu.window_age, emu.truncate = 0.0, 0.0, False
    now = emu.clock.time_of(emu.i)
    ok, msg = emu.s.reset(emu.s.input_faults(now, emu.inputs(now), False))
    assert ok and msg.startswith("reset after")
    emu.run(2.0)
    assert emu.s.mode == "following"
    emu.playback.resume(emu.clock.time_of(emu.i))
    emu.run(1.5)
    assert emu.s.mode == "following"
    assert emu.worst_violation() <= TOL


def test_setpoint_guard_trips_on_a_corrupt_segment():
    emu = Emulator(session())
    emu.run(1.0)
    s = emu.s
    end = s.planned_end()
    bad = Segment(s.plan.end, end, end.acceleration + 2 * LIMITS.jerk_max * T)  # 2 J
    s.plan.commit(bad)
    reasons = [emu.tick(decide=False)[1] for _ in range(int(2 * T * RATE))]
    fails = [r for r in reasons if r is not None]
    assert fails and "acceleration" in fails[0]
    assert s.watchdog.trip.kind == "setpoint_guard" and s.guard.failures >= 1
    assert s.mode in ("stopping", "stopped")


def test_shadow_plan_is_kept_apart():
    run = running()
    stiff = policy_for_kind("tracker", run, kp=400.0)
    s = StreamingSession(LIMITS, T, policy_for_kind("tracker", run), approach_policy(run),
                         CycleConfig(), WatchdogConfig(), shadow=stiff)
    emu = Emulator(s)
    emu.run(2.0)
    assert s.shadow is not None and s.shadow_stats.decisions > 10
    t = emu.clock.time_of(emu.i - 1)
    shadow, main = s.sample_shadow(t), s.commanded_at(t)
    assert shadow is not None and not np.array_equal(shadow.position, main.position)
    assert math.isfinite(s.shadow_stats.rms_du) and s.shadow_stats.max_abs_du > 0
    # the commanded stream is the main plan only
    np.testing.assert_array_equal(emu.samples[-1][1].position, main.position)


def test_limit_scale_takes_effect_once_the_plan_fits():
    emu = Emulator(session())
    emu.run(1.2)
    assert np.abs(emu.s.cycle.state.velocity).max() > 0.2
    emu.s.set_limit_scale(0.1)
    assert emu.s.limit_scale == 0.1
    start = emu.i
    emu.run(2.0)
    assert emu.s.cycle.stage.limits.velocity_max == pytest.approx(LIMITS.velocity_max * 0.1)
    assert emu.worst_violation() <= TOL
    later = [sp for t, sp, _ in emu.samples[start + int(0.6 * RATE):]]
    assert max(np.max(np.abs(sp.velocity) / (0.1 * LIMITS.velocity_max)) for sp in later) \
        <= 1 + 1e-6
    assert emu.s.watchdog.trip is None or emu.s.watchdog.trip.kind == "deviation"


def test_stop_request_and_reset_reapproach():
    emu = Emulator(session())
    emu.run(1.5)
    trip = emu.s.stop(emu.clock.time_of(emu.i), "external_stop", "stop requested via ~/stop")
    assert trip.kind == "external_stop" and emu.s.new_trips()[-1] is trip
    emu.run(1.0)
    assert emu.s.mode == "stopped"
    rest = emu.samples[-1][1]
    assert not rest.velocity.any() or np.abs(rest.velocity).max() < 1e-9
    ok, _ = emu.s.reset([])
    assert ok and emu.s.mode == "approaching"
    emu.run(2.0)
    assert emu.s.mode == "following"
    emu.playback.resume(emu.clock.time_of(emu.i))
    emu.run(1.5)
    assert emu.s.mode == "following" and emu.worst_violation() <= TOL


def test_joints_measured_at_different_times_are_each_compared_at_their_own_time():
    """joint_states in two messages (the last joint 0.1 s older): an ideal driver exactly
    LATENCY behind for each joint's own stamp has no following error; comparing every
    joint at the oldest stamp would see the others' motion over 0.1 s."""
    emu = Emulator(session(following_error=0.01))
    emu.run(1.5)
    assert emu.s.mode == "following" and emu.s.watchdog.trip is None
    now = emu.clock.time_of(emu.i)
    stamps = np.full(N, now)
    stamps[-1] = now - 0.1
    pos = emu.s.commanded_at(now - LATENCY).position.copy()
    pos[-1] = emu.s.commanded_at(stamps[-1] - LATENCY).position[-1]
    base = emu.inputs(now)
    apart = dataclasses.replace(base, joint_positions=pos, joint_stamp=stamps)
    assert emu.s.input_faults(now, apart, False) == []
    oldest = dataclasses.replace(apart, joint_stamp=float(stamps.min()))
    assert [k for k, _ in emu.s.input_faults(now, oldest, False)] == ["following_error"]


def test_feedback_frozen_while_moving_counts_as_stale():
    # a republished copy of a dead sensor's last values is not fresh feedback: bit-identical
    # values for longer than feedback_frozen while the arm moves stop it as feedback_stale
    class Values:     # the part of a FeatureVector the check reads
        def __init__(self, v):
            self.values = np.array(v)

    def at(t, v):     # feedback received and valid at t (never old)
        return t, SessionInputs(None, None, Values(v), t, None, None, None)

    moving = MotionState(P0.copy(), np.full(N, 0.1), np.zeros(N))
    s = session(feedback_frozen=0.3)
    s.cycle.state = moving
    assert "feedback_stale" not in dict(s.input_faults(*at(T0, [0.002, 0.01]), True))
    faults = dict(s.input_faults(*at(T0 + 0.31, [0.002, 0.01]), True))
    assert "feedback frozen" in faults["feedback_stale"], faults
    # values that change (a live sensor) or an arm at rest never count as frozen
    s = session(feedback_frozen=0.3)
    s.cycle.state = moving
    for k in range(40):
        now, inputs = at(T0 + 0.01 * k, [0.002 + 1e-9 * (k % 2), 0.01])
        assert "feedback_stale" not in dict(s.input_faults(now, inputs, True))
    s.cycle.state = MotionState(P0.copy(), np.zeros(N), np.zeros(N))
    for k in range(40):
        assert "feedback_stale" not in dict(s.input_faults(*at(T0 + 1 + 0.1 * k, [0.0, 0.0]),
                                                           True))


def test_a_setpoint_that_left_late_re_times_the_plan_instead_of_jumping():
    s = session()
    s.set_stream_timing(RATE, 0.01)
    emu = Emulator(s)
    emu.run(2.0)
    assert s.mode == "following"
    tick = 1.0 / RATE
    # the previous setpoint left on time: after 0.3 s idle the stream skips ahead
    t = emu.clock.time_of(emu.i)
    s.sample(t, 100.0)
    s.sent(100.0002)
    sp, reason = s.sample(t + 0.3, 100.3)
    assert reason is None and s.stream_lag == 0.0 and s.retimes == 0
    assert s.late_decisions > 0   # the decisions it missed were braked in their place
    # the next setpoint left 0.3 s late (a stall between sampling and sending it): 1 ms
    # later the stream time is 0.304 s on, but the plan advances two ticks (1 ms + 10 ms
    # jitter, in whole ticks), stamped with the stream time
    t = t + 0.3 + tick
    s.sample(t, 100.304)
    s.sent(100.604)
    nxt = s.commanded_at(t + 2 * tick)
    sp, reason = s.sample(t + 0.3, 100.605)
    assert reason is None and s.retimes == 1
    assert s.stream_lag == pytest.approx(0.3 - 2 * tick, abs=1e-9)
    np.testing.assert_allclose(sp.position, nxt.position, atol=1e-12)
    np.testing.assert_allclose(sp.velocity, nxt.velocity, atol=1e-12)
    # commanded_at answers in stream time from now on
    np.testing.assert_allclose(s.commanded_at(t + 0.3).position, sp.position, atol=1e-12)
    # stopped at rest, a reset drops the lag: the held position is the same at stream time
    s.stop(t + 0.3, "external_stop", "test")
    clock, u = 100.605, t + 0.3
    while not (s.mode == "stopped" and s.cycle.at_rest):
        u, clock = u + tick, clock + tick
        s.sample(u, clock)
        s.sent(clock)
        if s.decision_due(u):
            s.decide(u, emu.inputs(u))
    held = s.commanded_at(u)
    ok, msg = s.reset([])
    assert ok, msg
    assert s.stream_lag == 0.0
    np.testing.assert_array_equal(s.commanded_at(u).position, held.position)
    sp, reason = s.sample(u + tick, clock + tick)
    assert reason is None and s.retimes == 1
    np.testing.assert_array_equal(sp.position, held.position)


def test_new_trips_after_more_events_than_are_kept():
    s = session()
    kept = EVENTS_KEPT
    s.watchdog.fire("external_stop", 1.0, "first")
    assert [t.message for t in s.new_trips()] == ["first"] and s.new_trips() == []
    for i in range(kept + 3):
        s.watchdog.fire("external_stop", 2.0, f"n{i}")
    fresh = s.new_trips()
    assert len(fresh) == kept and fresh[-1].message == f"n{kept + 2}"
    assert s.new_trips() == []
