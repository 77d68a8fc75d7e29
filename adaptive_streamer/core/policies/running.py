# SPDX-License-Identifier: Apache-2.0
"""What the adapter runs with (`RunningConfig`), the action meanings, and the policies'
error type; a policy card is checked against the running configuration."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..limits import JointLimits

ACTION_MEANINGS = ("normalised", "acceleration", "brake")


class PolicyError(ValueError):
    """A policy card, model or policy configuration is invalid or does not fit the adapter."""


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
