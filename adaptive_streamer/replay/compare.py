# SPDX-License-Identifier: Apache-2.0
"""Replayed versus recorded: decisions, setpoints, limit usage, trips and compute time.

* Decisions are matched by decision instant. Every field of the record (``core.
  decision_record`` layout, except the policy compute time) is compared; `Comparison.
  identical` counts the bit-identical ones (NaN equals NaN), ``max_difference`` is the
  largest absolute difference of any field.
* Committed accelerations ``u`` and planned positions: per-joint maximum and RMS difference.
* Setpoints: the replayed stream is sampled from the committed segments at the recorded
  setpoint times (else every stream period) with the core `CommandPlan`'s formula
  (vectorised over the ticks), and checked with
  the core `SetpointGuard` (a failure is a ``setpoint_guard`` trip the live stream would
  have had); per-joint max/RMS position difference to the recorded ``setpoints``.
* Limit usage: per joint, peak |velocity|, |acceleration| and |jerk| as fractions of the
  hardware limits, and the smallest distance to a position limit [rad].
* Trips: the replay's watchdog events; the recorded ones from the adapter's diagnostics
  (``trip``, ``trip_time``, ``trip_message``) and the records' verdicts.
* Compute time: percentiles of the replay's ``decide`` wall time and of the policy time,
  replayed and recorded.
* Task: RMS and maximum of the planned deviation from the reference (the cycle's
  ``deviation_norm``) over the following decisions.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from adaptive_streamer.core import decision_record
from adaptive_streamer.core.cycle import Decision
from adaptive_streamer.core.guard import SetpointGuard
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.stream import Segment, StreamError

from ..io.bag_io import decode
from ..io.fast_cdr import header_stamp
from ..io.messages import DIAGNOSTIC_ARRAY, WindowReader
from .run import ReplayResult

PERCENTILES = (50, 90, 99)


@dataclass
class Stream:
    """Setpoints at tick times: ``t`` (m,), ``p``, ``v``, ``a`` (m, n)."""

    t: np.ndarray
    p: np.ndarray
    v: np.ndarray
    a: np.ndarray


@dataclass
class Comparison:
    """The comparison of one replay with its recording (see the module docstring)."""

    compared: int = 0
    identical: int = 0
    max_difference: float = 0.0
    first_difference: str = ""
    u_max: list[float] = field(default_factory=list)
    u_rms: list[float] = field(default_factory=list)
    position_max: list[float] = field(default_factory=list)
    position_rms: list[float] = field(default_factory=list)
    setpoint_max: list[float] = field(default_factory=list)
    setpoint_rms: list[float] = field(default_factory=list)
    usage: dict[str, dict[str, list[float]]] = field(default_factory=dict)
    trips: dict[str, list[dict[str, Any]]] = field(default_factory=dict)
    compute_ms: dict[str, dict[str, float]] = field(default_factory=dict)
    task: dict[str, dict[str, float]] = field(default_factory=dict)

    @property
    def deterministic(self) -> bool:
        """True when every compared decision is bit-identical to its record."""
        return self.compared > 0 and self.identical == self.compared


def field_names(n: int) -> list[str]:
    """Names of the decision-record vector entries for ``n`` joints."""
    head = ["version", "joints", "time", "window_stamp", "feedback_stamp", "mode",
            "next_mode", "verdict", "viable", "policy_time", "deviation_max", "deviation_norm"]
    blocks = ["position", "velocity", "acceleration", "action", "lo", "hi", "u"]
    return head + [f"{b}[{j}]" for b in blocks for j in range(n)]


def stream_of(segments: list[Segment], period: float, ticks: np.ndarray,
              limits: JointLimits) -> tuple[Stream, list[dict[str, Any]]]:
    """Setpoints of ``segments`` at ``ticks`` and the guard's failures (at most 20).

    Each tick is sampled from the segment the live stream had committed and covering it:
    the last one starting at or before the tick (the last one up to its end), with the core
    `CommandPlan`'s constant-jerk formula, vectorised over the ticks (the same operations
    in the same order, so the same bits); the core `SetpointGuard` checks them in order.
    """
    starts = np.array([s.start for s in segments], float)
    period = float(period)
    gaps = np.abs(starts[1:] - (starts[:-1] + period)) > 1e-6 * max(1.0, period)
    if gaps.any():
        k = int(np.argmax(gaps)) + 1
        raise StreamError(f"segment starts at {starts[k]:.6f} s, expected "
                          f"{starts[k - 1] + period:.6f} s")
    n = len(limits)
    if not len(segments):
        empty = np.empty((0, n))
        return Stream(ticks[:0], empty, empty.copy(), empty.copy()), []
    keep = (ticks >= starts[0] - 1e-9) & (ticks <= starts[-1] + period + 1e-9)
    t = ticks[keep]
    k = np.maximum(np.searchsorted(starts, t, side="right") - 1, 0)
    p0, v0, a0 = (np.array([s.state[f] for s in segments], float).reshape(-1, n)[k]
                  for f in range(3))
    u = np.array([s.u for s in segments], float).reshape(-1, n)[k]
    j = (u - a0) / period
    tau = (t - starts[k])[:, None]
    p = p0 + tau * (v0 + tau * (0.5 * a0 + tau * j / 6.0))
    v = v0 + tau * (a0 + 0.5 * j * tau)
    a = a0 + j * tau
    guard = SetpointGuard(limits)
    failures = [{"kind": "setpoint_guard", "time": float(t[i]), "message": reason}
                for i, reason in guard.check_all(t, p, v, a, limit=20)]
    return Stream(t, p, v, a), failures


def recorded_stream(result: ReplayResult) -> Stream | None:
    """The recorded ``setpoints`` (None when the bag has none)."""
    bag = result.bag_data
    data = bag.get(result.topics["setpoints"]) if bag is not None else None
    if data is None:
        return None
    reader = WindowReader(result.setup.joints)
    try:
        batch = reader.first_points(data.raw)
    except ValueError:  # the first message cannot be read: read them one by one
        batch = None
    if batch is not None:
        return Stream(tick_times(batch.sec, batch.nanosec), batch.positions,
                      batch.velocities, batch.accelerations)
    rows = []
    for raw in data.raw:
        try:
            w = reader.read(raw)
            t = tick_time(*header_stamp(raw))
        except ValueError:
            continue
        rows.append((t, w.positions[0], w.velocities[0], w.accelerations[0]))
    if not rows:
        return None
    return Stream(np.array([r[0] for r in rows]), *(np.array([r[k] for r in rows])
                                                    for k in (1, 2, 3)))


def tick_times(sec: np.ndarray, nanosec: np.ndarray) -> np.ndarray:
    """`tick_time` of every stamp, vectorised where ``sec + nanosec * 1e-9`` itself
    rounds back to the stamp (the scalar search for the others)."""
    base = sec.astype(float) + nanosec.astype(float) * 1e-9
    s = np.floor(base)
    ns = np.rint((base - s) * 1e9)
    carry = ns >= 1e9
    ok = (np.where(carry, s + 1, s) == sec) & (np.where(carry, ns - 1e9, ns) == nanosec)
    for i in np.flatnonzero(~ok).tolist():
        base[i] = tick_time(int(sec[i]), int(nanosec[i]))
    return base


def tick_time(sec: int, nanosec: int) -> float:
    """The float time a stamp was made from (``io.stamps.sec_to_stamp`` rounding).

    At epoch times a float second has a resolution of about 0.24 us, so at most one float
    rounds to a given nanosecond stamp: it is found among the neighbours of
    ``sec + nanosec * 1e-9``; that value itself when none rounds back exactly.
    """
    base = sec + nanosec * 1e-9
    cand = base
    for _ in range(3):
        if _rounds_to(cand, sec, nanosec):
            return cand
        cand = float(np.nextafter(cand, math.inf))
    cand = base
    for _ in range(3):
        cand = float(np.nextafter(cand, -math.inf))
        if _rounds_to(cand, sec, nanosec):
            return cand
    return base


def _rounds_to(t: float, sec: int, nanosec: int) -> bool:
    s = math.floor(t)
    ns = int(round((t - s) * 1e9))
    if ns >= 1_000_000_000:
        s, ns = s + 1, ns - 1_000_000_000
    return s == sec and ns == nanosec


def replay_ticks(result: ReplayResult, recorded: Stream | None) -> np.ndarray:
    """Tick times for the replayed stream: recorded setpoint stamps, else every period."""
    segs = result.segments
    start, end = segs[0].start, segs[-1].start + result.setup.period
    if recorded is not None:
        t = recorded.t
        return t[(t >= start - 1e-9) & (t <= end + 1e-9)]
    rate = result.setup.rate
    return start + np.arange(int(math.floor((end - start) * rate + 1e-6)) + 1) / rate


def _usage(stream: Stream, jerks: np.ndarray, limits: JointLimits) -> dict[str, list[float]]:
    def peak(x: np.ndarray, lim: np.ndarray) -> list[float]:
        return (np.max(np.abs(x), axis=0) / lim).tolist() if len(x) else [math.nan] * len(lim)
    margin = (np.minimum(np.min(stream.p, axis=0) - limits.position_min,
                         limits.position_max - np.max(stream.p, axis=0))
              if len(stream.p) else np.full(len(limits), math.nan))
    return {"velocity": peak(stream.v, limits.velocity_max),
            "acceleration": peak(stream.a, limits.acceleration_max),
            "jerk": peak(jerks, limits.jerk_max),
            "position_margin": np.where(np.isfinite(margin), margin, math.inf).tolist()}


def _jerks(decisions: list[Decision], period: float) -> np.ndarray:
    if not decisions:
        return np.empty((0, 0))
    return np.array([(d.u - d.state.acceleration) / period for d in decisions])


def _percentiles(x: np.ndarray) -> dict[str, float]:
    x = np.asarray(x, float) * 1e3
    x = x[np.isfinite(x)]
    if not len(x):
        return {}
    out = {f"p{q}": float(np.percentile(x, q)) for q in PERCENTILES}
    out["max"] = float(np.max(x))
    return out


def task_metrics(decisions: list[Decision]) -> dict[str, float]:
    """RMS / max planned deviation from the reference over following decisions [rad]."""
    dev = np.array([d.deviation_norm for d in decisions if d.mode == "following"], float)
    dev = dev[np.isfinite(dev)]
    stops = sum(1 for d in decisions if d.mode == "stopping")
    if not len(dev):
        return {"rms_deviation": math.nan, "max_deviation": math.nan,
                "following": 0.0, "stopping": float(stops)}
    return {"rms_deviation": float(np.sqrt(np.mean(dev * dev))),
            "max_deviation": float(np.max(dev)), "following": float(len(dev)),
            "stopping": float(stops)}


def recorded_trips(result: ReplayResult) -> list[dict[str, Any]]:
    """Trips of the recorded run: adapter diagnostics, else the records' verdicts."""
    out: list[dict[str, Any]] = []
    seen: set[tuple[str, str]] = set()
    bag = result.bag_data
    if bag is not None:
        for name, data in bag.topics.items():
            if not name.endswith("/diagnostics") or data.msgtype != DIAGNOSTIC_ARRAY:
                continue
            for raw in data.raw:
                try:
                    arr = decode(raw, DIAGNOSTIC_ARRAY)
                except ValueError:
                    continue
                for st in arr.status:
                    if st.name != "adapter":
                        continue
                    kv = {v.key: v.value for v in st.values}
                    kind = kv.get("trip", "none")
                    if kind not in ("", "none") and (kind, kv.get("trip_time", "")) not in seen:
                        seen.add((kind, kv.get("trip_time", "")))
                        out.append({"kind": kind, "time": _float(kv.get("trip_time")),
                                    "message": kv.get("trip_message", "")})
    if out:
        return out
    previous = None
    for r in result.recorded:
        if r.verdict != "ok":
            out.append({"kind": r.verdict, "time": r.time, "message": ""})
        elif r.mode == "stopping" and previous in ("approaching", "following"):
            out.append({"kind": "stop", "time": r.time,
                        "message": "stop by an input check or an external request"})
        previous = r.mode
    return out


