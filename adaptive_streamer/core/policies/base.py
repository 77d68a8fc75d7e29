# SPDX-License-Identifier: Apache-2.0
"""What every policy shares: its protocol and a neutral test input (its inputs, running
configuration and error type live in `core.policy_inputs` and `policies.running`).

A policy is called once per decision cycle with a `PolicyInputs` and returns one raw action
per joint. What the action means is the policy's ``action_meaning``:

* ``normalised``: values in [-1, 1], mapped by the cycle onto the admissible interval
  [lo, hi] of the next acceleration (-1 -> lo, +1 -> hi; out-of-range values are clipped);
* ``acceleration``: the absolute next acceleration [rad/s^2], clipped by the cycle into
  [lo, hi];
* ``brake``: the cycle ignores the values and commands the braking decision.

Policies never apply limits themselves (the cycle does, with the limit stage), and may
return NaN: the cycle and watchdog deal with a non-finite action.
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Protocol

import numpy as np

from ..feedback import FeatureVector
from ..policy_inputs import PolicyInputs
from ..segment import MotionState
from .running import ACTION_MEANINGS, PolicyError, RunningConfig

if TYPE_CHECKING:
    from .card import PolicyCard

__all__ = ["ACTION_MEANINGS", "Policy", "PolicyError", "PolicyInputs", "RunningConfig",
           "neutral_inputs"]


class Policy(Protocol):
    """One decision rule: `act` maps `PolicyInputs` to a raw action of shape (n,)."""

    card: "PolicyCard"
    action_meaning: str
    needs_feedback: tuple[str, ...]

    def reset(self) -> None:
        """Forget any internal state (called when the adapter (re)starts streaming)."""

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """Raw action, float64 of shape (n,); may contain NaN."""


def neutral_inputs(running: RunningConfig) -> PolicyInputs:
    """A benign synthetic input for `running`: at rest at the centre of each joint's range
    (0 for joints without a range), the reference standing still there, every feature
    valid and 0 (stamped at the decision instant, t = 1 s), previous action 0. Used for the
    test inference at load time."""
    lim = running.limits
    n, h, t = len(lim), running.horizon, 1.0
    ranged = lim.has_position_limits
    p = 0.5 * (np.where(ranged, lim.position_min, 0.0) + np.where(ranged, lim.position_max, 0.0))
    zeros = np.zeros(n)
    feedback = None
    if running.features:
        k = len(running.features)
        feedback = FeatureVector(running.features, np.zeros(k), np.ones(k, bool), t)
    return PolicyInputs(t, MotionState(p, zeros.copy(), zeros.copy()), np.tile(p, (h, 1)),
                        np.zeros((h, n)), np.zeros((h, n)), feedback, zeros.copy())
