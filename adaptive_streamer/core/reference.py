# SPDX-License-Identifier: Apache-2.0
"""Reference trajectories: named joints, strictly increasing times, positions, and the
velocities, accelerations and jerks of one interpolant through them.

A `ReferenceTrajectory` interpolates its samples with a quintic B-spline
(``scipy.interpolate.make_interp_spline``, ``k=5``), so position, velocity, acceleration
and jerk are all continuous and come from the same curve: every derivative the package
uses (window points, the resampled path, the feasibility peaks) is a derivative of that
spline, never a separate finite difference. Two end conditions are available:

- ``ends="rest"`` (default): zero velocity and acceleration at the first and last sample,
  so a run starts and ends at rest;
- ``ends="periodic"``: the last sample must equal the first, and the spline is periodic
  (position and its first four derivatives match across the seam), for looping.

Times are stored relative to the first sample (``times[0] == 0``). Scaling time
uniformly by a factor ``lam`` (`ReferenceTrajectory.time_scaled`) gives exactly the
reparameterised curve ``q(t / lam)``, since both end conditions are invariant under a
uniform change of the time variable.

Files are read by `adaptive_streamer.core.reference_files` (CSV, YAML) and `adaptive_streamer.io.reference_bags` (rosbag2); untimed waypoints are timed by
`adaptive_streamer.core.timing`; limits are checked by `adaptive_streamer.core.feasibility`.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy.interpolate import BSpline, PPoly, make_interp_spline

ENDS = ("rest", "periodic")
SPLINE_DEGREE = 5
LOOP_TOLERANCE = 1e-9  # rad; first and last samples closer than this count as equal


class TrajectoryError(ValueError):
    """A reference trajectory's samples are malformed or inconsistent."""


@dataclass(frozen=True)
class Samples:
    """Reference values on a time grid: ``times`` (m,), the rest (m, n)."""

    names: tuple[str, ...]
    times: np.ndarray
    positions: np.ndarray
    velocities: np.ndarray
    accelerations: np.ndarray


@dataclass(frozen=True)
class Peaks:
    """Exact extremes of a reference over its whole duration, per joint (n,)."""

    position_min: np.ndarray
    position_max: np.ndarray
    velocity: np.ndarray       # max |v|
    acceleration: np.ndarray   # max |a|
    jerk: np.ndarray           # max |j|


