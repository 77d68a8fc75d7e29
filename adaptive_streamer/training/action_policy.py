# SPDX-License-Identifier: Apache-2.0
"""The environment's policy: the agent's action, handed to the deployed decision cycle.

`ActionPolicy` carries a policy card (observation layout, action meaning, joints, period,
limits) and returns, when the cycle asks, the action the agent set for this decision. The
cycle then maps it exactly as it maps a deployed model's output (normalised onto the
admissible interval, or an absolute acceleration clipped into it).
"""
from __future__ import annotations

import numpy as np

from ..core.policies.base import PolicyInputs
from ..core.policies.card import PolicyCard


class ActionPolicyError(ValueError):
    """The card cannot be trained on (no observation, or an action meaning without values)."""


class ActionPolicy:
    """A `Policy` whose output is set from outside before each decision (``action``)."""

    def __init__(self, card: PolicyCard) -> None:
        if card.action not in ("normalised", "acceleration"):
            raise ActionPolicyError(f"{card.source}: action '{card.action}' takes no values "
                                    f"to learn; a trained card needs 'normalised' or "
                                    f"'acceleration'")
        if not card.observation:
            raise ActionPolicyError(f"{card.source}: kind '{card.kind}' has no observation "
                                    f"blocks; a trained card lists them (kind onnx)")
        self.card = card
        self.action_meaning = card.action
        self.layout = card.observation_layout()
        self.needs_feedback = self.layout.features
        self.action = np.zeros(len(card.joints))
        self.last_inputs: PolicyInputs | None = None

    def reset(self) -> None:
        """Nothing to forget (the agent holds any memory)."""

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """The action set for this decision (float64 copy)."""
        self.last_inputs = inputs
        return self.action.copy()
