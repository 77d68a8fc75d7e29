# SPDX-License-Identifier: Apache-2.0
"""Fault injection in the demo: each requested fault is checked against the run before the
pass and refused, with the reason, when it could not lead to its stop; the fault policy
cards are the shipped ones when they fit the run, else built for the run; after the run,
what followed each injection (ROS-free).

Faults, how they are injected and the watchdog stop each is expected to cause
(`EXPECTED_STOP`; trigger kinds of `adaptive_streamer.core.watchdog`):

=================  ==========================================  ====================
fault              injection                                   expected stop
=================  ==========================================  ====================
feedback_dropout   edge_sensor ``dropout`` parameter true      feedback_stale
reference_jump     every reference window from then on with    deviation
                   one joint moved by `JUMP_OFFSET` (the demo
                   relays the server's windows for this fault)
joint_state_stall  sim_driver ``stall`` parameter true         joint_states_stale
nan_policy         adapter ``policy`` := a NaN-when-moving     policy_fault
                   card (`fault_policies`)
slow_policy        adapter ``policy`` := a slow card           overruns
adapter_stall:S    the adapter's process suspended (SIGSTOP)   see below
                   for S seconds, then resumed (SIGCONT)
adapter_crash      the adapter's process killed (SIGKILL)      none (see below)
=================  ==========================================  ====================

The adapter's own faults have no trigger of their own: what to expect follows from the
session's rules and the output (`ADAPTER_FAULTS`, judged on the motion the simulated driver
followed, `adaptive_streamer.demo.followed`):

* ``adapter_crash``: nothing is left to stop, so no stop is expected. With the plan output
  the driver follows the last plan, whose tail brakes to rest: the followed motion must stay
  within every limit and end at rest. With the stream output the driver holds on its command
  timeout: the followed motion must come to rest; its jerk on the hold is reported, not
  judged (it is the driver's, not the adapter's).
* ``adapter_stall:S``: a decision is late when the stall spans its deadline (its instant
  less ``plan_lead`` with the plan output; its instant with the stream output). A stall of S
  seconds makes ``floor((S + lead) / T) - 1`` to ``floor((S + lead + STALL_SLACK) / T)``
  decisions late (`late_decisions`; the phase decides; T the decision period; the slack
  for when the adapter computes a decision and how exactly the stall is made), and the
  watchdog latches an ``overruns`` stop at ``max_overruns`` late decisions: expected is
  ``overruns`` when even the fewest reach it, no stop when even the most stay below, either
  in between. With the plan output the driver moves on through a stall shorter than the
  committed segment and brakes along the sent tail through a longer one: the followed
  motion must stay within every limit (and be at rest at the end after an ``overruns``
  stop). With the stream output the driver holds on its command timeout when the stall is
  longer: the followed motion must come to rest; its jerk is reported, not judged. On
  resuming, the adapter streams from where its committed plan braked to, not from where the
  driver holds: the followed position steps there in one driver tick (the peak speed after
  the injection shows it).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.adapter_setup import SessionSetup
from ..core.limits import JointLimits
from ..core.policies import PolicyError, load_card, load_policy
from ..core.reference import ReferenceTrajectory
from ..share import demo_file
from .config import DemoError
from .fault_policies import NAN_THRESHOLD, default_gains, write_fault_card
from .followed import FollowedAfter, FollowedMotion, after_injection
from .options import Injection

EXPECTED_STOP = {"feedback_dropout": "feedback_stale", "reference_jump": "deviation",
                 "joint_state_stall": "joint_states_stale", "nan_policy": "policy_fault",
                 "slow_policy": "overruns"}
ADAPTER_FAULTS = ("adapter_stall", "adapter_crash")
NO_STOP = "none"
# what the followed motion must do after an adapter fault (the judged property)
ARM_EXPECTATIONS = {
    "rest_within_limits": "the followed motion within every limit and at rest at the end",
    "within_limits": "the followed motion within every limit",
    "driver_hold": "the driver holds on its command timeout (followed jerk shown, not judged)",
    "not_judged": "the followed motion is shown, not judged",
}
# the adapter computes a decision a few ms after the segment before it starts, and the
# stall is made some ms longer than asked (the signalling process's start-up; 7-52 ms
# measured on 2 cores, the most under heavy load): the most late decisions allow this much
# more [s]
STALL_SLACK = 0.06
SHIPPED_CARDS = {"nan_policy": "faults/nan_policy.yaml", "slow_policy": "faults/slow_policy.yaml"}
JUMP_JOINT = 1          # index of the joint the reference jump moves
JUMP_OFFSET = 0.2       # rad
REST_VELOCITY = 1e-4    # rad/s on every joint: at rest


class FaultRefused(DemoError):
    """A requested injection cannot lead to its stop in this run (the message says why)."""


@dataclass(frozen=True)
class PlannedFault:
    """An injection checked against the run: what, when (s after the pass start), the stop
    expected, the fault policy card if any, and how the card was chosen."""

    fault: str
    at: float
    expected: str
    card: Path | None = None
    note: str = ""
    length: float = math.nan                 # adapter_stall: how long [s]
    accepted: tuple[str, ...] = ()           # the stops judged as expected (empty: expected)
    arm: str = ""                            # key of ARM_EXPECTATIONS ("": a watchdog fault)

    def accepts(self, stop: str) -> bool:
        """Whether ``stop`` (a watchdog kind, `NO_STOP` for none) is an expected one."""
        return stop in (self.accepted or (self.expected,))


@dataclass
class InjectionRecord:
    """What the run did with a planned fault: the ROS time of the injection (NaN when it
    was not injected) and why not, or a warning; for a stall the ROS time it ended."""

    planned: PlannedFault
    time: float = math.nan
    note: str = ""
    ended: float = math.nan


@dataclass(frozen=True)
class FaultOutcome:
    """What followed one injection (times in seconds after the injection)."""

    fault: str
    at: float                 # requested, s after the pass start
    expected: str
    injected: bool
    stop: str                 # the watchdog kind that stopped the run, "" for none
    stop_after: float         # injection -> the latched trip
    rest_after: float         # injection -> the first setpoint at rest after the trip
    as_expected: bool
    note: str = ""
    length: float = math.nan  # adapter_stall: the stall as made [s] (SIGSTOP to SIGCONT)
    arm: str = ""             # key of ARM_EXPECTATIONS ("": a watchdog fault)
    arm_ok: bool = True       # the followed motion did what `arm` says
    followed: FollowedAfter | None = None

    def text(self) -> str:
        """One line for the printed summary (and, for an adapter fault, one on the
        followed motion)."""
        name = self.fault + (f":{self.length:.3g}" if math.isfinite(self.length) else "")
        head = f"{name} at +{self.at:g} s (expected stop: {self.expected})"
        if not self.injected:
            return f"{head}: not injected: {self.note}"
        note = f"; {self.note}" if self.note else ""
        if self.arm:
            return f"{head}: {self._adapter_fault_text()}{note}"
        if not self.stop:
            return f"{head}: no stop{': ' + self.note if self.note else ''}"
        verdict = "as expected" if self.as_expected else "NOT the expected stop"
        rest = (f", at rest {1e3 * self.rest_after:.0f} ms after it"
                if math.isfinite(self.rest_after) else "")
        return (f"{head}: {self.stop} stop {1e3 * self.stop_after:.0f} ms after the "
                f"injection{rest} ({verdict}){note}")

    def _adapter_fault_text(self) -> str:
        stop = (f"{self.stop} stop {1e3 * self.stop_after:.0f} ms after the injection"
                if self.stop and self.stop != NO_STOP else "no adapter stop")
        verdict = "as expected" if self.as_expected else (
            "NOT the expected stop" if self.arm_ok else "NOT as expected: "
            + ARM_EXPECTATIONS[self.arm])
        f = self.followed
        if f is None:
            return f"{stop}; no followed motion recorded ({verdict})"
        rest = (f"at rest {1e3 * f.rest_after:.0f} ms after the injection"
                if math.isfinite(f.rest_after) else "not at rest at the end")
        if math.isfinite(f.first_rest_after) and f.first_rest_after < f.rest_after - 1e-9:
            rest += f" (first at rest after {1e3 * f.first_rest_after:.0f} ms)"
        resume = (f", {100 * f.speed_at_resume:.1f}% at the stall's end"
                  if math.isfinite(f.speed_at_resume) else "")
        return (f"{stop}; followed motion: {rest}, peak jerk {100 * f.peak_jerk:.0f}% of the "
                f"limit ({f.peak_jerk_joint}), peak speed {100 * f.peak_speed:.1f}% of the "
                f"velocity limit, {f.ticks_over} ticks over a limit, speed "
                f"{100 * f.speed_at_injection:.1f}% at the injection{resume} ({verdict})")


def plan_faults(injections: list[Injection], setup: SessionSetup, policy_card: Path,
                reference: ReferenceTrajectory, run_end: float, workdir: Path,
                command_timeout: float) -> list[PlannedFault]:
    """Check every injection against the run (`FaultRefused` with the reason) and pick the
    fault policy cards. ``setup`` is the adapter's session as it will be configured,
    ``run_end`` the end of the pass [s after its start], ``command_timeout`` the simulated
    driver's [s]."""
    if len(injections) > 1:
        raise FaultRefused(f"--inject given {len(injections)} times: the first fault's stop "
                           "ends the pass, so the demo injects one fault per run")
    return [_plan(inj, setup, policy_card, reference, run_end, workdir, command_timeout)
            for inj in injections]


