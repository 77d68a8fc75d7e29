# SPDX-License-Identifier: Apache-2.0
"""Time parameterisation of untimed joint waypoints.

Method (named): a quintic interpolating spline through the waypoints over a normalised
path parameter u in [0, 1] with chord-length knot spacing (u_i proportional to the
cumulative joint-space distance between waypoints; Piegl & Tiller, The NURBS Book, 2nd ed.,
Springer 1997, eq. 9.5), with zero first and second derivative at both ends (or periodic
for a closed loop), followed by a uniform time scaling t = T u (Biagiotti & Melchiorri,
Trajectory Planning for Automatic Machines and Robots, Springer 2008, ch. 5, "time
scaling"): with q(t) = Q(t / T), velocity scales by 1/T, acceleration by 1/T^2 and jerk by
1/T^3, so the smallest admissible duration is

    T = max_j max( V_j / (f v_j),  sqrt(A_j / (f a_j)),  cbrt(J_j / (f j_j)) )

where V, A, J are the exact peaks of |Q'|, |Q''|, |Q'''| and f the limit fraction (default
0.8). The result passes through every waypoint (at t_i = T u_i), is jerk-continuous, and
its peaks are checked exactly on the spline's piecewise-polynomial form, not on samples.
Positions between waypoints may overshoot them; an overshoot outside the position limits
is refused.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np

from .limits import JointLimits
from .reference import ReferenceTrajectory, TrajectoryError

DEFAULT_FRACTION = 0.8


class TimingError(ValueError):
    """Waypoints cannot be time-parameterised within the limits."""


def time_parameterise(names: Sequence[str], waypoints: Sequence[Sequence[float]] | np.ndarray,
                      limits: JointLimits, fraction: float = DEFAULT_FRACTION,
                      ends: str = "rest") -> ReferenceTrajectory:
    """Timed, jerk-limited reference through ``waypoints`` (M, n) for joints ``names``.

    Every joint's peak velocity, acceleration and jerk are at most ``fraction`` of its
    limit in ``limits`` (which must name every joint); at least one reaches it.
    ``ends='periodic'`` needs the last waypoint equal to the first.
    """
    names = tuple(names)
    if not (np.isfinite(fraction) and 0.0 < fraction <= 1.0):
        raise TimingError(f"limit fraction must be in (0, 1], got {fraction}")
    w = np.asarray(waypoints, dtype=float)
    if w.ndim != 2 or w.shape[1] != len(names):
        raise TimingError(f"waypoints: expected rows of {len(names)} positions (joints "
                          f"{list(names)}), got shape {w.shape}")
    if w.shape[0] < 2:
        raise TimingError(f"need at least 2 waypoints, got {w.shape[0]}")
    bad = np.argwhere(~np.isfinite(w))
    if bad.size:
        i, j = bad[0]
        raise TimingError(f"waypoint {i}: joint '{names[j]}' position is {w[i, j]}")
    try:
        lim = limits.subset(names)
    except ValueError as exc:
        raise TimingError(f"limits: {exc}") from None
    chords = np.linalg.norm(np.diff(w, axis=0), axis=1)
    if np.any(chords == 0.0):
        i = int(np.flatnonzero(chords == 0.0)[0]) + 1
        raise TimingError(f"waypoint {i} repeats waypoint {i - 1}; consecutive waypoints must "
                          "differ")
    u = np.concatenate([[0.0], np.cumsum(chords)]) / chords.sum()
    try:
        unit = ReferenceTrajectory(names, u, w, ends=ends)
    except TrajectoryError as exc:
        raise TimingError(f"waypoints: {exc}") from None
    peaks = unit.peaks()
    duration = float(np.max(np.concatenate([
        peaks.velocity / (fraction * lim.velocity_max),
        np.sqrt(peaks.acceleration / (fraction * lim.acceleration_max)),
        np.cbrt(peaks.jerk / (fraction * lim.jerk_max)),
    ])))
    timed = unit.time_scaled(duration)
    _check(timed, lim, fraction)
    return timed


def _check(ref: ReferenceTrajectory, lim: JointLimits, fraction: float) -> None:
    """Refuse position overshoot outside the limits; confirm the exact peaks meet the fraction."""
    pk = ref.peaks()
    for j, name in enumerate(ref.names):
        if pk.position_min[j] < lim.position_min[j] or pk.position_max[j] > lim.position_max[j]:
            raise TimingError(
                f"joint '{name}': the spline through the waypoints reaches "
                f"[{pk.position_min[j]:.6g}, {pk.position_max[j]:.6g}] rad, outside the position "
                f"limits [{lim.position_min[j]:.6g}, {lim.position_max[j]:.6g}]; move the "
                "waypoints away from the limit or add waypoints")
    for label, peak, bound in (("velocity", pk.velocity, lim.velocity_max),
                               ("acceleration", pk.acceleration, lim.acceleration_max),
                               ("jerk", pk.jerk, lim.jerk_max)):
        ratio = peak / bound
        if np.any(ratio > fraction * (1.0 + 1e-9)):
            j = int(np.argmax(ratio))
            raise TimingError(f"internal check failed: joint '{ref.names[j]}' {label} reaches "
                              f"{ratio[j]:.6g} of its limit after time scaling (target {fraction})")
