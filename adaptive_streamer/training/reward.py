# SPDX-License-Identifier: Apache-2.0
"""The training reward: a task term times a deviation penalty times a smoothness penalty.

Multiplicative shaping (each factor in (0, 1], the product high only when all are high,
so the task cannot be bought with large deviations or rough commands)::

    reward     = task * deviation * smoothness
    task       = exp(-(x / task_scale)^2)          x: the task feature (default edge_offset)
                 (0 while the feature is invalid or absent: nothing is rewarded blind)
    deviation  = exp(-deviation_weight * (d / deviation_limit)^2)
                 d: the planned deviation norm from the reference [rad] of the decision,
                 deviation_limit: the watchdog's deviation_norm threshold
    smoothness = exp(-smoothness_weight * mean(((u - a) / (J T))^2))
                 u - a: the change of the commanded acceleration over the period
                 (the segment's jerk times T), as a fraction of the largest, J T, per joint

`reward_terms` is used by the environment and by the dataset builder (same figures for
the same decision).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


class RewardError(ValueError):
    """A reward weight is not a finite number of the expected sign."""


@dataclass(frozen=True)
class RewardWeights:
    """Weights of the reward terms (see the module docstring)."""

    task_feature: str = "edge_offset"
    task_scale: float = 0.002          # [units of the feature]; the demo's: 2 mm
    deviation_weight: float = 1.0
    smoothness_weight: float = 1.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.task_scale) and self.task_scale > 0):
            raise RewardError(f"reward task_scale must be a positive number, got "
                              f"{self.task_scale!r}")
        for name in ("deviation_weight", "smoothness_weight"):
            x = getattr(self, name)
            if not (math.isfinite(x) and x >= 0):
                raise RewardError(f"reward {name} must be a number >= 0, got {x!r}")


@dataclass(frozen=True)
class RewardTerms:
    """The factors of one decision's reward and their product."""

    task: float | np.ndarray
    deviation: float | np.ndarray
    smoothness: float | np.ndarray

    @property
    def reward(self) -> float | np.ndarray:
        """task * deviation * smoothness."""
        return self.task * self.deviation * self.smoothness


def reward_terms(weights: RewardWeights, task_value: float | np.ndarray | None,
                 deviation_norm: float | np.ndarray, deviation_limit: float,
                 u: np.ndarray, previous_acceleration: np.ndarray,
                 jerk_step: np.ndarray) -> RewardTerms:
    """The reward factors of one decision, or of B decisions at once (arrays: task value
    and deviation (B,), accelerations (B, n); the terms are then (B,) arrays).

    Args:
        task_value: the task feature's value (None or NaN when invalid or absent).
        deviation_norm: the decision's planned deviation norm [rad] (NaN counts as 0: no
            policy ran, e.g. braking).
        deviation_limit: the watchdog's deviation_norm threshold [rad].
        u, previous_acceleration: committed acceleration and the one it starts from (n,).
        jerk_step: ``J T`` per joint (n,).
    """
    x = np.asarray(np.nan if task_value is None else task_value, float)
    with np.errstate(invalid="ignore"):
        task = np.where(np.isfinite(x), np.exp(-(x / weights.task_scale) ** 2), 0.0)
    d = np.asarray(deviation_norm, float)
    d = np.where(np.isfinite(d), d, 0.0)
    deviation = np.exp(-weights.deviation_weight * (d / deviation_limit) ** 2)
    rough = np.mean(((np.asarray(u) - previous_acceleration) / jerk_step) ** 2, axis=-1)
    smoothness = np.exp(-weights.smoothness_weight * rough)
    if task.ndim == 0 and deviation.ndim == 0 and np.ndim(smoothness) == 0:
        return RewardTerms(float(task), float(deviation), float(smoothness))
    return RewardTerms(task, deviation, smoothness)
