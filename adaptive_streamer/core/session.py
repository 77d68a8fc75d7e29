# SPDX-License-Identifier: Apache-2.0
"""A streaming session: the decision cycle, the committed plan, the guard and the watchdog.

The adapter node (and the offline replay) drive one `StreamingSession`:

* `begin(t, measured)` initialises the plan from the measured joint state and commits a
  first holding segment;
* `sample(t)` returns the commanded setpoint at a nominal stream time; if the next segment
  was not committed in time (a late decision), the braking decision is committed in its
  place and counted as an overrun;
* `decide(now, inputs)` runs the watchdog's input checks (staleness, following error) and
  one decision cycle, and commits the result if it is still for the current instant (the
  shadow policy, if any, is stepped on the same inputs);
* `stop`, `reset` (`reset_on` with the inputs' checks and a policy probe) and the trip list
  drive the latched stop.

Plan-ahead output (`enable_plan_ahead`, `adaptive_streamer.core.plan_ahead`): after every
commit the session builds the plan message (`last_plan`: the committed segment, then the
braking continuation to rest). What was last sent is the committed plan: given a clock,
`decide` commits a decision only up to ``plan_lead`` before its instant; a later one is
dropped, and every segment the driver is already on is committed from the sent
continuation, exactly as sent (the same for a stream tick that finds the plan ended). After
a stall the session therefore resumes from where the sent plan put the arm: the next
decision starts from that state (on its braking tail, or at rest at its end), and when the
late decisions reach the watchdog's ``max_overruns`` it latches an ``overruns`` stop that
brakes along the same continuation and needs a reset. Nothing ever jumps.

Stream timing (`set_stream_timing`, the live node): the stream tells `sample` when each
setpoint is sampled and `sent` when it actually left, on a monotonic clock. A setpoint may
advance along the plan at most by the real time since the previous one left plus the
jitter: after a stall while the stream was idle, the stream skips ahead along the plan (the
real time passed, the late decisions were braked as above); when the previous setpoint left
late instead (the stream stalled between sampling and sending it), the plan is re-timed:
the stream's time runs ahead of the plan time by the stall (`stream_lag`), the next setpoint
is the plan's next tick after the one sent, and it is stamped with the stream time. The
plan then follows the reference that much later; more lag than the reference window holds
ends in the reference-stale controlled stop, and a reset at rest drops the lag. With the plan-ahead output the driver follows
the sent plan on its own, so the plan is never re-timed.

Thread-safety: `sample` (stream thread) and `decide` (decision thread) share a lock held
only while committing or sampling, never while the policy runs.
"""
from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .alignment import AlignmentError, align, validate_window
from .clock_offset import DriverClock
from .cycle import CycleConfig, Decision, DecisionCycle
from .feedback import FeatureVector
from .guard import SetpointGuard
from .limit_stage import LimitStage
from .limits import JointLimits
from .plan_ahead import PlanGrid, PlanKnots, plan_knots
from .playback import Window
from .policies.base import Policy
from .policy_inputs import PolicyInputs
from .segment import MotionState, integrate
from .stream import CommandPlan, Segment, StreamError
from .watchdog import InputAges, Trip, Watchdog, WatchdogConfig


@dataclass(frozen=True)
class SessionInputs:
    """The latest inputs at one decision (times are ROS time [s]; None = never received)."""

    window: Window | None
    window_received: float | None
    feedback: FeatureVector | None
    feedback_valid_since: float | None  # last time every needed feature was valid
    joint_positions: np.ndarray | None
    joint_stamp: float | np.ndarray | None  # when the measured positions were taken
                                            # (one per joint when they came apart)
    joint_received: float | None


@dataclass
class ShadowStats:
    """Agreement between the shadow policy's decisions and the commanded ones."""

    decisions: int = 0
    sum_sq_du: float = 0.0
    max_abs_du: float = 0.0
    stopped: int = 0

    @property
    def rms_du(self) -> float:
        """RMS difference of the decided accelerations [rad/s^2] (NaN before any)."""
        return math.sqrt(self.sum_sq_du / self.decisions) if self.decisions else math.nan