def _plan(inj: Injection, setup: SessionSetup, policy_card: Path,
          reference: ReferenceTrajectory, run_end: float, workdir: Path,
          command_timeout: float) -> PlannedFault:
    where = f"--inject {inj.fault}@{inj.at:g}"
    if inj.at >= run_end:
        raise FaultRefused(f"{where}: the pass ends at +{run_end:.1f} s (the reference or "
                           "--duration), before the injection")
    if inj.fault in ADAPTER_FAULTS:
        return _adapter_fault(inj, setup, run_end, command_timeout)
    expected = EXPECTED_STOP[inj.fault]
    session = setup.session
    if inj.fault == "feedback_dropout" and not session.cycle.policy.needs_feedback:
        raise FaultRefused(f"{where}: the policy ({setup.policy_label}) reads no feedback, so "
                           "a feedback dropout cannot stop it (choose --policy onnx or "
                           "linear_feedback)")
    if inj.fault == "reference_jump":
        limit = session.watchdog.config.deviation_joint
        if len(setup.joints) <= JUMP_JOINT:
            raise FaultRefused(f"{where}: the jump moves joint {JUMP_JOINT + 1}, the run has "
                               f"{len(setup.joints)}")
        if JUMP_OFFSET <= limit:
            raise FaultRefused(f"{where}: the {JUMP_OFFSET:g} rad jump is within "
                               f"watchdog.deviation_joint {limit:g} rad, so it cannot stop")
    if inj.fault not in SHIPPED_CARDS:
        return PlannedFault(inj.fault, inj.at, expected)
    if not _moves(reference, setup, inj.at, run_end):
        raise FaultRefused(f"{where}: the reference stands still from +{inj.at:g} s to the "
                           f"end of the pass (+{run_end:.1f} s), and the fault policy only "
                           "misbehaves while the reference moves")
    card, note = _fault_card(inj.fault, setup, policy_card, workdir)
    return PlannedFault(inj.fault, inj.at, expected, card, note)


