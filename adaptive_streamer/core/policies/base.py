"""What every policy shares: its inputs, its protocol, the running configuration, its error.

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

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol

import numpy as np

from ..feedback import FeatureVector
from ..limits import JointLimits
from ..segment import MotionState

if TYPE_CHECKING:
    from .card import PolicyCard

ACTION_MEANINGS = ("normalised", "acceleration", "brake")


class PolicyError(ValueError):
    """A policy card, model or policy configuration is invalid or does not fit the adapter."""


@dataclass(frozen=True)
class PolicyInputs:
    """Everything a policy sees at one decision instant (joint arrays in the running order).

    ``ref_*`` rows are the reference at ``time + i * T``, i = 0..H-1 (real timeline; row 0
    applies at the decision instant). ``feedback`` is None when no feedback is configured
    or none was received. ``previous_action`` is the policy's previous raw output (zeros at
    the start).
    """

    time: float
    state: MotionState
    ref_positions: np.ndarray
    ref_velocities: np.ndarray
    ref_accelerations: np.ndarray
    feedback: FeatureVector | None
    previous_action: np.ndarray


class Policy(Protocol):
    """One decision rule: `act` maps `PolicyInputs` to a raw action of shape (n,)."""

    card: "PolicyCard"
    action_meaning: str
    needs_feedback: tuple[str, ...]

    def reset(self) -> None:
        """Forget any internal state (called when the adapter (re)starts streaming)."""

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """Raw action, float64 of shape (n,); may contain NaN."""


@dataclass(frozen=True, eq=False)
class RunningConfig:
    """What the adapter runs with; a policy card is checked against it.

    ``limits`` must be for exactly ``joints`` (same order). ``horizon`` is the number of
    reference points available per decision (H >= 1); ``features`` the feedback features
    the adapter receives (possibly none).
    """

    joints: tuple[str, ...]
    decision_period: float
    limits: JointLimits
    horizon: int
    features: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "joints", tuple(str(j) for j in self.joints))
        object.__setattr__(self, "features", tuple(str(f) for f in self.features))
        if self.limits.names != self.joints:
            raise PolicyError(f"running configuration: limits are for joints "
                              f"{list(self.limits.names)} but the joints are {list(self.joints)}")
        period = self.decision_period
        if isinstance(period, bool) or not isinstance(period, (int, float)) \
                or not (math.isfinite(period) and period > 0.0):
            raise PolicyError(f"running configuration: decision_period must be a positive "
                              f"number of seconds, got {period!r}")
        if isinstance(self.horizon, bool) or not isinstance(self.horizon, (int, np.integer)) \
                or self.horizon < 1:
            raise PolicyError(f"running configuration: horizon must be an integer >= 1 "
                              f"(reference points per decision), got {self.horizon!r}")
        if len(set(self.features)) != len(self.features):
            raise PolicyError(f"running configuration: feedback features repeat: "
                              f"{list(self.features)}")


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
