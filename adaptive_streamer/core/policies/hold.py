# SPDX-License-Identifier: Apache-2.0
"""Hold: bring the joints to rest and keep them there.

The action meaning is ``brake``: the cycle ignores the (zero) action and commands the limit
stage's braking decision, which decelerates to rest within every limit and then holds.
"""
from __future__ import annotations

import numpy as np

from .base import PolicyInputs
from .card import PolicyCard


class HoldPolicy:
    """Always asks for braking; used by ``--policy hold`` and as the adapter's fallback."""

    action_meaning = "brake"
    needs_feedback: tuple[str, ...] = ()

    def __init__(self, card: PolicyCard) -> None:
        self.card = card
        self._zeros = np.zeros(len(card.joints))

    def reset(self) -> None:
        """Nothing to forget: holding is stateless."""

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """Zeros (n,); the cycle applies the braking decision."""
        return self._zeros.copy()