def late_decisions(stall: float, period: float, lead: float, slack: float = 0.0
                   ) -> tuple[int, int]:
    """The fewest and the most decisions a stall of ``stall`` seconds makes late (see the
    module docstring). Decision k (instant t_k) is computed ``e`` after t_k - ``period``
    and is due at t_k - ``lead``; it is late when the stall spans its computation and ends
    after it was due: t_k in [s0 + period - e, s0 + stall + o + lead) for a stall from s0
    that lasts ``o`` longer than asked. That interval holds floor(L / period) or one more
    instants, L = stall + o + lead - period + e, whatever s0; ``slack`` bounds e + o."""
    def instants(length: float) -> int:
        return max(math.floor(length / period + 1e-9), 0)
    return max(instants(stall + lead) - 1, 0), instants(stall + lead + slack)


def _adapter_fault(inj: Injection, setup: SessionSetup, run_end: float,
                   command_timeout: float) -> PlannedFault:
    """What to expect from an adapter fault in this run (see the module docstring)."""
    plan = setup.session.plan_lead is not None
    if inj.fault == "adapter_crash":
        arm = "rest_within_limits" if plan else "driver_hold"
        return PlannedFault(inj.fault, inj.at, NO_STOP, arm=arm, note=(
            "the driver follows the last plan's braking tail to rest" if plan else
            f"the driver holds on its command timeout ({command_timeout:g} s)"))
    where = f"--inject {inj.fault}:{inj.length:g}@{inj.at:g}"
    if inj.at + inj.length >= run_end:
        raise FaultRefused(f"{where}: the stall would last until +{inj.at + inj.length:g} s, "
                           f"past the end of the pass at +{run_end:.1f} s (the reference or "
                           "--duration)")
    lead = setup.session.plan_lead or 0.0
    fewest, most = late_decisions(inj.length, setup.period, lead, STALL_SLACK)
    limit = setup.session.watchdog.config.max_overruns
    if fewest >= limit:
        expected, accepted = "overruns", ("overruns",)
    elif most < limit:
        expected, accepted = NO_STOP, (NO_STOP,)
    else:
        expected, accepted = f"overruns or {NO_STOP}", ("overruns", NO_STOP)
    late = f"{fewest}" if fewest == most else f"{fewest}-{most}"
    note = (f"the stall makes {late} decisions late (period {setup.period:g} s"
            f"{f', plan_lead {lead:g} s' if plan else ''}; max_overruns {limit})")
    if plan:
        arm = "rest_within_limits" if accepted == ("overruns",) else "within_limits"
        note += ("; the driver moves on along the sent plan" if most == 0 else
                 "; the driver brakes along the sent tail while the adapter is suspended")
    elif inj.length > command_timeout:
        arm = "driver_hold"
        note += f"; the driver holds on its command timeout ({command_timeout:g} s)"
    else:
        arm = "not_judged"
        note += f"; shorter than the driver's command timeout ({command_timeout:g} s)"
    return PlannedFault(inj.fault, inj.at, expected, note=note, length=inj.length,
                        accepted=accepted, arm=arm)