def _float(text: Any) -> float:
    try:
        return float(text)
    except (TypeError, ValueError):
        return math.nan


def compare(result: ReplayResult) -> tuple[Comparison, Stream, Stream | None]:
    """The comparison, the replayed stream and the recorded stream of ``result``."""
    setup = result.setup
    limits, period = setup.session.limits, setup.period
    c = Comparison()
    recorded = recorded_stream(result)
    ticks = replay_ticks(result, recorded)
    stream, guard_failures = stream_of(result.segments, period, ticks, limits)
    pairs = _pairs(result)
    n = len(setup.joints)
    names = field_names(n)
    if pairs:
        a = np.array([decision_record.encode(d) for d, _ in pairs])
        b = np.array([decision_record.encode(r) for _, r in pairs])
        a[:, 9] = b[:, 9] = 0.0  # policy compute time is not a result
        same = (a == b) | (np.isnan(a) & np.isnan(b))
        diff = np.where(same, 0.0, np.abs(a - b))
        diff = np.where(np.isnan(diff), np.inf, diff)
        c.compared = len(pairs)
        c.identical = int(np.sum(same.all(axis=1)))
        c.max_difference = float(np.max(diff)) if diff.size else 0.0
        bad = np.argwhere(~same)
        if len(bad):
            i, j = bad[0]
            c.first_difference = (f"t = {pairs[i][1].time:.4f} s, field {names[j]}: replay "
                                  f"{a[i, j]!r} vs recorded {b[i, j]!r}")
        du = a[:, 12 + 6 * n:12 + 7 * n] - b[:, 12 + 6 * n:12 + 7 * n]
        dp = a[:, 12:12 + n] - b[:, 12:12 + n]
        c.u_max, c.u_rms = _max_rms(du)
        c.position_max, c.position_rms = _max_rms(dp)
    if recorded is not None and len(stream.t):
        idx = np.searchsorted(recorded.t, stream.t)
        ok = (idx < len(recorded.t)) & (recorded.t[np.minimum(idx, len(recorded.t) - 1)]
                                        == stream.t)
        if ok.any():
            c.setpoint_max, c.setpoint_rms = _max_rms(stream.p[ok] - recorded.p[idx[ok]])
    c.usage["replay"] = _usage(stream, _jerks(result.decisions, period), limits)
    if recorded is not None and len(stream.t):
        span = (recorded.t >= stream.t[0]) & (recorded.t <= stream.t[-1])
        same_span = Stream(recorded.t[span], recorded.p[span], recorded.v[span],
                           recorded.a[span])
        c.usage["recorded"] = _usage(same_span, _jerks([r for _, r in pairs], period), limits)
    c.trips["replay"] = [{"kind": t.kind, "time": t.time, "message": t.message}
                         for t in result.trips] + guard_failures
    c.trips["recorded"] = recorded_trips(result)
    c.compute_ms["replay_decide"] = _percentiles(result.compute)
    c.compute_ms["replay_policy"] = _percentiles(np.array([d.policy_time
                                                           for d in result.decisions]))
    if result.recorded:
        c.compute_ms["recorded_policy"] = _percentiles(np.array([r.policy_time
                                                                 for r in result.recorded]))
    c.task["replay"] = task_metrics(result.decisions)
    if result.recorded:
        c.task["recorded"] = task_metrics(result.recorded)
    return c, stream, recorded


def _pairs(result: ReplayResult) -> list[tuple[Decision, Decision]]:
    if result.recorded and any(m >= 0 for m in result.matched):
        return [(d, result.recorded[m]) for d, m in zip(result.decisions, result.matched)
                if m >= 0]
    if not result.recorded:
        return []
    by_time = {r.time: r for r in result.recorded}
    return [(d, by_time[d.time]) for d in result.decisions if d.time in by_time]


def _max_rms(d: np.ndarray) -> tuple[list[float], list[float]]:
    d = np.where(np.isfinite(d), d, 0.0)
    return np.max(np.abs(d), axis=0).tolist(), np.sqrt(np.mean(d * d, axis=0)).tolist()