class ReferenceTrajectory:
    """A joint-space reference: samples plus the quintic spline through them.

    ``names`` (n,), ``times`` (N,) strictly increasing (stored shifted so ``times[0] == 0``),
    ``positions`` (N, n) finite. Arrays are read-only.
    """

    def __init__(self, names: Sequence[str], times: Sequence[float] | np.ndarray,
                 positions: Sequence[Sequence[float]] | np.ndarray, ends: str = "rest") -> None:
        names = tuple(str(x) for x in names)
        if not names or len(set(names)) != len(names) or not all(names):
            raise TrajectoryError(f"joint names must be unique and non-empty, got {list(names)}")
        t = np.asarray(times, dtype=float)
        p = np.asarray(positions, dtype=float)
        if t.ndim != 1 or t.size < 2:
            raise TrajectoryError(f"need at least 2 samples with a 1-D time vector, got shape "
                                  f"{t.shape}")
        if p.shape != (t.size, len(names)):
            raise TrajectoryError(f"positions: expected shape ({t.size}, {len(names)}) for "
                                 f"{t.size} times and joints {list(names)}, got {p.shape}")
        if not np.all(np.isfinite(t)):
            raise TrajectoryError(f"time {int(np.flatnonzero(~np.isfinite(t))[0])} is not finite")
        bad = np.argwhere(~np.isfinite(p))
        if bad.size:
            i, j = bad[0]
            raise TrajectoryError(f"sample {i}: joint '{names[j]}' position is {p[i, j]}")
        steps = np.diff(t)
        if np.any(steps <= 0.0):
            i = int(np.flatnonzero(steps <= 0.0)[0]) + 1
            raise TrajectoryError(f"sample {i}: time {t[i]} is not after the previous time "
                                 f"{t[i - 1]} (times must strictly increase)")
        if ends not in ENDS:
            raise TrajectoryError(f"ends must be one of {list(ENDS)}, got {ends!r}")
        if ends == "periodic":
            gap = np.abs(p[-1] - p[0])
            if np.any(gap > LOOP_TOLERANCE):
                j = int(np.argmax(gap))
                raise TrajectoryError(
                    f"a periodic (looping) reference needs the last sample to equal the first "
                    f"(it is refused, not blended); joint "
                    f"'{names[j]}' starts at {p[0, j]:.9g} and ends at {p[-1, j]:.9g}")
            p = p.copy()
            p[-1] = p[0]
        t = t - t[0]
        self.names = names
        self.ends = ends
        self.times = t
        self.positions = p.copy()
        self.times.setflags(write=False)
        self.positions.setflags(write=False)
        self._spline = _fit(t, self.positions, ends)
        self._derivs = [self._spline] + [self._spline.derivative(m) for m in (1, 2, 3)]
        self._peaks: Peaks | None = None

    # ------------------------------------------------------------------ views
    def __repr__(self) -> str:
        return (f"ReferenceTrajectory({list(self.names)}, {self.times.size} samples, "
                f"{self.duration:.6g} s, ends={self.ends!r})")

    @property
    def duration(self) -> float:
        """Time of the last sample [s]."""
        return float(self.times[-1])

    @property
    def spline(self) -> BSpline:
        """The quintic B-spline q(t), vector-valued over joints."""
        return self._spline

    @property
    def velocities(self) -> np.ndarray:
        """Velocities at the sample times (N, n)."""
        return self.evaluate(self.times, 1)

    @property
    def accelerations(self) -> np.ndarray:
        """Accelerations at the sample times (N, n)."""
        return self.evaluate(self.times, 2)

    def evaluate(self, t: float | np.ndarray, order: int = 0) -> np.ndarray:
        """Derivative ``order`` (0 = position .. 3 = jerk) at times ``t`` in [0, duration].

        Times outside the range are clamped to it (the ends hold, at rest for ``ends='rest'``).
        """
        if order not in (0, 1, 2, 3):
            raise TrajectoryError(f"order must be 0..3, got {order}")
        tt = np.clip(np.asarray(t, dtype=float), 0.0, self.duration)
        return self._derivs[order](tt)

    def sample(self, t: float | np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(positions, velocities, accelerations) at times ``t`` (clamped to [0, duration])."""
        return self.evaluate(t, 0), self.evaluate(t, 1), self.evaluate(t, 2)

    def resample(self, period: float) -> Samples:
        """The reference on the uniform grid ``k * period``, k = 0 .. ceil(duration / period).

        The last grid time is at or just past the end; it holds the final point.
        """
        if not (np.isfinite(period) and period > 0.0):
            raise TrajectoryError(f"resampling period must be positive and finite, got {period}")
        count = int(np.ceil(self.duration / period - 1e-9)) + 1
        grid = np.arange(count) * period
        p, v, a = self.sample(grid)
        return Samples(self.names, grid, p, v, a)

    def time_scaled(self, factor: float) -> "ReferenceTrajectory":
        """The same path taking ``factor`` times as long (velocity / factor, acceleration /
        factor^2, jerk / factor^3)."""
        if not (np.isfinite(factor) and factor > 0.0):
            raise TrajectoryError(f"time scaling factor must be positive and finite, got {factor}")
        return ReferenceTrajectory(self.names, self.times * factor, self.positions, self.ends)

    def peaks(self) -> Peaks:
        """Exact per-joint extremes of position, |velocity|, |acceleration| and |jerk|.

        Computed on the spline's piecewise-polynomial form: each extreme lies at a
        breakpoint or at a root of the next derivative, so nothing between samples is missed.
        """
        if self._peaks is None:
            cols = [_joint_extremes(self._spline, j) for j in range(len(self.names))]
            arr = np.array(cols)  # (n, 5)
            self._peaks = Peaks(*(arr[:, k].copy() for k in range(5)))
        return self._peaks


def _fit(t: np.ndarray, p: np.ndarray, ends: str) -> BSpline:
    n = p.shape[1]
    if ends == "periodic":
        if t.size < 3:
            raise TrajectoryError("ends='periodic' needs at least 3 samples (first == last plus "
                                  "one)")
        return make_interp_spline(t, p, k=SPLINE_DEGREE, bc_type="periodic")
    zero = np.zeros(n)
    rest = [(1, zero), (2, zero)]
    return make_interp_spline(t, p, k=SPLINE_DEGREE, bc_type=(rest, rest))


def _joint_extremes(spline: BSpline, j: int) -> tuple[float, float, float, float, float]:
    """(min q, max q, max|q'|, max|q''|, max|q'''|) of joint ``j`` over the spline's range."""
    pp = PPoly.from_spline(BSpline(spline.t, spline.c[:, j], spline.k, extrapolate=False))
    lo, hi = float(spline.t[spline.k]), float(spline.t[-spline.k - 1])
    out = []
    curves = [pp, pp.derivative(1), pp.derivative(2), pp.derivative(3)]
    for order in range(4):
        roots = curves[order].derivative().roots(discontinuity=False, extrapolate=False)
        cand = np.concatenate([pp.x, roots[np.isfinite(roots)]])
        cand = np.clip(cand, lo, hi)
        vals = curves[order](cand)
        vals = vals[np.isfinite(vals)]
        if order == 0:
            out += [float(vals.min()), float(vals.max())]
        else:
            out.append(float(np.abs(vals).max()))
    return out[0], out[1], out[2], out[3], out[4]
