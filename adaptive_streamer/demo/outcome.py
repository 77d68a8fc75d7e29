# SPDX-License-Identifier: Apache-2.0
"""What a demo run ended in (ROS-free): its watchdog events, each with its reason, and the
run's verdict, which sets the demo's exit code.

The decision records (``adapter/decisions``) carry a verdict code but no text; the reason
of the latched stop is the adapter's diagnostics ``trip_message`` (the watchdog's text:
the value, the threshold, the joint). A record event the latched trip does not explain
gets a reason built from the record's own figures.

The verdict (`judge`), in this order:

* ``limit_violations``: the setpoint stream broke a limit or was inconsistent;
* ``fault_not_as_expected``: an ``--inject`` fault was not injected, or did not lead to
  its expected stop (`adaptive_streamer.demo.faults.EXPECTED_STOP`), or the followed
  motion did not do what an adapter fault expects;
* ``unexpected_stop``: the watchdog stopped the run and no injected fault accounts for it
  (no fault injected, or the stop came before the injection or is not the one expected);
* ``passed``: none of these.

Exit code 0 for ``passed``, 1 otherwise; `RunOutcome.line` says which in one line.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from enum import Enum

from ..core.cycle import Decision
from .faults import NO_STOP, FaultOutcome


@dataclass(frozen=True)
class WatchdogEvent:
    """A watchdog event of the run: its ROS time [s], trigger kind and reason."""

    time: float
    kind: str
    reason: str


def _num(text: str | None) -> float:
    try:
        return float(text) if text is not None else math.nan
    except ValueError:
        return math.nan


def _record_reason(d: Decision, deviation_limits: tuple[float, float]) -> str:
    """A reason from a decision record's own figures (the record carries no text)."""
    if d.verdict == "deviation" and math.isfinite(d.deviation_max):
        joint, norm = deviation_limits
        return (f"planned deviation from the reference {d.deviation_max:.4g} rad on the worst "
                f"joint (deviation_joint {joint:.4g} rad), norm {d.deviation_norm:.4g} rad "
                f"(deviation_norm {norm:.4g} rad)")
    return (f"{d.verdict} verdict of the decision at {d.time:.3f} s (its reason is not in the "
            "decision record, and the adapter latched no such stop)")


def watchdog_events(decisions: list[Decision], adapter_diag: dict[str, str],
                    deviation_limits: tuple[float, float]) -> list[WatchdogEvent]:
    """The run's watchdog events, oldest first: every decision record with a verdict other
    than ok, and the adapter's latched trip (diagnostics ``trip``, ``trip_time``,
    ``trip_message``), which gives its reason to the record of the same kind nearest in
    time, or is an event of its own (a stop decided outside a decision: stale inputs,
    overruns, an external stop). ``deviation_limits`` are the watchdog's
    (``deviation_joint``, ``deviation_norm``) [rad], for a record's own reason."""
    records = [d for d in decisions if d.verdict != "ok"]
    kind = adapter_diag.get("trip", "none")
    trip_time = _num(adapter_diag.get("trip_time"))
    message = adapter_diag.get("trip_message", "")
    matched = None
    if kind not in ("", "none"):
        same = [i for i, d in enumerate(records) if d.verdict == kind]
        if same:
            matched = min(same, key=lambda i: abs(records[i].time - trip_time)
                          if math.isfinite(trip_time) else 0.0)
    events = [WatchdogEvent(d.time, d.verdict,
                            message if i == matched and message
                            else _record_reason(d, deviation_limits))
              for i, d in enumerate(records)]
    if kind not in ("", "none") and matched is None:
        events.append(WatchdogEvent(trip_time, kind, message or
                                    f"{kind} (the adapter's diagnostics gave no reason)"))
    return sorted(events, key=lambda e: e.time if math.isfinite(e.time) else math.inf)


class RunVerdict(Enum):
    """How a demo run ended (see the module docstring)."""

    PASSED = "passed"
    LIMIT_VIOLATIONS = "limit_violations"
    FAULT_NOT_AS_EXPECTED = "fault_not_as_expected"
    UNEXPECTED_STOP = "unexpected_stop"


@dataclass(frozen=True)
class RunOutcome:
    """The run's verdict and the one line the summary prints for it."""

    verdict: RunVerdict
    line: str

    @property
    def exit_code(self) -> int:
        """0 when the run passed, else 1."""
        return 0 if self.verdict is RunVerdict.PASSED else 1


def _fault_problem(f: FaultOutcome) -> str:
    name = f"--inject {f.fault}" + (f":{f.length:.3g}" if math.isfinite(f.length) else "") \
        + f"@{f.at:g}"
    if not f.injected:
        return f"{name} was not injected ({f.note or 'no reason recorded'})"
    if not f.arm_ok:
        return f"{name}: the followed motion did not do what was expected" \
            + (f" ({f.note})" if f.note else "")
    seen = f.stop if f.stop and f.stop != NO_STOP else "no stop"
    return f"{name} expected stop {f.expected}, got {seen}" + (f" ({f.note})" if f.note else "")


def judge(violations: int, events: list[WatchdogEvent], trip: str, trip_time: float,
          faults: list[FaultOutcome], pass_start: float) -> RunOutcome:
    """The run's verdict from the stream's ``violations``, its watchdog ``events``
    (`watchdog_events`), the latched ``trip`` kind ("none": no stop) at ROS time
    ``trip_time``, the injected ``faults``' outcomes and the pass start [ROS time, s] (for
    the printed time: the event's of that kind, else ``trip_time``)."""
    if violations:
        return RunOutcome(RunVerdict.LIMIT_VIOLATIONS,
                          f"outcome: FAILED: {violations} limit or consistency violations in "
                          "the setpoint stream")
    wrong = [f for f in faults if not f.as_expected]
    if wrong:
        return RunOutcome(RunVerdict.FAULT_NOT_AS_EXPECTED,
                          "outcome: FAILED: " + "; ".join(_fault_problem(f) for f in wrong))
    stopped = trip not in ("", "none")
    explained = any(f.injected and f.stop == trip for f in faults)
    if stopped and not explained:
        event = next((e for e in events if e.kind == trip), None)
        when = event.time if event is not None else trip_time
        at = f" at {when - pass_start:+.2f} s from the pass start" if math.isfinite(when) else ""
        reason = event.reason if event is not None else ""
        why = "no fault was injected" if not faults else "no injected fault accounts for it"
        return RunOutcome(RunVerdict.UNEXPECTED_STOP,
                          f"outcome: FAILED: a {trip} stop{at} that was not injected ({why})"
                          + (f": {reason}" if reason else ""))
    done = f", {len(faults)} injected fault(s) as expected" if faults else ""
    return RunOutcome(RunVerdict.PASSED, f"outcome: passed (no limit violations{done}"
                      f"{'' if stopped else ', no watchdog stop'})")
