# SPDX-License-Identifier: Apache-2.0
"""Checks and figures for a received setpoint stream (samples at their nominal stamps).

Independent of how the stream was produced: given the samples (time, position, velocity,
acceleration per joint), it finds limit violations, inconsistent samples, skipped ticks and
the peak limit usage. Jerk comes from finite differences of the accelerations.

Consistency between consecutive samples uses the constant-jerk identities (exact within one
constant-jerk segment; Biagiotti & Melchiorri, Springer 2008, ch. 3, from memory)::

    v1 - v0 = (a0 + a1) dt / 2
    p1 - p0 = (v0 + v1) dt / 2 - (a1 - a0) dt^2 / 12

Across a segment boundary the jerk changes inside the interval; the residuals are then
bounded by ``J dt^2 / 2`` (velocity) and ``J dt^3 / 6`` (position), used as the allowance.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .limits import JointLimits

REL_TOL = 1e-6


@dataclass
class StreamReport:
    """What `check_stream` found (per-joint arrays have the joints' order)."""

    samples: int
    duration: float
    skipped_ticks: int
    violations: dict[str, int] = field(default_factory=dict)
    worst: dict[str, float] = field(default_factory=dict)   # worst normalised excess (>1 = over)
    peak_velocity: np.ndarray | None = None                 # |v| max / velocity_max
    peak_acceleration: np.ndarray | None = None             # |a| max / acceleration_max
    peak_jerk: np.ndarray | None = None                     # |da/dt| max / jerk_max

    @property
    def total_violations(self) -> int:
        """Sum over every kind."""
        return sum(self.violations.values())


def check_stream(t: np.ndarray, p: np.ndarray, v: np.ndarray, a: np.ndarray,
                 limits: JointLimits, rate: float, time_resolution: float = 0.0) -> StreamReport:
    """Check samples ``t`` (N,) and ``p, v, a`` (N, n) against ``limits``.

    ``time_resolution`` [s]: how precisely each sample's time is known; the jerk check
    allows the acceleration steps over ``dt + 2 time_resolution``. Pass the float64 spacing
    of the absolute stamps (``np.spacing(stamp)``, 2.4e-7 s at today's epoch) for a stream
    sampled at absolute ROS times: its segment boundaries lie on such floats.
    """
    t, p, v, a = (np.asarray(x, float) for x in (t, p, v, a))
    n = len(limits)
    if p.ndim != 2 or p.shape[1] != n or not (p.shape == v.shape == a.shape) or t.shape[0] != p.shape[0]:
        raise ValueError(f"stream arrays must be (N, {n}) with N times; got t {t.shape}, "
                         f"p {p.shape}, v {v.shape}, a {a.shape}")
    N = t.shape[0]
    V, A, J = limits.velocity_max, limits.acceleration_max, limits.jerk_max
    rep = StreamReport(samples=N, duration=float(t[-1] - t[0]) if N else 0.0, skipped_ticks=0)
    if N == 0:
        return rep
    ratios = {
        "position_below_min": (limits.position_min - p) / np.maximum(np.abs(limits.position_min), 1.0),
        "position_above_max": (p - limits.position_max) / np.maximum(np.abs(limits.position_max), 1.0),
        "velocity": np.abs(v) / V - 1.0,
        "acceleration": np.abs(a) / A - 1.0,
    }
    not_finite = ~(np.isfinite(p) & np.isfinite(v) & np.isfinite(a))
    rep.violations["not_finite"] = int(not_finite.any(axis=1).sum())
    for kind, r in ratios.items():
        r = np.where(np.isfinite(r), r, -np.inf)
        rep.violations[kind] = int((r > REL_TOL).any(axis=1).sum())
        rep.worst[kind] = float(np.max(r)) + 1.0 if kind in ("velocity", "acceleration") else float(np.max(r))
    rep.peak_velocity = np.nanmax(np.abs(v), axis=0) / V
    rep.peak_acceleration = np.nanmax(np.abs(a), axis=0) / A
    if N > 1:
        dt = np.diff(t)[:, None]
        if np.any(dt <= 0):
            rep.violations["time_not_increasing"] = int((dt <= 0).sum())
            dt = np.where(dt > 0, dt, np.nan)
        period = 1.0 / rate
        rep.skipped_ticks = int(np.sum(np.maximum(np.round(dt[:, 0] / period) - 1, 0)))
        jerk = np.diff(a, axis=0) / dt
        rep.peak_jerk = np.nanmax(np.abs(jerk), axis=0) / J
        jr = np.abs(np.diff(a, axis=0)) / (J * (dt + 2.0 * time_resolution)) - 1.0
        rep.violations["jerk"] = int((jr > REL_TOL).any(axis=1).sum())
        rep.worst["jerk"] = float(np.nanmax(jr)) + 1.0
        dv = np.diff(v, axis=0) - 0.5 * (a[1:] + a[:-1]) * dt
        dp = (np.diff(p, axis=0) - 0.5 * (v[1:] + v[:-1]) * dt
              + np.diff(a, axis=0) * dt * dt / 12.0)
        v_allow = 0.5 * J * dt * dt * (1 + REL_TOL) + 1e-12
        p_allow = J * dt ** 3 / 6.0 * (1 + REL_TOL) + 1e-12
        rep.violations["inconsistent_velocity"] = int((np.abs(dv) > v_allow).any(axis=1).sum())
        rep.violations["inconsistent_position"] = int((np.abs(dp) > p_allow).any(axis=1).sum())
        rep.worst["inconsistent_velocity"] = float(np.nanmax(np.abs(dv) / v_allow))
        rep.worst["inconsistent_position"] = float(np.nanmax(np.abs(dp) / p_allow))
    return rep


def time_resolution_of(times: np.ndarray) -> float:
    """The float64 spacing of the largest time in ``times``: how precisely a stream
    sampled at absolute ROS times knows them (2.4e-7 s at today's epoch); the
    ``time_resolution`` argument of `check_stream` for such a stream (0 when empty)."""
    times = np.asarray(times, float)
    return float(np.spacing(np.max(np.abs(times)))) if times.size else 0.0


def period_stats(arrivals: np.ndarray, rate: float) -> dict[str, float]:
    """|arrival period - nominal| percentiles [ms] of a received stream."""
    if arrivals.shape[0] < 3:
        return {"p50_ms": float("nan"), "p99_ms": float("nan"), "max_ms": float("nan")}
    err = np.abs(np.diff(arrivals) - 1.0 / rate) * 1e3
    return {"p50_ms": float(np.percentile(err, 50)), "p99_ms": float(np.percentile(err, 99)),
            "max_ms": float(err.max())}
