# SPDX-License-Identifier: Apache-2.0
"""Figures of a demo run, from what the monitor recorded (ROS-free)."""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..core.cycle import Decision
from ..core.limits import JointLimits
from ..sim.metrics import lateral_error
from ..sim.panel import Panel
from ..core.stream_metrics import StreamReport, check_stream, period_stats, time_resolution_of
from .faults import FaultOutcome
from .followed import FollowedCheck, FollowedMotion, check_followed, followed_motion
from .monitor import Recorded
from .outcome import RunOutcome, WatchdogEvent, watchdog_events


@dataclass
class ErrorFigures:
    """Lateral placement error over a window of the pass [mm]."""

    rms: float
    max: float
    samples: int

    @staticmethod
    def of(err_m: np.ndarray) -> "ErrorFigures":
        """Figures of an error series in metres."""
        if err_m.size == 0:
            return ErrorFigures(math.nan, math.nan, 0)
        e = np.abs(err_m) * 1e3
        return ErrorFigures(float(np.sqrt(np.mean(e * e))), float(e.max()), int(e.size))


@dataclass
class DemoSummary:
    """What the demo prints and writes."""

    policy: str
    seed: int
    adapted: ErrorFigures
    reference_only: ErrorFigures
    stream: StreamReport
    period: dict[str, float]
    decision_ms: dict[str, float]
    events: list[WatchdogEvent]
    notes: list[str] = field(default_factory=list)
    adapter_diag: dict[str, str] = field(default_factory=dict)
    pass_window: tuple[float, float] = (math.nan, math.nan)
    faults: list[FaultOutcome] = field(default_factory=list)
    followed: FollowedCheck | None = None
    outcome: RunOutcome | None = None

    @property
    def improvement(self) -> float:
        """Adapted RMS over reference-only RMS (lower is better)."""
        return self.adapted.rms / self.reference_only.rms if self.reference_only.rms else math.nan


@dataclass
class Series:
    """The recorded data as arrays."""

    sp_arrival: np.ndarray
    sp_t: np.ndarray
    sp_p: np.ndarray
    sp_v: np.ndarray
    sp_a: np.ndarray
    js_t: np.ndarray
    js_q: np.ndarray
    decisions: list[Decision]
    followed: FollowedMotion

    @staticmethod
    def of(data: Recorded, n: int) -> "Series":
        """Arrays from the monitor's lists (sorted by stamp)."""
        sp = sorted(data.setpoints, key=lambda s: s[1])
        js = sorted(data.joint_states, key=lambda s: s[0])

        def arr(rows: list, k: int) -> np.ndarray:
            return np.array([r[k] for r in rows], float).reshape(len(rows), -1) if rows \
                else np.zeros((0, n))
        return Series(np.array([s[0] for s in sp]), np.array([s[1] for s in sp]),
                      arr(sp, 2), arr(sp, 3), arr(sp, 4),
                      np.array([j[0] for j in js]), arr(js, 1), list(data.decisions),
                      _followed(data.followed, n))


def _followed(rows: list[tuple[int, list, list, list]], n: int) -> FollowedMotion:
    """The followed motion from the monitor's rows (one per driver tick, in stamp order;
    a repeated stamp is kept once). Ticks without velocities and accelerations among ticks
    with them (the plan output before its first plan) get NaN there."""
    by_stamp = {r[0]: r for r in sorted(rows, key=lambda r: r[0])}
    rows = list(by_stamp.values())
    t = np.array([r[0] for r in rows], dtype=np.int64)
    p = np.array([r[1] for r in rows], float).reshape(len(rows), n)
    if not any(r[2] for r in rows):
        return followed_motion(t, p, None, None)
    nan = [math.nan] * n
    v = np.array([r[2] or nan for r in rows], float)
    a = np.array([r[3] or nan for r in rows], float)
    return followed_motion(t, p, v, a)


def summarise(series: Series, limits: JointLimits, panel: Panel, rate: float,
              pass_window: tuple[float, float],
              reference_only: tuple[np.ndarray, np.ndarray], policy: str, seed: int,
              adapter_diag: dict[str, str], deviation_limits: tuple[float, float],
              notes: list[str], faults: list[FaultOutcome] | None = None) -> DemoSummary:
    """The demo's figures. The adapted lateral error is that of the measured joint_states
    stamped within ``pass_window`` (ROS times [s]); the reference-only one, given as (times
    from the pass start [s], errors [m]) of the pass without adaptation, is cut here to the
    same window, so both figures cover the same part of the pass (an early stop or
    ``--duration`` included). ``deviation_limits``: the watchdog's (``deviation_joint``,
    ``deviation_norm``) [rad], for the events' reasons (`watchdog_events`)."""
    t0, t1 = pass_window
    in_pass = (series.js_t >= t0) & (series.js_t <= t1)
    adapted = ErrorFigures.of(lateral_error(series.js_q[in_pass], panel)) if in_pass.any() \
        else ErrorFigures.of(np.zeros(0))
    t_ref, e_ref = reference_only
    ref_in = (t_ref >= 0.0) & (t_ref <= t1 - t0)
    # the plan's segment boundaries lie on float64 absolute ROS times: allow their spacing
    stream = check_stream(series.sp_t, series.sp_p, series.sp_v, series.sp_a, limits, rate,
                          time_resolution=time_resolution_of(series.sp_t))
    pt = np.array([d.policy_time for d in series.decisions if d.mode == "following"]) * 1e3
    decision_ms = {"policy_p50": _pct(pt, 50), "policy_p99": _pct(pt, 99),
                   "cycle_p50": _num(adapter_diag.get("decision_ms_p50")),
                   "cycle_p99": _num(adapter_diag.get("decision_ms_p99"))}
    events = watchdog_events(series.decisions, adapter_diag, deviation_limits)
    followed = check_followed(series.followed, limits) if series.followed.ticks else None
    return DemoSummary(policy, seed, adapted, ErrorFigures.of(e_ref[ref_in]), stream,
                       period_stats(series.sp_arrival, rate), decision_ms, events, notes,
                       adapter_diag, pass_window, list(faults or []), followed)


