# SPDX-License-Identifier: Apache-2.0
"""One decision cycle — the same code for the live adapter and the offline replay.

A cycle takes the planned state at the next decision instant (the end of the segment being
streamed now), the latest reference window and feedback, and produces the next committed
constant-jerk segment:

    inputs -> reference aligned at t + i T -> policy -> limit stage -> segment
           -> deviation check of the planned end state -> commit, or begin a smooth stop

Modes: ``waiting`` (not started), ``approaching`` (a jerk-limited move onto the reference,
reduced limits, until close), ``following`` (the policy runs), ``stopping`` (braking to rest
through the limit stage after a watchdog trip), ``stopped`` (latched hold at rest until a
reset, which re-approaches). The planned state is the integrated command stream, never the
noisy measured state; the measured state only initialises it (`begin`).

Deterministic: the same inputs in the same order give the same decisions, bit for bit.
Decision instants advance by adding the period, so at epoch-sized ROS times they pick up
about 5e-8 s of rounding per decision (milliseconds per hour); the stream follows the
plan's own segment times (`StreamingSession.decision_due`), so this never eats the
one-period margin.
`decide` is pure with respect to the cycle's state; `commit` applies a decision if it is
still for the current instant, so a late decision (overrun) can be replaced by
`commit_braking` safely.
"""
from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass, field, replace

import numpy as np

from .alignment import AlignmentError, align, validate_window
from .playback import Window
from .feedback import FeatureVector
from .limit_stage import Admissible, LimitStage, normalised_onto
from .policies.base import Policy, PolicyInputs
from .segment import MotionState, integrate
from .watchdog import Watchdog

MODES = ("waiting", "approaching", "following", "stopping", "stopped")


class CycleError(RuntimeError):
    """The cycle was used out of order (e.g. stepped before `begin`)."""


@dataclass(frozen=True)
class CycleConfig:
    """Settings of the decision cycle.

    ``approach_scale`` scales velocity/acceleration/jerk limits for the approach move;
    ``approach_tolerance`` [rad] is how close (and ``approach_tolerance`` rad/s how slow
    relative to the reference) the plan must be to hand over to the policy;
    ``approach_bandwidth`` [rad/s] is the approach's critically damped tracking bandwidth.
    """

    horizon: int = 10
    approach_scale: float = 0.3
    approach_tolerance: float = 2e-3
    approach_bandwidth: float = 4.0
    rest_velocity: float = 1e-6
    rest_acceleration: float = 1e-5


def policy_inputs_at(t: float, state: MotionState, window: Window,
                     feedback: FeatureVector | None, previous_action: np.ndarray,
                     offsets: np.ndarray) -> PolicyInputs:
    """The policy's inputs at decision instant ``t``: the reference aligned at
    ``t + offsets`` (``offsets = arange(H) * T``); raises `AlignmentError` for an unusable
    window. The cycle and the dataset builder both build them here."""
    validate_window(window)
    ref = align(window, t + offsets)
    return PolicyInputs(t, state, ref.positions, ref.velocities, ref.accelerations,
                        feedback, previous_action)


