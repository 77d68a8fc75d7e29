# SPDX-License-Identifier: Apache-2.0
"""What the adapter reports about its session on ``/diagnostics``: timing percentiles,
counts, the trip, and the overall level with its message."""
from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from enum import Enum
from typing import Any, Iterable

import numpy as np

from .session import StreamingSession


class StatusLevel(Enum):
    """Overall level of the adapter's status."""

    OK = "ok"
    WARN = "warn"
    ERROR = "error"


@dataclass(frozen=True)
class StatusSummary:
    """Level and one-line message of the adapter's status."""

    level: StatusLevel
    message: str


class CycleTimings:
    """Recent stream wake-up lateness and decision times (bounded windows) [s]."""

    def __init__(self, keep: int = 2000) -> None:
        self.lateness: deque[float] = deque(maxlen=keep)   # tick wake-up minus nominal
        self.decision: deque[float] = deque(maxlen=keep)   # one decide() call

    def percentiles_ms(self) -> list[tuple[str, float]]:
        """Tick lateness p50/p99 and decision time p50/p99 [ms] (NaN without samples)."""
        return [("tick_late_ms_p50", _pct_ms(self.lateness, 50)),
                ("tick_late_ms_p99", _pct_ms(self.lateness, 99)),
                ("decision_ms_p50", _pct_ms(self.decision, 50, last=500)),
                ("decision_ms_p99", _pct_ms(self.decision, 99, last=500))]


def _pct_ms(values: Iterable[float], q: float, last: int | None = None) -> float:
    """Percentile ``q`` of the values (the ``last`` ones only, when given) in ms."""
    x = np.fromiter(values, float)
    if last is not None:
        x = x[-last:]
    return float(np.percentile(x, q)) * 1e3 if x.size else math.nan


def session_values(session: StreamingSession, timings: CycleTimings,
                   skipped_ticks: int) -> list[tuple[str, Any]]:
    """The session's figures as (key, value) pairs for diagnostics."""
    stats = session.cycle.stats
    trip = session.watchdog.trip
    vals: list[tuple[str, Any]] = [
        ("mode", session.mode), ("limit_scale", session.limit_scale),
        ("decisions", stats.decisions), ("late_decisions", session.late_decisions),
        ("skipped_ticks", skipped_ticks), ("stream_retimes", session.retimes),
        ("stream_lag", session.stream_lag), *timings.percentiles_ms(),
        ("policy_ms_p50", _pct_ms(stats.policy_times, 50, last=500)),
        ("policy_swaps", stats.policy_swaps), ("non_viable_states", stats.non_viable),
        ("limit_transitions", stats.limit_transitions),
        ("trip", "none" if trip is None else trip.kind),
        ("trip_message", "" if trip is None else trip.message),
        ("trip_time", math.nan if trip is None else trip.time)]
    vals += [("watchdog_events", session.watchdog.total_events),
             ("joint_states_clock_offset", session.driver_clock.estimate),
             ("following_unchecked", session.following_unchecked)]
    vals += [(f"count.{k}", v) for k, v in session.watchdog.counts.items() if v]
    if session.shadow_policy is not None:
        st = session.shadow_stats
        vals += [("shadow.decisions", st.decisions), ("shadow.rms_du", st.rms_du),
                 ("shadow.max_abs_du", st.max_abs_du), ("shadow.restarts", st.stopped)]
    return vals


def session_summary(session: StreamingSession, guard_failures: int) -> StatusSummary | None:
    """The status level and message while no trip is latched (None: leave it as it is;
    a trip's own ERROR status is set when it fires)."""
    if session.watchdog.trip is not None:
        return None
    if guard_failures or session.late_decisions:
        return StatusSummary(StatusLevel.WARN, f"{session.mode}; guard failures "
                             f"{guard_failures}, late decisions {session.late_decisions}")
    if session.mode in ("approaching", "following"):
        return StatusSummary(StatusLevel.OK, f"active: {session.mode}")
    if session.mode == "stopped":
        return StatusSummary(StatusLevel.OK, "stopped (at rest)")
    return None