def _pct(x: np.ndarray, q: float) -> float:
    return float(np.percentile(x, q)) if x.size else math.nan


def _num(text: str | None) -> float:
    try:
        return float(text) if text is not None else math.nan
    except ValueError:
        return math.nan


def format_summary(s: DemoSummary, limits: JointLimits) -> str:
    """The plain-text summary printed at the end of the demo."""
    lines = [f"policy: {s.policy}   seed: {s.seed}"]
    t0, t1 = s.pass_window
    lines.append(f"lateral placement error over +0.0 to +{t1 - t0:.1f} s of the pass  "
                 f"adapted: RMS {s.adapted.rms:.2f} mm, max "
                 f"{s.adapted.max:.2f} mm   reference only: RMS {s.reference_only.rms:.2f} mm, "
                 f"max {s.reference_only.max:.2f} mm   (adapted/reference-only RMS "
                 f"{s.improvement:.2f})")
    st = s.stream
    lines.append(f"setpoints checked: {st.samples} over {st.duration:.1f} s, limit or "
                 f"consistency violations: {st.total_violations}, skipped ticks: "
                 f"{st.skipped_ticks}")
    lines.append("limit usage (peak % of limit):")
    lines.append("  joint     " + "".join(f"{n:>8s}" for n in limits.names))
    for label, arr in (("|v|", st.peak_velocity), ("|a|", st.peak_acceleration),
                       ("|j|", st.peak_jerk)):
        if arr is not None:
            lines.append(f"  {label:8s}  " + "".join(f"{100 * x:7.1f}%" for x in arr))
    lines.extend(_followed_lines(s.followed, limits))
    d = s.decision_ms
    lines.append(f"decision compute: policy p50 {d['policy_p50']:.3f} ms, p99 "
                 f"{d['policy_p99']:.3f} ms; whole cycle p50 {d['cycle_p50']:.3f} ms, p99 "
                 f"{d['cycle_p99']:.3f} ms")
    ad = s.adapter_diag
    lines.append(f"stream: adapter skipped ticks {ad.get('skipped_ticks', '?')}, late decisions "
                 f"{ad.get('late_decisions', '?')}, tick wake-up lateness p50 "
                 f"{_num(ad.get('tick_late_ms_p50')):.3f} ms, p99 "
                 f"{_num(ad.get('tick_late_ms_p99')):.3f} ms; period error as received by the "
                 f"monitor: p50 {s.period['p50_ms']:.3f} ms, p99 {s.period['p99_ms']:.3f} ms")
    if s.events:
        lines.append("watchdog events:")
        for e in s.events:
            lines.append(f"  {e.kind} at {e.time - s.pass_window[0]:+.2f} s from the pass "
                         f"start: {e.reason}")
    else:
        lines.append("watchdog events: none")
    if s.faults:
        lines.append("faults injected:")
        lines.extend(f"  {f.text()}" for f in s.faults)
    for note in s.notes:
        lines.append(f"note: {note}")
    if s.outcome is not None:
        lines.append(s.outcome.line)
    return "\n".join(lines)


FOLLOWED_HOW = {"messages": "v, a from its messages, jerk = change of a between ticks",
                "differences": "v, a, jerk by finite differences of its positions at the "
                               "tick stamps"}


def _followed_lines(f: FollowedCheck | None, limits: JointLimits) -> list[str]:
    """The followed-motion block: what the simulated driver actually followed (noise-free),
    checked against the limits; not counted in the stream's violations."""
    if f is None:
        return ["followed motion (simulated driver, noise-free): none recorded"]
    over = ", ".join(f"{k} {v}" for k, v in f.over.items() if v)
    lines = [f"followed motion (what the simulated driver actually followed, noise-free; "
             f"{FOLLOWED_HOW[f.source]}): {f.ticks} ticks over {f.duration:.1f} s, ticks over "
             f"a limit: {f.ticks_over}{' (' + over + ')' if over else ''}",
             "  joint     " + "".join(f"{n:>8s}" for n in limits.names)]
    for label, arr in (("|v|", f.peak_velocity), ("|a|", f.peak_acceleration),
                       ("|j|", f.peak_jerk)):
        lines.append(f"  {label:8s}  " + "".join(_pct_cell(x) for x in arr))
    return lines


def _pct_cell(x: float) -> str:
    if not math.isfinite(x):
        return f"{'-':>8s}"
    return f"{100 * x:7.1f}%" if x < 100 else f"{100 * x:7.0e}%"