def map_action(meaning: str, action: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """The next acceleration for a raw ``action`` of meaning ``normalised`` ([-1, 1] onto
    [lo, hi], clipped) or ``acceleration`` (clipped into [lo, hi]); elementwise, any shape."""
    if meaning == "normalised":
        return normalised_onto(action, lo, hi)
    return np.minimum(np.maximum(action, lo), hi)


@dataclass(frozen=True)
class Decision:
    """One decision cycle's record (everything replay needs to reproduce or compare it)."""

    time: float                 # start of the decided segment (decision instant t_k)
    mode: str                   # mode the decision was made in
    state: MotionState          # planned state at t_k
    window_stamp: float         # stamp of the reference window used (NaN if none)
    feedback_stamp: float       # stamp of the feedback used (NaN if none)
    action: np.ndarray          # raw policy output (NaN where no policy ran)
    lo: np.ndarray
    hi: np.ndarray
    u: np.ndarray               # committed acceleration at t_k + T
    viable: bool
    deviation_max: float
    deviation_norm: float
    verdict: str                # "ok", or the watchdog kind that fired in this cycle
    message: str = ""
    policy_time: float = 0.0    # seconds spent in the policy
    next_mode: str = ""


@dataclass
class _Pending:
    policy: Policy | None = None
    stage: LimitStage | None = None
    approach_stage: LimitStage | None = None


@dataclass
class CycleStats:
    """Counters for diagnostics."""

    decisions: int = 0
    overruns: int = 0
    non_viable: int = 0
    limit_transitions: int = 0
    policy_swaps: int = 0
    policy_times: list[float] = field(default_factory=list)


class DecisionCycle:
    """The decision cycle state machine.

    Args:
        stage: the limit stage for the running limits (and decision period).
        approach_stage: a stage for the approach move (reduced limits).
        policy: the policy to follow with; ``approach`` a tracker used for the approach.
        watchdog: trips are latched there; the cycle reads and writes it.
        config: cycle settings.
    """

    def __init__(self, stage: LimitStage, approach_stage: LimitStage, policy: Policy,
                 approach: Policy, watchdog: Watchdog, config: CycleConfig) -> None:
        if config.horizon < 2:
            raise CycleError(f"horizon must be at least 2 points, got {config.horizon}")
        self.stage = stage
        self.approach_stage = approach_stage
        self.policy = policy
        self.approach = approach
        self.watchdog = watchdog
        self.config = config
        self.period = stage.period
        self.mode = "waiting"
        self.t = math.nan
        self.state: MotionState | None = None
        self.previous_action = np.zeros(len(stage.limits))
        self.stats = CycleStats()
        self._pending = _Pending()
        self._pending_lock = threading.Lock()
        self._offsets = np.arange(config.horizon) * self.period
        self._continuous = stage.limits.continuous
        self._evaluated: tuple[LimitStage, MotionState, Admissible] | None = None

    # ------------------------------------------------------------------ control
    def begin(self, t: float, measured: MotionState) -> None:
        """Start planning from a measured state at time ``t`` (velocity/accel taken as zero)."""
        p = np.asarray(measured.position, float).copy()
        z = np.zeros_like(p)
        self.state = MotionState(p, z, z.copy())
        self.t = float(t)
        self.mode = "approaching"
        self.previous_action = np.zeros_like(p)
        self.approach.reset()

    def begin_following(self, t: float, state: MotionState) -> None:
        """Start directly in ``following`` from a planned state (shadow evaluation)."""
        self.state = MotionState(*(np.array(x, float) for x in state))
        self.t = float(t)
        self.mode = "following"
        self.previous_action = np.zeros_like(self.state.position)
        self.policy.reset()

    def request_stop(self) -> None:
        """Begin a controlled stop at the next decision (also done by any watchdog trip)."""
        if self.mode in ("approaching", "following", "waiting"):
            self.mode = "stopping" if self.state is not None else "stopped"

    def reset(self) -> None:
        """After a watchdog reset: re-approach the reference from the (rested) plan."""
        if self.mode in ("stopping", "stopped") and self.state is not None:
            self.mode = "approaching"
            self.approach.reset()

    def swap_policy(self, policy: Policy) -> None:
        """Switch to ``policy`` at the next decision boundary (any thread)."""
        with self._pending_lock:
            self._pending.policy = policy

    def set_stages(self, stage: LimitStage, approach_stage: LimitStage) -> None:
        """New limits (e.g. limit_scale): taken when the plan is viable under them."""
        with self._pending_lock:
            self._pending.stage, self._pending.approach_stage = stage, approach_stage

    @property
    def at_rest(self) -> bool:
        """True when the planned state is at rest."""
        if self.state is None:
            return True
        c = self.config
        return bool(np.all(np.abs(self.state.velocity) <= c.rest_velocity)
                    and np.all(np.abs(self.state.acceleration) <= c.rest_acceleration))

    # ------------------------------------------------------------------ the cycle
    def step(self, window: Window | None, feedback: FeatureVector | None) -> Decision:
        """Decide and commit one segment (offline use)."""
        d = self.decide(window, feedback)
        self.commit(d)
        return d

    def decide(self, window: Window | None, feedback: FeatureVector | None) -> Decision:
        """Decide the segment starting at the current decision instant (no state change)."""
        if self.state is None:
            raise CycleError("decide() before begin()")
        self._take_pending()
        t, state, mode = self.t, self.state, self.mode
        if self.watchdog.tripped and mode in ("approaching", "following"):
            mode = "stopping"
        n = state.position.shape[0]
        nan = np.full(n, np.nan)
        wstamp = window.stamp if window is not None else math.nan
        fstamp = feedback.stamp if feedback is not None and feedback.stamp is not None else math.nan
        if mode in ("stopping", "stopped", "waiting") or window is None:
            return self._braking(t, state, mode, wstamp, fstamp, "ok", "")
        if self._pending.stage is not None:  # new limits: brake until the plan fits them
            return self._braking(t, state, mode, wstamp, fstamp, "ok", "limit transition")
        try:
            inputs = self.policy_inputs(window, feedback)
        except AlignmentError as exc:
            return self._braking(t, state, "stopping", wstamp, fstamp, "reference_stale", str(exc))
        if mode == "approaching":
            policy, stage = self.approach, self.approach_stage
        else:
            policy, stage = self.policy, self.stage
        t0 = time.perf_counter()
        try:
            action = np.asarray(policy.act(inputs), dtype=float)
            fault = None
            if action.shape != (n,):
                fault = f"policy output has shape {action.shape}, expected ({n},)"
            elif not np.all(np.isfinite(action)):
                fault = "policy output holds NaN or infinite values"
        except Exception as exc:  # any policy failure becomes a controlled stop
            action, fault = nan, f"policy raised {type(exc).__name__}: {exc}"
        elapsed = time.perf_counter() - t0
        if fault is not None:
            d = self._braking(t, state, "stopping", wstamp, fstamp, "policy_fault", fault)
            return replace(d, action=action if action.shape == (n,) else nan, policy_time=elapsed)
        r = self._evaluate(stage, state)
        meaning = policy.action_meaning
        if meaning in ("normalised", "acceleration"):
            u = map_action(meaning, action, r.lo, r.hi)
        else:
            u = stage.braking(state, r)
        viable = bool(r.viable.all())
        end = integrate(*state, u, self.period)
        dev_max, dev_norm, reason = self.watchdog.deviation(
            end.position, inputs.ref_positions[1], self._continuous)
        next_mode = mode
        if mode == "approaching":
            close = (np.all(np.abs(end.position - inputs.ref_positions[1])
                            <= self.config.approach_tolerance)
                     and np.all(np.abs(end.velocity - inputs.ref_velocities[1])
                                <= self.config.approach_tolerance))
            next_mode = "following" if close else "approaching"
        elif reason is not None:
            d = self._braking(t, state, "stopping", wstamp, fstamp, "deviation", reason)
            return replace(d, action=action, policy_time=elapsed, deviation_max=dev_max,
                           deviation_norm=dev_norm)
        return Decision(t, mode, state, wstamp, fstamp, action, r.lo, r.hi, u, viable,
                        dev_max, dev_norm, "ok", "", elapsed, next_mode)

    def policy_inputs(self, window: Window, feedback: FeatureVector | None) -> PolicyInputs:
        """What the policy sees at the current decision instant (the reference aligned at
        ``t + i T``); raises `AlignmentError` for an unusable window. `decide` builds its
        inputs here, so a caller can look at a decision's inputs before it is made."""
        if self.state is None:
            raise CycleError("policy_inputs() before begin()")
        return policy_inputs_at(self.t, self.state, window, feedback, self.previous_action,
                                self._offsets)

    def commit(self, d: Decision, now: float | None = None) -> bool:
        """Apply decision ``d`` if it is for the current instant; fire its watchdog verdict."""
        if self.state is None or d.time != self.t:
            return False
        if d.verdict != "ok":
            self.watchdog.fire(d.verdict, d.time if now is None else now, d.message,
                               deviation_max=d.deviation_max, deviation_norm=d.deviation_norm)
        self._advance(d)
        if d.next_mode == "following" and d.mode == "approaching":
            self.previous_action = np.zeros_like(self.previous_action)
            self.policy.reset()
        elif d.mode == "following" and d.verdict == "ok":
            self.previous_action = d.action
        self.stats.policy_times.append(d.policy_time)
        if len(self.stats.policy_times) > 4096:
            del self.stats.policy_times[:2048]
        return True

    def commit_braking(self, u: np.ndarray | None = None) -> Decision:
        """Commit the braking decision now (the planned decision came too late); ``u``, when
        given, is the braking decision already sent to the driver for this instant (the
        plan-ahead continuation), committed as sent."""
        if self.state is None:
            raise CycleError("commit_braking() before begin()")
        self.stats.overruns += 1
        d = self._braking(self.t, self.state, self.mode, math.nan, math.nan, "ok", "overrun")
        if u is not None:
            d = replace(d, u=np.array(u, float))
        d = replace(d, next_mode=self.mode if self.mode != "stopping" or not self._rest_after(d)
                    else "stopped")
        self._advance(d)
        return d

    # ------------------------------------------------------------------ internals
    def _advance(self, d: Decision) -> None:
        self.state = integrate(*d.state, d.u, self.period)
        self.t = d.time + self.period
        self.mode = d.next_mode
        self.stats.decisions += 1
        if not d.viable:
            self.stats.non_viable += 1

    def _braking(self, t: float, state: MotionState, mode: str, wstamp: float, fstamp: float,
                 verdict: str, message: str) -> Decision:
        stage = self.stage
        r = self._evaluate(stage, state)
        u = stage.braking(state, r)
        n = state.position.shape[0]
        d = Decision(t, mode, state, wstamp, fstamp, np.full(n, np.nan), r.lo, r.hi, u,
                     bool(r.viable.all()), math.nan, math.nan, verdict, message, 0.0, mode)
        if mode == "stopping" and self._rest_after(d):
            d = replace(d, next_mode="stopped")
        elif mode in ("approaching", "following") and verdict == "ok":
            d = replace(d, next_mode=mode)
        return d

    def reuse_evaluation(self, stage: LimitStage, state: MotionState, r: Admissible) -> None:
        """``r`` is ``stage.evaluate(*state)`` for the cycle's current ``state`` object,
        computed elsewhere (the plan output's braking continuation): the next decision uses
        it instead of evaluating again (only while stage and state are those objects)."""
        self._evaluated = (stage, state, r)

    def _evaluate(self, stage: LimitStage, state: MotionState) -> Admissible:
        memo = self._evaluated
        if memo is not None and memo[0] is stage and memo[1] is state:
            return memo[2]
        return stage.evaluate(*state)

    def _rest_after(self, d: Decision) -> bool:
        end = integrate(*d.state, d.u, self.period)
        c = self.config
        return bool(np.all(np.abs(end.velocity) <= c.rest_velocity)
                    and np.all(np.abs(end.acceleration) <= c.rest_acceleration))

    def _take_pending(self) -> None:
        with self._pending_lock:   # a swap from another thread is never lost or doubled
            self._take_pending_locked()

    def _take_pending_locked(self) -> None:
        p = self._pending
        if p.policy is not None:
            self.policy, p.policy = p.policy, None
            self.policy.reset()
            self.previous_action = np.zeros_like(self.previous_action)
            self.stats.policy_swaps += 1
        if p.stage is not None and self.state is not None:
            if p.stage.evaluate(*self.state).viable.all():
                self.stage, self.approach_stage = p.stage, p.approach_stage
                p.stage = p.approach_stage = None
            else:
                self.stats.limit_transitions += 1