def _moves(reference: ReferenceTrajectory, setup: SessionSetup, t0: float, t1: float) -> bool:
    """Whether the reference moves (as the fault policies see it) somewhere in [t0, t1)."""
    t = np.arange(t0, min(t1, reference.duration), 0.5 * setup.period)
    if t.size == 0:
        return False
    v = np.abs(np.atleast_2d(reference.evaluate(t, 1))) / setup.running.limits.velocity_max
    return bool((v > NAN_THRESHOLD).any())


def _fault_card(fault: str, setup: SessionSetup, policy_card: Path,
                workdir: Path) -> tuple[Path, str]:
    """The shipped card when it loads for the run, else one built for it in ``workdir``."""
    shipped = demo_file(SHIPPED_CARDS[fault])
    try:
        load_policy(shipped, setup.running)
        return shipped, ""
    except PolicyError as exc:
        why = str(exc)
    try:
        gains = load_card(policy_card).gains if policy_card.is_file() else None
    except PolicyError:
        gains = None
    card = write_fault_card(fault, setup.running, gains or default_gains(setup.running),
                            workdir / "faults")
    try:
        load_policy(card, setup.running)
    except PolicyError as exc:
        raise FaultRefused(f"--inject {fault}: no fault policy fits this run: the shipped "
                           f"card: {why}; the one built for the run: {exc}") from None
    return card, ("fault policy built for this run (a tracker made faulty; the shipped card "
                  f"does not fit: {why})")


