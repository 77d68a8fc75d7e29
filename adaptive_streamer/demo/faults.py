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
=================  ==========================================  ====================
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.adapter_setup import SessionSetup
from ..core.policies import PolicyError, load_card, load_policy
from ..core.reference import ReferenceTrajectory
from ..share import demo_file
from .config import DemoError
from .fault_policies import NAN_THRESHOLD, default_gains, write_fault_card
from .options import Injection

EXPECTED_STOP = {"feedback_dropout": "feedback_stale", "reference_jump": "deviation",
                 "joint_state_stall": "joint_states_stale", "nan_policy": "policy_fault",
                 "slow_policy": "overruns"}
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


@dataclass
class InjectionRecord:
    """What the run did with a planned fault: the ROS time of the injection (NaN when it
    was not injected) and why not, or a warning."""

    planned: PlannedFault
    time: float = math.nan
    note: str = ""


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

    def text(self) -> str:
        """One line for the printed summary."""
        head = f"{self.fault} at +{self.at:g} s (expected stop: {self.expected})"
        if not self.injected:
            return f"{head}: not injected: {self.note}"
        if not self.stop:
            return f"{head}: no stop{': ' + self.note if self.note else ''}"
        verdict = "as expected" if self.as_expected else "NOT the expected stop"
        rest = (f", at rest {1e3 * self.rest_after:.0f} ms after it"
                if math.isfinite(self.rest_after) else "")
        return (f"{head}: {self.stop} stop {1e3 * self.stop_after:.0f} ms after the "
                f"injection{rest} ({verdict}){'; ' + self.note if self.note else ''}")


def plan_faults(injections: list[Injection], setup: SessionSetup, policy_card: Path,
                reference: ReferenceTrajectory, run_end: float, workdir: Path
                ) -> list[PlannedFault]:
    """Check every injection against the run (`FaultRefused` with the reason) and pick the
    fault policy cards. ``setup`` is the adapter's session as it will be configured,
    ``run_end`` the end of the pass [s after its start]."""
    if len(injections) > 1:
        raise FaultRefused(f"--inject given {len(injections)} times: the first fault's stop "
                           "ends the pass, so the demo injects one fault per run")
    return [_plan(inj, setup, policy_card, reference, run_end, workdir) for inj in injections]


def _plan(inj: Injection, setup: SessionSetup, policy_card: Path,
          reference: ReferenceTrajectory, run_end: float, workdir: Path) -> PlannedFault:
    where = f"--inject {inj.fault}@{inj.at:g}"
    if inj.at >= run_end:
        raise FaultRefused(f"{where}: the pass ends at +{run_end:.1f} s (the reference or "
                           "--duration), before the injection")
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
             sp_t: np.ndarray, sp_v: np.ndarray) -> list[FaultOutcome]:
    """What followed each injection, from the adapter's latched trip (diagnostics ``trip``,
    ``trip_time``) and the setpoints (stamps ``sp_t``, velocities ``sp_v``)."""
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
                                    False, rec.note))
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
