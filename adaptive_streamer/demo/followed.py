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
    are seconds after it (NaN: did not happen in the run)."""

    first_rest_after: float     # first tick at rest
    rest_after: float           # start of the rest the run ended in
    peak_jerk: float            # largest |jerk| / jerk limit over the joints
    peak_jerk_joint: str
    ticks_over: int             # ticks over a limit
    speed_at_injection: float   # largest |v| / velocity limit over the joints
    speed_at_resume: float      # the same at the stall's end


def _speed(m: FollowedMotion, limits: JointLimits, t: float) -> float:
    i = int(np.searchsorted(m.t, t))
    if not math.isfinite(t) or i >= m.ticks or not np.isfinite(m.v[i]).all():
        return math.nan
    return float((np.abs(m.v[i]) / limits.velocity_max).max())


def after_injection(m: FollowedMotion, limits: JointLimits, at: float,
                    resumed: float = math.nan) -> FollowedAfter:
    """The followed motion after an injection at ``at`` (and a stall ended at ``resumed``)."""
    after = m.t >= at
    t = m.t[after]
    with np.errstate(invalid="ignore"):
        rest = (np.abs(m.v[after]) <= REST_VELOCITY).all(axis=1)
    first = float(t[np.argmax(rest)] - at) if rest.any() else math.nan
    final = math.nan
    if rest.size and rest[-1]:
        moving = np.flatnonzero(~rest)
        final = float(t[moving[-1] + 1] - at) if moving.size else float(t[0] - at)
    jerk = np.where(np.isfinite(m.j[after]), np.abs(m.j[after]), 0.0) / limits.jerk_max
    k = int(np.unravel_index(np.argmax(jerk), jerk.shape)[1]) if jerk.size else 0
    over = np.logical_or.reduce([x[after] for x in _over(m, limits).values()])
    return FollowedAfter(first, final, float(jerk.max()) if jerk.size else math.nan,
                         limits.names[k] if jerk.size else "", int(over.sum()),
                         _speed(m, limits, at), _speed(m, limits, resumed))