def outcomes(records: list[InjectionRecord], adapter_status: dict[str, str],
             sp_t: np.ndarray, sp_v: np.ndarray, followed: FollowedMotion,
             limits: JointLimits) -> list[FaultOutcome]:
    """What followed each injection, from the adapter's latched trip (diagnostics ``trip``,
    ``trip_time``), the setpoints (stamps ``sp_t``, velocities ``sp_v``) and, for the
    adapter's own faults, the motion the simulated driver followed."""
    kind = adapter_status.get("trip", "none")
    try:
        trip_time = float(adapter_status.get("trip_time", "nan"))
    except ValueError:
        trip_time = math.nan
    out = []
    for rec in records:
        p = rec.planned
        if not math.isfinite(rec.time):
            out.append(FaultOutcome(p.fault, p.at, p.expected, False, "", math.nan, math.nan,
                                    False, rec.note, p.length, p.arm, False))
            continue
        if p.arm:
            out.append(_adapter_outcome(rec, kind, trip_time, followed, limits))
            continue
        if kind == "none" or not math.isfinite(trip_time):
            out.append(FaultOutcome(p.fault, p.at, p.expected, True, "", math.nan, math.nan,
                                    False, rec.note or "no watchdog stop before the run ended"))
            continue
        if trip_time < rec.time:
            out.append(FaultOutcome(p.fault, p.at, p.expected, True, kind,
                                    trip_time - rec.time, math.nan, False,
                                    "the adapter had stopped before the injection"))
            continue
        rest = np.flatnonzero((sp_t >= trip_time) & (np.abs(sp_v) < REST_VELOCITY).all(axis=1)) \
            if sp_t.size else np.zeros(0, int)
        rest_after = float(sp_t[rest[0]] - rec.time) if rest.size else math.nan
        out.append(FaultOutcome(p.fault, p.at, p.expected, True, kind, trip_time - rec.time,
                                rest_after, kind == p.expected, rec.note))
    return out


def _adapter_outcome(rec: InjectionRecord, kind: str, trip_time: float,
                     followed: FollowedMotion, limits: JointLimits) -> FaultOutcome:
    """An adapter fault judged: the stop among the accepted ones, and the followed motion
    as `ARM_EXPECTATIONS` says."""
    p = rec.planned
    length = rec.ended - rec.time if math.isfinite(rec.ended) else math.nan
    if followed.ticks == 0:
        return FaultOutcome(p.fault, p.at, p.expected, True, "", math.nan, math.nan, False,
                            rec.note or "no followed motion was recorded", length, p.arm, False)
    after = after_injection(followed, limits, rec.time, rec.ended)
    tripped = kind != "none" and math.isfinite(trip_time)
    stop = kind if tripped else NO_STOP
    note = rec.note
    stop_ok = p.accepts(stop)
    if tripped and trip_time < rec.time:
        stop_ok = False
        note = note or "the adapter had stopped before the injection"
    arm_ok = {"rest_within_limits": after.ticks_over == 0 and math.isfinite(after.rest_after),
              "within_limits": after.ticks_over == 0,
              "driver_hold": math.isfinite(after.rest_after),
              "not_judged": True}[p.arm]
    return FaultOutcome(p.fault, p.at, p.expected, True, stop,
                        trip_time - rec.time if tripped else math.nan, after.rest_after,
                        stop_ok and arm_ok, note, length, p.arm, arm_ok, after)
