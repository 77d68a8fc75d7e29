# SPDX-License-Identifier: Apache-2.0
"""The motion the simulated driver actually followed, checked against the limits (ROS-free).

The driver publishes, every tick, the noise-free target its plant follows
(``driver/followed``, stamped with the tick time). With the plan output that is the
interpolated plan with its velocity and acceleration: v and a are taken from the messages
and the jerk is the difference of the accelerations between ticks over the tick spacing.
With the stream output it is the position command the driver follows, or the position it
holds on a command timeout: v, a and the jerk are finite differences of the positions at
the tick stamps (each difference belongs to the later of its two ticks; the first one, two
or three ticks have none).

The stream of setpoints says what the adapter commanded; this says what the arm was asked
to do: a late stream tick, a repeated command or a hold shows up here, not there.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..core.limits import JointLimits

SOURCES = ("messages", "differences")   # where v and a come from (see the module docstring)
REL_TOL = 1e-6
REST_VELOCITY = 1e-4    # rad/s on every joint: at rest
REST_MIN = 0.02         # s: a rest lasts at least this long (a repeated stream command is a
                        # one-tick zero difference, not a rest)
SPEED_WINDOW = 0.02     # s: speed by differences over this window (the differences source)


class FollowedError(ValueError):
    """The followed samples are malformed (shapes, times not increasing)."""


@dataclass(frozen=True)
class FollowedMotion:
    """The followed motion per tick: stamps ``t`` (N,) [s], ``p``, ``v``, ``a``, ``j``
    (N, n), NaN where a finite difference has no earlier tick; ``dt`` (N,) [s] the spacing
    to the tick before (NaN for the first); ``resolution`` [s] how precisely the driver's
    evaluation times are known (the float64 spacing of the absolute times it evaluated the
    plan at; 0 for differences of positions at exact stamps)."""

    t: np.ndarray
    dt: np.ndarray
    p: np.ndarray
    v: np.ndarray
    a: np.ndarray
    j: np.ndarray
    source: str
    resolution: float

    @property
    def ticks(self) -> int:
        """Number of ticks."""
        return int(self.t.size)


def _diff(x: np.ndarray, dt: np.ndarray) -> np.ndarray:
    out = np.full_like(x, np.nan)
    if x.shape[0] > 1:
        out[1:] = np.diff(x, axis=0) / dt[1:, None]
    return out


def followed_motion(t_ns: np.ndarray, p: np.ndarray, v: np.ndarray | None,
                    a: np.ndarray | None) -> FollowedMotion:
    """The followed motion from the ticks' integer-ns stamps ``t_ns`` (N,), positions ``p``
    (N, n) and, with the plan output, velocities ``v`` and accelerations ``a`` (None or
    empty: the stream output, differences of the positions)."""
    t_ns = np.asarray(t_ns, dtype=np.int64)
    p = np.asarray(p, float)
    if p.ndim != 2 or p.shape[0] != t_ns.size:
        raise FollowedError(f"followed positions must be (N, n) for N = {t_ns.size} ticks, got "
                            f"{p.shape}")
    if t_ns.size > 1 and np.any(np.diff(t_ns) <= 0):
        raise FollowedError("followed tick stamps must be strictly increasing")
    dt = np.full(t_ns.size, np.nan)
    dt[1:] = np.diff(t_ns) * 1e-9
    t = t_ns * 1e-9
    given = v is not None and a is not None and np.size(v) and np.size(a)
    if given:
        v, a = np.asarray(v, float), np.asarray(a, float)
        if v.shape != p.shape or a.shape != p.shape:
            raise FollowedError(f"followed velocities {v.shape} and accelerations {a.shape} "
                                f"must match the positions {p.shape}")
        res = float(np.spacing(np.abs(t).max())) if t.size else 0.0
        return FollowedMotion(t, dt, p, v, a, _diff(a, dt), SOURCES[0], res)
    v = _diff(p, dt)
    a = _diff(v, dt)
    return FollowedMotion(t, dt, p, v, a, _diff(a, dt), SOURCES[1], 0.0)


@dataclass(frozen=True)
class FollowedCheck:
    """The followed motion over a time window against the limits: per joint the peak |v|,
    |a| and |jerk| as a fraction of the limit, the ticks over a limit per quantity
    (position, velocity, acceleration, jerk) and over any."""

    ticks: int
    duration: float
    source: str
    peak_velocity: np.ndarray
    peak_acceleration: np.ndarray
    peak_jerk: np.ndarray
    over: dict[str, int]
    ticks_over: int


def _over(m: FollowedMotion, limits: JointLimits) -> dict[str, np.ndarray]:
    """Per tick and quantity: True where some joint is over its limit (with the tolerance
    for the evaluation times' resolution: a time off by r moves a by up to J r)."""
    tol = REL_TOL
    slack = np.where(np.isfinite(m.dt), 2.0 * m.resolution / np.where(m.dt > 0, m.dt, 1.0), 0.0)
    with np.errstate(invalid="ignore"):
        return {
            "position": ((m.p < limits.position_min - tol) |
                         (m.p > limits.position_max + tol)).any(axis=1),
            "velocity": (np.abs(m.v) > limits.velocity_max * (1 + tol)).any(axis=1),
            "acceleration": (np.abs(m.a) > limits.acceleration_max * (1 + tol)
                             + limits.jerk_max * m.resolution).any(axis=1),
            "jerk": (np.abs(m.j) > limits.jerk_max * (1 + tol + slack[:, None])).any(axis=1),
        }


def _peak(x: np.ndarray, limit: np.ndarray) -> np.ndarray:
    finite = np.isfinite(x)
    if not finite.any():
        return np.full(x.shape[1], np.nan)
    return np.where(finite, np.abs(x), 0.0).max(axis=0) / limit


def check_followed(m: FollowedMotion, limits: JointLimits, t0: float = -math.inf,
                   t1: float = math.inf) -> FollowedCheck:
    """Check the ticks with stamps in [t0, t1] against ``limits``."""
    keep = (m.t >= t0) & (m.t <= t1)
    over = {k: x[keep] for k, x in _over(m, limits).items()}
    t = m.t[keep]
    return FollowedCheck(int(keep.sum()), float(t[-1] - t[0]) if t.size else 0.0, m.source,
                         _peak(m.v[keep], limits.velocity_max),
                         _peak(m.a[keep], limits.acceleration_max),
                         _peak(m.j[keep], limits.jerk_max),
                         {k: int(x.sum()) for k, x in over.items()},
                         int(np.logical_or.reduce(list(over.values())).sum()) if t.size else 0)


@dataclass(frozen=True)
class FollowedAfter:
    """What the followed motion did after an injection at ``at`` [s, ROS time]; the times
    are seconds after it (NaN: did not happen in the run). A rest is every joint's |v| at
    most `REST_VELOCITY` for at least `REST_MIN`; a speed is the largest |v| / velocity limit
    over the joints (with the differences source, over `SPEED_WINDOW`: one tick's difference
    swings with the stream's timing)."""

    first_rest_after: float     # start of the first rest
    rest_after: float           # start of the rest the run ended in
    peak_jerk: float            # largest |jerk| / jerk limit over the joints
    peak_jerk_joint: str
    peak_speed: float           # largest |v| / velocity limit, one tick's (a step shows)
    ticks_over: int             # ticks over a limit
    speed_at_injection: float
    speed_at_resume: float      # the same at the stall's end


def _speed(m: FollowedMotion, limits: JointLimits, t: float) -> float:
    """The speed (see `FollowedAfter`) at the first tick at or after ``t`` (NaN: none)."""
    i = int(np.searchsorted(m.t, t)) if math.isfinite(t) else m.ticks
    if i >= m.ticks:
        return math.nan
    if m.source == SOURCES[0]:
        v = m.v[i]
    else:
        k = int(np.searchsorted(m.t, m.t[i] - SPEED_WINDOW * (1 + 1e-9)))
        if k >= i:
            return math.nan
        v = (m.p[i] - m.p[k]) / (m.t[i] - m.t[k])
    return float((np.abs(v) / limits.velocity_max).max()) if np.isfinite(v).all() else math.nan


def _rests(t: np.ndarray, still: np.ndarray) -> list[tuple[float, bool]]:
    """The starts of the runs of ``still`` ticks at the stamps ``t`` that last at least
    `REST_MIN` (to the first moving tick, or to the last tick), each with whether it lasts
    to the end."""
    out = []
    edges = np.flatnonzero(np.diff(np.concatenate(([0], still.astype(np.int8), [0]))))
    for start, stop in zip(edges[::2], edges[1::2]):
        to_end = bool(stop == t.size)
        if (t[-1] if to_end else t[stop]) - t[start] >= REST_MIN:
            out.append((float(t[start]), to_end))
    return out


def after_injection(m: FollowedMotion, limits: JointLimits, at: float,
                    resumed: float = math.nan) -> FollowedAfter:
    """The followed motion after an injection at ``at`` (and a stall ended at ``resumed``)."""
    after = m.t >= at
    t = m.t[after]
    with np.errstate(invalid="ignore"):
        still = (np.abs(m.v[after]) <= REST_VELOCITY).all(axis=1)
    rests = _rests(t, still)
    first = rests[0][0] - at if rests else math.nan
    final = rests[-1][0] - at if rests and rests[-1][1] else math.nan
    jerk = np.where(np.isfinite(m.j[after]), np.abs(m.j[after]), 0.0) / limits.jerk_max
    speed = np.where(np.isfinite(m.v[after]), np.abs(m.v[after]), 0.0) / limits.velocity_max
    k = int(np.unravel_index(np.argmax(jerk), jerk.shape)[1]) if jerk.size else 0
    over = np.logical_or.reduce([x[after] for x in _over(m, limits).values()])
    return FollowedAfter(first, final, float(jerk.max()) if jerk.size else math.nan,
                         limits.names[k] if jerk.size else "",
                         float(speed.max()) if speed.size else math.nan, int(over.sum()),
                         _speed(m, limits, at), _speed(m, limits, resumed))
