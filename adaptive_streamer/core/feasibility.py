# SPDX-License-Identifier: Apache-2.0
"""Feasibility of a reference against joint limits, and the optional slow-down.

`check_feasibility` reports, per joint, the largest velocity, acceleration and jerk the
reference demands as a fraction of the limit (exact peaks of the reference's spline, so
nothing between samples is missed) and the position range it sweeps. `ensure_feasible`
refuses an infeasible reference with a message naming the joint, the quantity and the
ratio, or (``slow_down=True``) stretches time uniformly by the smallest factor lam >= 1
that brings every ratio to at most ``fraction``: velocity ratios scale by 1/lam,
acceleration by 1/lam^2, jerk by 1/lam^3 (Biagiotti & Melchiorri, Trajectory Planning for
Automatic Machines and Robots, Springer 2008, ch. 5, time scaling). Slowing down cannot
fix a position outside the limits; that is always refused.

The ratios describe the reference at speed override 1. While the override ramps, the
playback adds s_dot * v_ref to the acceleration (see `adaptive_streamer.core.playback`);
the downstream limit stage enforces the limits whatever the reference asks.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .limits import JointLimits
from .reference import ReferenceTrajectory


class FeasibilityError(ValueError):
    """A reference demands more than the joint limits allow."""


@dataclass(frozen=True)
class FeasibilityReport:
    """Per-joint peak demand as a fraction of the limit, and the swept position range."""

    names: tuple[str, ...]
    velocity_ratio: np.ndarray
    acceleration_ratio: np.ndarray
    jerk_ratio: np.ndarray
    position_min: np.ndarray
    position_max: np.ndarray
    position_ok: np.ndarray  # bool (n,)

    @property
    def peak_ratio(self) -> float:
        """Largest velocity/acceleration/jerk ratio over all joints."""
        return float(max(self.velocity_ratio.max(), self.acceleration_ratio.max(),
                         self.jerk_ratio.max()))

    @property
    def feasible(self) -> bool:
        """True when every ratio is at most 1 and every position stays within its limits."""
        return self.peak_ratio <= 1.0 and bool(self.position_ok.all())

    def slow_down_factor(self, fraction: float = 1.0) -> float:
        """Smallest time-stretch lam >= 1 bringing every ratio to at most ``fraction``."""
        need = max(self.velocity_ratio.max() / fraction,
                   np.sqrt(self.acceleration_ratio.max() / fraction),
                   np.cbrt(self.jerk_ratio.max() / fraction))
        return float(max(1.0, need))

    def violations(self) -> list[str]:
        """One line per exceeded limit ('' list when feasible)."""
        lines = []
        for label, ratio in (("velocity", self.velocity_ratio),
                             ("acceleration", self.acceleration_ratio), ("jerk", self.jerk_ratio)):
            for j in np.flatnonzero(ratio > 1.0):
                lines.append(f"joint '{self.names[j]}' {label} reaches {ratio[j]:.3g} x its limit")
        for j in np.flatnonzero(~self.position_ok):
            lines.append(f"joint '{self.names[j]}' position sweeps [{self.position_min[j]:.6g}, "
                         f"{self.position_max[j]:.6g}] rad, outside its limits")
        return lines

    def summary(self) -> str:
        """One line: worst ratio per quantity, with the joint."""
        parts = []
        for label, ratio in (("velocity", self.velocity_ratio),
                             ("acceleration", self.acceleration_ratio), ("jerk", self.jerk_ratio)):
            j = int(np.argmax(ratio))
            parts.append(f"{label} {ratio[j]:.3f} ({self.names[j]})")
        return "peak demand / limit: " + ", ".join(parts)


def check_feasibility(reference: ReferenceTrajectory, limits: JointLimits) -> FeasibilityReport:
    """Exact peak demand of ``reference`` relative to ``limits`` (which must name its joints)."""
    try:
        lim = limits.subset(reference.names)
    except ValueError as exc:
        raise FeasibilityError(f"limits do not cover the reference: {exc}") from None
    pk = reference.peaks()
    ok = (pk.position_min >= lim.position_min) & (pk.position_max <= lim.position_max)
    return FeasibilityReport(reference.names, pk.velocity / lim.velocity_max,
                             pk.acceleration / lim.acceleration_max, pk.jerk / lim.jerk_max,
                             pk.position_min, pk.position_max, ok)


def ensure_feasible(reference: ReferenceTrajectory, limits: JointLimits, slow_down: bool = False,
                    fraction: float = 1.0) -> tuple[ReferenceTrajectory, float, FeasibilityReport]:
    """Return ``(reference, lam, report)`` for a reference within ``limits``.

    A feasible reference comes back unchanged with lam = 1. An infeasible one raises
    `FeasibilityError`, unless ``slow_down`` is set and only velocity/acceleration/jerk are
    exceeded: then time is stretched by lam so every ratio is at most ``fraction`` (in
    (0, 1]) and the slowed reference and its report are returned.
    """
    if not (np.isfinite(fraction) and 0.0 < fraction <= 1.0):
        raise FeasibilityError(f"slow-down target fraction must be in (0, 1], got {fraction}")
    report = check_feasibility(reference, limits)
    if report.feasible:
        return reference, 1.0, report
    if not report.position_ok.all():
        raise FeasibilityError("reference leaves the position limits (slowing down cannot fix "
                               "this): " + "; ".join(report.violations()))
    if not slow_down:
        raise FeasibilityError("reference exceeds the joint limits: "
                               + "; ".join(report.violations())
                               + f"; a slow-down by {report.slow_down_factor(fraction):.4g}x "
                               "would fit (enable the slow-down option to apply it)")
    lam = report.slow_down_factor(fraction)
    slowed = reference.time_scaled(lam)
    return slowed, lam, check_feasibility(slowed, limits)
