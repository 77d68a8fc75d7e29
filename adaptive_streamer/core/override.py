# SPDX-License-Identifier: Apache-2.0
"""A smoothly ramped time-scaling factor s(t) (the speed override).

Every change of the target starts a ramp of fixed duration D shaped by the quintic
smoothstep sigma(x) = 10x^3 - 15x^4 + 6x^5 (zero first and second derivative at both ends;
Biagiotti & Melchiorri, Trajectory Planning for Automatic Machines and Robots, Springer
2008, sec. 2.1.5, from memory). Ramps superpose:

    s(t) = g_0 + sum_k (g_k - g_(k-1)) sigma((t - t_k) / D)

for targets g_k set at times t_1 <= t_2 <= ... . Because all ramps have the same duration,
the weights 1 - sigma_1, sigma_1 - sigma_2, ..., sigma_m are non-negative and sum to one,
so s(t) is a convex combination of the targets: it never leaves their range (never
negative, so reference time never runs backwards), and s, s_dot and s_ddot are continuous
even when a new target arrives mid-ramp. The peak rate of one ramp is 1.875 |dg| / D.
The elapsed reference time, the integral of s, is exact in closed form.
"""
from __future__ import annotations

import numpy as np

PEAK_RATE = 1.875  # max of sigma'(x) = 30 x^2 (1 - x)^2, at x = 1/2


class OverrideError(ValueError):
    """A speed-override target or ramp time is out of range."""


def _sigma(x: np.ndarray) -> np.ndarray:
    x = np.clip(x, 0.0, 1.0)
    return x * x * x * (10.0 + x * (-15.0 + 6.0 * x))


def _sigma_rate(x: np.ndarray) -> np.ndarray:
    x = np.clip(x, 0.0, 1.0)
    return 30.0 * x * x * (1.0 - x) * (1.0 - x)


def _sigma_integral(x: np.ndarray) -> np.ndarray:
    """Integral of sigma from -inf (sigma = 0 there) to x."""
    xc = np.clip(x, 0.0, 1.0)
    inside = xc ** 4 * (2.5 + xc * (-3.0 + xc))
    return inside + np.maximum(x - 1.0, 0.0)


class OverrideRamp:
    """The schedule of s(t): a settled level plus the ramps still in progress."""

    def __init__(self, initial: float, ramp_time: float) -> None:
        if not (np.isfinite(ramp_time) and ramp_time > 0.0):
            raise OverrideError(f"override ramp time must be positive and finite, got {ramp_time}")
        self._check(initial)
        self.ramp_time = float(ramp_time)
        self.target = float(initial)
        self._base = float(initial)
        self._ramps: list[tuple[float, float]] = []  # (start time, step)

    @staticmethod
    def _check(value: float) -> None:
        if not (np.isfinite(value) and 0.0 <= value <= 1.0):
            raise OverrideError(f"override target must be in [0, 1], got {value}")

    def set_target(self, value: float, t: float) -> None:
        """Ramp from the current schedule to ``value`` starting at time ``t``."""
        self._check(value)
        if self._ramps and t < self._ramps[-1][0]:
            raise OverrideError(f"ramp start {t} is before the previous ramp start "
                                f"{self._ramps[-1][0]}")
        step = float(value) - self.target
        if step != 0.0:
            self._ramps.append((float(t), step))
        self.target = float(value)

    def fold(self, t: float) -> None:
        """Absorb ramps finished by time ``t`` into the settled level."""
        done = [r for r in self._ramps if r[0] + self.ramp_time <= t]
        if done:
            self._ramps = [r for r in self._ramps if r[0] + self.ramp_time > t]
            self._base = self.target if not self._ramps else self._base + sum(s for _, s in done)

    def settled(self, t: float) -> bool:
        """True when no ramp is in progress at time ``t``."""
        return all(r[0] + self.ramp_time <= t for r in self._ramps)

    def value(self, t: float | np.ndarray) -> np.ndarray:
        """s(t)."""
        t = np.asarray(t, dtype=float)
        out = np.full(t.shape, self._base)
        for start, step in self._ramps:
            out = out + step * _sigma((t - start) / self.ramp_time)
        return out

    def rate(self, t: float | np.ndarray) -> np.ndarray:
        """ds/dt at t."""
        t = np.asarray(t, dtype=float)
        out = np.zeros(t.shape)
        for start, step in self._ramps:
            out = out + step * _sigma_rate((t - start) / self.ramp_time) / self.ramp_time
        return out

    def integral(self, t0: float, t: float | np.ndarray) -> np.ndarray:
        """Integral of s from ``t0`` to ``t`` (exact; ``t0`` not before the last `fold`)."""
        t = np.asarray(t, dtype=float)
        out = self._base * (t - t0)
        d = self.ramp_time
        for start, step in self._ramps:
            out = out + step * d * (_sigma_integral((t - start) / d)
                                    - _sigma_integral(np.asarray((t0 - start) / d)))
        return out
