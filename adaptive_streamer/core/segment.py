# SPDX-License-Identifier: Apache-2.0
"""Constant-jerk segments: the motion between two decision instants.

Per joint the state at a decision instant is (p, v, a); the decision is the acceleration
``u`` to reach one period ``T`` later, with acceleration linear in between (jerk
``j = (u - a) / T``)::

    a(t) = a + j t
    v(t) = v + a t + j t^2 / 2
    p(t) = p + v t + a t^2 / 2 + j t^3 / 6,     0 <= t <= T

(constant-jerk closed forms, Biagiotti & Melchiorri, *Trajectory Planning for Automatic
Machines and Robots*, Springer 2008, ch. 3). Every function is vectorised over joints
(numpy arrays of shape ``(n,)``; scalars broadcast).
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np

ArrayLike = np.ndarray | float


class MotionState(NamedTuple):
    """Joint position, velocity and acceleration arrays at one instant."""

    position: np.ndarray
    velocity: np.ndarray
    acceleration: np.ndarray


def integrate(p: ArrayLike, v: ArrayLike, a: ArrayLike, u: ArrayLike, T: float
              ) -> MotionState:
    """State at the end of the segment: ``(p(T), v(T), u)``."""
    p, v, a, u = (np.asarray(x, float) for x in (p, v, a, u))
    return MotionState(p + T * v + T * T * (2.0 * a + u) / 6.0, v + 0.5 * T * (a + u), u + 0.0 * p)


def sample(p: ArrayLike, v: ArrayLike, a: ArrayLike, u: ArrayLike, T: float,
           t: ArrayLike) -> MotionState:
    """Position, velocity and acceleration at times ``t`` inside the segment.

    ``t`` may be a scalar or an array of shape ``(m,)``; with joints of shape ``(n,)`` the
    result has shape ``(m, n)`` (or ``(n,)`` for scalar ``t``).
    """
    p, v, a, u = (np.asarray(x, float) for x in (p, v, a, u))
    t = np.asarray(t, float)
    if t.ndim == 1:
        t = t[:, None]
    return _at(p, v, a, (u - a) / T, t)


def _at(p: np.ndarray, v: np.ndarray, a: np.ndarray, j: np.ndarray, t: np.ndarray
        ) -> MotionState:
    """Constant-jerk state after time ``t`` (elementwise broadcasting)."""
    return MotionState(p + t * (v + t * (0.5 * a + t * j / 6.0)),
                       v + t * (a + 0.5 * j * t),
                       a + j * t)


def jerk(a: ArrayLike, u: ArrayLike, T: float) -> np.ndarray:
    """Constant jerk of the segment from acceleration ``a`` to ``u`` over ``T``."""
    return (np.asarray(u, float) - np.asarray(a, float)) / T


def velocity_extrema(v: ArrayLike, a: ArrayLike, u: ArrayLike, T: float
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Exact (min, max) of v(t) over [0, T].

    v(t) is quadratic; besides the end points its only stationary point is where the
    acceleration changes sign, at ``t* = a T / (a - u)`` when ``a`` and ``u`` differ in sign,
    with value ``v - a^2 T / (2 (u - a))`` there.
    """
    v, a, u = (np.asarray(x, float) for x in (v, a, u))
    v1 = v + 0.5 * T * (a + u)
    lo, hi = np.minimum(v, v1), np.maximum(v, v1)
    inside = a * u < 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        vs = np.where(inside, v - a * a * T / (2.0 * np.where(inside, u - a, 1.0)), v)
    return np.minimum(lo, vs), np.maximum(hi, vs)


def position_extrema(p: ArrayLike, v: ArrayLike, a: ArrayLike, u: ArrayLike, T: float
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Exact (min, max) of p(t) over [0, T].

    The stationary points of the cubic p(t) are the roots of v(t) = 0 inside the segment,
    found in closed form (numerically stable quadratic formula).
    """
    p, v, a, u = np.broadcast_arrays(*(np.asarray(x, float) for x in (p, v, a, u)))
    end = integrate(p, v, a, u, T).position
    lo, hi = np.minimum(p, end), np.maximum(p, end)
    for t in _velocity_roots(v, a, u, T):
        ok = (t > 0.0) & (t < T)
        if np.any(ok):
            pt = _at(p, v, a, (u - a) / T, np.where(ok, t, 0.0)).position
            lo = np.where(ok, np.minimum(lo, pt), lo)
            hi = np.where(ok, np.maximum(hi, pt), hi)
    return lo, hi


def _velocity_roots(v: np.ndarray, a: np.ndarray, u: np.ndarray, T: float
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Both real roots of v + a t + (j/2) t^2 (NaN where absent)."""
    half_j = 0.5 * (u - a) / T
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        disc = a * a - 4.0 * half_j * v
        sq = np.sqrt(disc)
        q = -0.5 * (a + np.copysign(sq, a))
        r1 = np.where(half_j != 0.0, q / half_j, np.where(a != 0.0, -v / a, np.nan))
        r2 = np.where(q != 0.0, v / q, np.nan)
        r2 = np.where(half_j != 0.0, r2, np.nan)
    bad = disc < 0.0
    return np.where(bad, np.nan, r1), np.where(bad, np.nan, r2)