def make_stages(limits: JointLimits, period: float, limit_scale: float,
                approach_scale: float) -> tuple[LimitStage, LimitStage]:
    """(running stage, approach stage) for ``limits`` scaled by ``limit_scale``."""
    running = limits if limit_scale == 1.0 else limits.scaled(limit_scale)  # refuses > 1
    return (LimitStage(running, period),
            LimitStage(limits.scaled(limit_scale * approach_scale), period))


class StreamingSession:
    """Everything between the inputs and the outgoing setpoints (ROS-free).

    Args:
        limits: the hardware limits (the guard checks against these, unscaled).
        period: decision period [s].
        policy: the policy to follow with; ``approach`` a tracker for the approach move.
        cycle_config, watchdog_config: settings.
        limit_scale: runtime scale of velocity/acceleration/jerk limits in (0, 1].
        shadow: an optional policy evaluated on the same inputs, never commanded.
    """

    def __init__(self, limits: JointLimits, period: float, policy: Policy, approach: Policy,
                 cycle_config: CycleConfig, watchdog_config: WatchdogConfig,
                 limit_scale: float = 1.0, shadow: Policy | None = None) -> None:
        self.limits = limits
        self.period = float(period)
        self.limit_scale = float(limit_scale)
        self.cycle_config = cycle_config
        self.watchdog = Watchdog(watchdog_config, limits.names)
        stage, approach_stage = make_stages(limits, period, limit_scale,
                                            cycle_config.approach_scale)
        self.cycle = DecisionCycle(stage, approach_stage, policy, approach, self.watchdog,
                                   cycle_config)
        self.plan = CommandPlan(period)
        self.guard = SetpointGuard(limits)
        self._lock = threading.Lock()
        self._trips_seen = 0
        self._feedback_last: np.ndarray | None = None   # values of the last feedback checked
        self._feedback_changed = -math.inf               # when they last changed (or rested)
        self.late_decisions = 0
        self.shadow_policy = shadow
        self.shadow: DecisionCycle | None = None
        self.shadow_plan = CommandPlan(period)
        self.shadow_stats = ShadowStats()
        self.plan_lead: float | None = None   # None: no plan-ahead output
        self.last_plan: PlanKnots | None = None
        self._grid: PlanGrid | None = None
        self._tail: list[np.ndarray] = []     # sent braking continuation, not yet committed
        self._tick: float | None = None       # stream tick [s] (None: never re-time)
        self._lag = 0.0                       # stream time - plan time [s] (re-timing)
        self._last_t: float | None = None     # stream time of the last setpoint passed
        self._sent_clock: float | None = None  # monotonic time it left [s]
        self.retimes = 0
        self.driver_clock = DriverClock()      # joint_states stamps -> this clock
        self.following_unchecked = 0           # following checks without a command to
        #                                        compare with (stamp outside the kept plan)

    def enable_plan_ahead(self, lead: float) -> None:
        """Build a plan message after every commit (`last_plan`) and, with a clock given to
        `decide`, commit decisions only up to ``lead`` seconds before their instant."""
        lead = float(lead)
        if not (math.isfinite(lead) and 0.0 <= lead < self.period):
            raise ValueError(f"plan_lead must be within [0, decision_period = {self.period:g}) "
                             f"s, got {lead:g}")
        self.plan_lead = lead

    def set_stream_timing(self, rate: float, jitter: float) -> None:
        """The live stream's tick rate [Hz] and send jitter [s]: `sample` with a clock then
        never advances the plan by more than the real time since the last setpoint left
        plus ``jitter``, re-timing the plan instead (see the module docstring); the guard
        judges with the same slack."""
        if not (math.isfinite(rate) and rate > 0.0):
            raise ValueError(f"stream_rate must be positive, got {rate!r}")
        self.guard = SetpointGuard(self.limits, jitter)
        self._tick = 1.0 / float(rate)

    @property
    def stream_lag(self) -> float:
        """How far the stream's time runs ahead of the plan time [s] after re-timing."""
        return self._lag

    # ------------------------------------------------------------------ lifecycle
    @property
    def mode(self) -> str:
        """The cycle's mode."""
        return self.cycle.mode

    def begin(self, t: float, measured: MotionState) -> None:
        """Start at time ``t`` from the measured state: hold one period, then decide."""
        with self._lock:
            self.plan.clear()
            self.shadow_plan.clear()
            self.shadow = None
            self.guard.reset()
            self._lag, self._last_t, self._sent_clock = 0.0, None, None
            self.cycle.begin(t, measured)
            first = self.cycle.commit_braking()
            self.cycle.stats.overruns -= 1  # the holding segment is planned, not late
            self._tail = []
            self._grid = PlanGrid.anchored(t, self.period)
            self._commit(first)

    def stop(self, now: float, kind: str, message: str) -> Trip:
        """Latch a stop (external request, guard failure...); the cycle brakes to rest."""
        trip = self.watchdog.fire(kind, now, message)
        self.request_stop()
        return trip

    def request_stop(self) -> None:
        """Brake to rest from the next decision on (no trip latched: deactivation, process
        shutdown). Takes the lock the stream's braking commits take, so it never lands
        between a late segment's commit and its mode change."""
        with self._lock:
            self.cycle.request_stop()

    def new_trips(self) -> list[Trip]:
        """Watchdog events since the previous call (for logging and reactions; the latest
        `watchdog.EVENTS_KEPT` of them when more came)."""
        kept = self.watchdog.events
        fresh = min(self.watchdog.total_events - self._trips_seen, len(kept))
        self._trips_seen = self.watchdog.total_events
        return list(kept)[len(kept) - fresh:] if fresh > 0 else []

    def reset(self, persisting: list[tuple[str, str]],
              now: float | None = None) -> tuple[bool, str]:
        """Reset the latched stop unless a cause persists or the arm is still braking
        (``now``: the operator's live reset, see `Watchdog.reset`)."""
        if self.cycle.mode == "stopping":
            return False, "reset refused: still braking to rest"
        ok, msg = self.watchdog.reset(persisting, now)
        if ok:
            with self._lock:
                self._drop_lag()
            self.cycle.reset()
        return ok, msg

    def _drop_lag(self) -> None:
        """At rest, move the plan up to the stream's time: the re-timing lag goes (the arm
        holds one position, the same at either time), so the approach after a reset aligns
        the reference at the stream's time again (the lock is held)."""
        if self._lag == 0.0 or not self.cycle.at_rest:
            return
        self.plan.shift(self._lag)
        self.shadow_plan.shift(self._lag)
        self.cycle.t += self._lag
        self._lag = 0.0

    def reset_on(self, now: float, inputs: SessionInputs,
                 extra: list[tuple[str, str]] | None = None) -> tuple[bool, str]:
        """Reset (the adapter's ``~/reset``) unless an input fault persists on the current
        inputs, the caller's ``extra`` (kind, reason) causes remain or the policy still
        fails on them."""
        persisting = self.input_faults(now, inputs, bool(self.cycle.policy.needs_feedback))
        persisting += extra or []
        probe = self.probe_policy(inputs)
        if probe:
            persisting.append(("policy_fault", probe))
        return self.reset(persisting, now)

    def probe_policy(self, inputs: SessionInputs) -> str | None:
        """Run the policy once on the current inputs; a reason if it still fails."""
        st = self.cycle.state
        if st is None or inputs.window is None:
            return None
        try:
            validate_window(inputs.window)
        except AlignmentError as exc:
            return f"reference/window is unusable: {exc}"
        try:
            ref = align(inputs.window, self.cycle.t + np.arange(self.cycle_config.horizon)
                        * self.period)
            out = self.cycle.policy.act(PolicyInputs(
                self.cycle.t, st, ref.positions, ref.velocities, ref.accelerations,
                inputs.feedback, self.cycle.previous_action))
            out = np.asarray(out, float)
            if out.shape != (len(self.limits),) or not np.all(np.isfinite(out)):
                return "the policy still outputs NaN/inf or the wrong size on the current inputs"
        except Exception as exc:
            return f"the policy still fails on the current inputs: {exc}"
        return None

    def swap_policy(self, policy: Policy) -> None:
        """Follow with ``policy`` from the next decision boundary."""
        self.cycle.swap_policy(policy)

    def set_limit_scale(self, scale: float) -> None:
        """New velocity/acceleration/jerk scale; takes effect once the plan fits it."""
        stage, approach_stage = make_stages(self.limits, self.period, scale,
                                            self.cycle_config.approach_scale)
        self.limit_scale = float(scale)
        self.cycle.set_stages(stage, approach_stage)

    # ------------------------------------------------------------------ stream side
    def sample(self, t: float, clock: float | None = None) -> tuple[MotionState, str | None]:
        """Setpoint at nominal stream time ``t`` and the guard's verdict (None = fine).

        ``clock``: monotonic time [s] of this sample; with `set_stream_timing` and the time
        the previous setpoint left (`sent`), the plan is re-timed when ``t`` is further
        ahead of the previous setpoint than the real time since it left plus the jitter
        (see the module docstring)."""
        since = None
        with self._lock:
            if clock is not None and self._sent_clock is not None:
                since = clock - self._sent_clock
                self._retime(t, since)
            tp = t - self._lag
            self._fill_late(tp, t)
            sp = self.plan.sample(tp)
        reason = self.guard.check(t, sp, since)
        if reason is None:
            self._last_t = t
        elif not self.watchdog.tripped:
            self.stop(t, "setpoint_guard", reason)
        return sp, reason

    def sent(self, clock: float) -> None:
        """The setpoint that last passed `sample` left at monotonic time ``clock`` [s]."""
        self._sent_clock = clock

    def _retime(self, t: float, since: float) -> None:
        """Shift the stream time ahead of the plan time so that ``t`` samples the plan at
        most the real time ``since`` the last setpoint left (plus the jitter) after it, in
        whole ticks and at least one (the lock is held)."""
        if self._tick is None or self._last_t is None or self.plan_lead is not None:
            return
        allowed = max(0.0, since) + self.guard.jitter
        step = t - self._last_t
        if step <= allowed + 1e-9:
            return
        ticks = max(1, math.floor(allowed / self._tick + 1e-9))
        shift = round((step - ticks * self._tick) / self._tick) * self._tick
        if shift > 0.0:
            self._lag += shift
            self.retimes += 1

    def commit_late(self, t: float) -> None:
        """Commit the braking segments of every decision that was late by ``t`` (the plan
        ends by then), exactly as `sample` does at a stream tick, without sampling (replay
        fills the gaps of a recording where the live decisions came late: the live guard
        judged the live stream, which the recording holds)."""
        with self._lock:
            self._fill_late(t, t)

    def sample_shadow(self, t: float) -> MotionState | None:
        """The shadow policy's setpoint at ``t`` (None when not running or not planned)."""
        with self._lock:
            if self.shadow is None or self.shadow_plan.empty:
                return None
            try:
                return self.shadow_plan.sample(t - self._lag)
            except StreamError:
                return None

    def commanded_at(self, t: float) -> MotionState | None:
        """What the stream commanded at stream time ``t`` (None outside the kept plan)."""
        with self._lock:
            try:
                return self.plan.sample(t - self._lag)
            except StreamError:
                return None

    def decision_due(self, t: float) -> bool:
        """True once the stream at nominal time ``t`` is inside the last committed segment
        (the next decision is needed before the plan runs out). Follows the plan's own
        segment times, so rounding in long runs never eats the one-period margin."""
        with self._lock:
            return not self.plan.empty and self.plan.end - (t - self._lag) <= self.period + 1e-9

    # ------------------------------------------------------------------ decision side
    @property
    def next_decision_time(self) -> float:
        """Start of the segment the next decision is for."""
        return self.cycle.t

    @property
    def points_needed(self) -> int:
        """Reference points the running policy reads (at least 2: the deviation check)."""
        return max(2, self.cycle.policy.card.reference_points)

    def input_faults(self, now: float, inputs: SessionInputs, needs_feedback: bool
                     ) -> list[tuple[str, str]]:
        """(kind, reason) of every input fault present now (staleness, frozen feedback,
        following error)."""
        ages = InputAges(
            feedback_unchanged=self._feedback_unchanged(now, inputs),
            joint_states=_age(now, inputs.joint_received),
            feedback=_age(now, inputs.feedback_valid_since),
            reference=_age(now, inputs.window_received),
            reference_margin=(math.inf if inputs.window is None else
                              float(inputs.window.stamp + inputs.window.times[-1])
                              - (self.cycle.t + (self.points_needed - 1) * self.period)),
            feedback_needed=needs_feedback)
        faults = self.watchdog.stale_inputs(ages)
        if inputs.joint_positions is not None and inputs.joint_stamp is not None:
            stamps = np.asarray(inputs.joint_stamp, float)
            latest = float(stamps.max())
            if inputs.joint_received is not None:
                self.driver_clock.update(inputs.joint_received, latest)
            shift = self.driver_clock.correction
            # one message for all joints (the usual case): one look-up
            cmd = self._commanded_before(latest + shift if latest == stamps.min()
                                         else stamps + shift)
            if cmd is None:
                self.following_unchecked += 1
            else:
                _, reason = self.watchdog.following(inputs.joint_positions, cmd)
                if reason is not None:
                    faults.append(("following_error", reason))
        return faults

    def _feedback_unchanged(self, now: float, inputs: SessionInputs) -> float:
        """How long the feedback values have stayed bit-identical while the arm moved (a
        republished copy of a dead sensor's last values is not fresh feedback)."""
        fb, state = inputs.feedback, self.cycle.state
        moving = state is not None and bool(np.any(state.velocity != 0.0))
        values = None if fb is None else np.asarray(fb.values, float)
        last = self._feedback_last
        if (values is None or not moving or last is None or values.shape != last.shape
                or not np.array_equal(values, last, equal_nan=True)):
            self._feedback_changed = now
        self._feedback_last = None if values is None else values.copy()
        return max(0.0, now - self._feedback_changed)

    def _commanded_before(self, stamps: float | np.ndarray) -> np.ndarray | None:
        """Commanded positions ``command_latency`` before the measurement time of each
        joint (one stamp for all, or one per joint); None when one is outside the plan."""
        latency = self.watchdog.config.command_latency
        if np.ndim(stamps) == 0:
            cmd = self.commanded_at(float(stamps) - latency)
            return None if cmd is None else cmd.position
        stamps = np.asarray(stamps, float)
        out = np.empty(stamps.shape)
        for stamp in np.unique(stamps):   # one per message the joints came in
            cmd = self.commanded_at(float(stamp) - latency)
            if cmd is None:
                return None
            mask = stamps == stamp
            out[mask] = cmd.position[mask]
        return out

    def decide(self, now: float, inputs: SessionInputs,
               clock: Callable[[], float] | None = None) -> Decision | None:
        """Input checks and one decision cycle; returns the decision if it was committed.

        Only decides while the stream is inside the last committed segment (the segment to
        decide starts within one period of ``now``), so a repeated trigger never runs the
        plan ahead of the stream. With the plan-ahead output and a ``clock`` (the live
        node's), a decision not committed ``plan_lead`` before its instant is dropped and
        the segments the driver is on are committed from the sent continuation, before
        deciding and again at the commit (replay passes no clock: the records say what was
        committed).
        """
        cycle = self.cycle
        deadline = clock is not None and self.plan_lead is not None
        if deadline:
            with self._lock:
                self._fill_late(now + self.plan_lead, now)
        if cycle.state is None or cycle.t - (now - self._lag) > self.period + 1e-6:
            return None  # already decided ahead (a duplicate trigger)
        following = cycle.mode in ("approaching", "following")
        if following and not self.watchdog.tripped:
            needs = bool(cycle.policy.needs_feedback) and cycle.mode == "following"
            faults = self.input_faults(now, inputs, needs)
            if faults:
                kind, reason = faults[0]
                self.stop(now, kind, reason)
        d = cycle.decide(inputs.window, inputs.feedback)
        with self._lock:
            if deadline:
                at = clock()
                self._fill_late(at + self.plan_lead, at)
            committed = cycle.commit(d, now)
            if committed:
                self._tail = []
                self._commit(d)
                self.watchdog.overrun(False)
        if not committed:
            return None
        self._step_shadow(d, inputs)
        return d

    def _commit(self, d: Decision) -> None:
        """Append ``d``'s segment to the plan (``d`` is already committed to the cycle) and,
        with the plan-ahead output, build the new plan message from it (the lock is
        held)."""
        self.plan.commit(Segment(d.time, d.state, d.u))
        if self.plan_lead is not None:
            c = self.cycle_config
            stage, end = self.cycle.stage, self.cycle.state
            build = plan_knots(self._grid, d.time, d.state, end, stage, c.rest_velocity,
                               c.rest_acceleration)
            self.last_plan = build.knots
            self._tail = list(build.knots.tail)
            if build.end_admissible is not None:
                self.cycle.reuse_evaluation(stage, end, build.end_admissible)

    def _fill_late(self, t: float, now: float) -> None:
        """Commit braking segments while the plan ends by ``t`` (the decision for its end
        came late): from the sent continuation when there is one, as sent; count them and
        latch an ``overruns`` stop at ``now`` when too many were late (the lock is held)."""
        while self.plan.end <= t + 1e-9:
            u = self._tail.pop(0) if self._tail else None
            d = self.cycle.commit_braking(u)
            self.plan.commit(Segment(d.time, d.state, d.u))
            self.late_decisions += 1
            reason = self.watchdog.overrun(True)
            if reason is not None and not self.watchdog.tripped:
                self.watchdog.fire("overruns", now, reason)
                self.cycle.request_stop()   # the lock is held

    def _step_shadow(self, main: Decision, inputs: SessionInputs) -> None:
        if self.shadow_policy is None:
            return
        if self.shadow is None:
            if main.mode != "following" or main.next_mode != "following":
                return
            stage, approach_stage = self.cycle.stage, self.cycle.approach_stage
            self.shadow = DecisionCycle(stage, approach_stage, self.shadow_policy,
                                        self.cycle.approach,
                                        Watchdog(self.watchdog.config, self.limits.names),
                                        self.cycle_config)
            self.shadow.begin_following(main.time, main.state)
            self.shadow_plan.clear()
        d = self.shadow.decide(inputs.window, inputs.feedback)
        with self._lock:
            if self.shadow.commit(d):
                self.shadow_plan.commit(Segment(d.time, d.state, d.u))
        st = self.shadow_stats
        if d.mode == "following" and main.mode == "following":
            du = d.u - main.u
            st.decisions += 1
            st.sum_sq_du += float(np.mean(du * du))
            st.max_abs_du = max(st.max_abs_du, float(np.max(np.abs(du))))
        if self.shadow.mode in ("stopping", "stopped"):
            st.stopped += 1
            self.shadow = None  # restart from the commanded plan next cycle

    def planned_end(self) -> MotionState | None:
        """Planned state at the end of the committed plan."""
        with self._lock:
            if self.plan.empty:
                return None
            seg = self.plan.segment_at(self.plan.end - 1e-9)
            return integrate(*seg.state, seg.u, self.period)


def feedback_valid_since(stamp: float | None, received: float) -> float:
    """When a fully valid feedback message's values date from: its stamp, but never later
    than its arrival (a sensor clock ahead of ROS time must not keep feedback fresh after
    the sensor stops), or the arrival when it carries no stamp."""
    return received if stamp is None else min(stamp, received)


def _age(now: float, t: float | None) -> float:
    return math.inf if t is None else max(0.0, now - t)
