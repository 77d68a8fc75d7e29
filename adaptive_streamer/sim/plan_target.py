# SPDX-License-Identifier: Apache-2.0
"""The simulated driver's plan interpolation (ROS-free): the target a trajectory-following
driver derives from plan messages.

Semantics (those of the adapter's plan output): a plan is knots at absolute times with
position, velocity and acceleration per joint; a plan applies from its first knot's time on
and replaces the previous one from there (a plan received after its first knot's time
applies from its arrival); between two knots the target is the quintic Hermite interpolant
of their p, v, a (in the Hermite basis of degree five, e.g. Biagiotti & Melchiorri,
*Trajectory Planning for Automatic Machines and Robots*, Springer 2008, ch. 2; from
memory); after the last knot it holds the last position at rest. Timeout semantics: none
beyond the plan itself; at its end the driver holds at rest.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

MAX_PENDING = 8   # plans kept that have not started yet (newest win)


class PlanTargetError(ValueError):
    """A plan is malformed (knot times not increasing, wrong shapes, non-finite values)."""


@dataclass(frozen=True)
class Plan:
    """Knots: ``times`` (m,) absolute [s], strictly increasing; ``p``, ``v``, ``a`` (m, n)."""

    times: np.ndarray
    p: np.ndarray
    v: np.ndarray
    a: np.ndarray
    applies_from: float

    @property
    def end(self) -> float:
        """Time of the last knot [s]."""
        return float(self.times[-1])


@dataclass(frozen=True)
class Target:
    """The interpolated target at one instant: position, velocity, acceleration (n,)."""

    position: np.ndarray
    velocity: np.ndarray
    acceleration: np.ndarray


def _basis(s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Quintic Hermite basis at normalised time ``s`` in [0, 1]: weights of (p0, v0 h,
    a0 h^2, p1, v1 h, a1 h^2) for the value and its first and second derivative in s."""
    s2, s3, s4, s5 = s * s, s ** 3, s ** 4, s ** 5
    val = np.array([1 - 10 * s3 + 15 * s4 - 6 * s5, s - 6 * s3 + 8 * s4 - 3 * s5,
                    0.5 * (s2 - 3 * s3 + 3 * s4 - s5), 10 * s3 - 15 * s4 + 6 * s5,
                    -4 * s3 + 7 * s4 - 3 * s5, 0.5 * (s3 - 2 * s4 + s5)])
    d1 = np.array([-30 * s2 + 60 * s3 - 30 * s4, 1 - 18 * s2 + 32 * s3 - 15 * s4,
                   0.5 * (2 * s - 9 * s2 + 12 * s3 - 5 * s4), 30 * s2 - 60 * s3 + 30 * s4,
                   -12 * s2 + 28 * s3 - 15 * s4, 0.5 * (3 * s2 - 8 * s3 + 5 * s4)])
    d2 = np.array([-60 * s + 180 * s2 - 120 * s3, -36 * s + 96 * s2 - 60 * s3,
                   0.5 * (2 - 18 * s + 36 * s2 - 20 * s3), 60 * s - 180 * s2 + 120 * s3,
                   -24 * s + 84 * s2 - 60 * s3, 0.5 * (6 * s - 24 * s2 + 20 * s3)])
    return val, d1, d2


class PlanTarget:
    """Takes plans as they arrive and gives the target at any later time."""

    def __init__(self, n: int) -> None:
        self.n = int(n)
        self._active: Plan | None = None
        self._pending: list[Plan] = []
        self.plans_received = 0

    @property
    def has_plan(self) -> bool:
        """True once a plan applies (the driver holds where it is before that)."""
        return self._active is not None

    def accept(self, received: float, times: np.ndarray, p: np.ndarray, v: np.ndarray,
               a: np.ndarray) -> None:
        """Take a plan received at ``received`` [s] (knot times absolute [s])."""
        times = np.asarray(times, float)
        arrays = [np.asarray(x, float) for x in (p, v, a)]
        m = times.size
        if m < 1 or any(x.shape != (m, self.n) for x in arrays):
            raise PlanTargetError(f"expected knots of {self.n} joints with p, v and a each, "
                                  f"got {m} times and shapes {[x.shape for x in arrays]}")
        if not (np.all(np.isfinite(times)) and all(np.all(np.isfinite(x)) for x in arrays)):
            raise PlanTargetError("knot times and values must be finite")
        if np.any(np.diff(times) <= 0.0):
            raise PlanTargetError("knot times (time_from_start) must be strictly increasing")
        plan = Plan(times, *arrays, applies_from=max(float(times[0]), float(received)))
        self._pending.append(plan)
        del self._pending[:-MAX_PENDING]
        self.plans_received += 1

    def at(self, t: float) -> Target | None:
        """The target at time ``t`` (None before any plan applies)."""
        started = [k for k, plan in enumerate(self._pending) if plan.applies_from <= t]
        if started:
            self._active = self._pending[started[-1]]
            self._pending = self._pending[started[-1] + 1:]
        plan = self._active
        if plan is None:
            return None
        if t >= plan.end:
            z = np.zeros(self.n)
            return Target(plan.p[-1].copy(), z, z.copy())
        i = max(int(np.searchsorted(plan.times, t, side="right")) - 1, 0)
        h = float(plan.times[i + 1] - plan.times[i])
        s = (t - float(plan.times[i])) / h
        coef = np.stack([plan.p[i], plan.v[i] * h, plan.a[i] * h * h,
                         plan.p[i + 1], plan.v[i + 1] * h, plan.a[i + 1] * h * h])
        val, d1, d2 = _basis(min(max(s, 0.0), 1.0))
        return Target(val @ coef, (d1 @ coef) / h, (d2 @ coef) / (h * h))
