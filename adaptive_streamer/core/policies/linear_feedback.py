# SPDX-License-Identifier: Apache-2.0
"""The tracker plus a linear feedback term: ``u = tracker(inputs) + G f``.

``G`` (n joints x f features) is the card's ``feedback_gain.matrix`` [rad/s^2 per unit
feature]; ``f`` the named features looked up in the received `FeatureVector` (cached
name-to-index map). Invalid or missing features, or no feedback at all, contribute 0.
"""
from __future__ import annotations

import numpy as np

from .base import PolicyError, PolicyInputs
from .card import PolicyCard
from .tracker import TrackerPolicy


class LinearFeedbackPolicy(TrackerPolicy):
    """Reference tracking corrected by a linear map of feedback features."""

    def __init__(self, card: PolicyCard) -> None:
        super().__init__(card)
        if card.feedback_gain is None:
            raise PolicyError(f"{card.source}: kind '{card.kind}' has no feedback_gain")
        self._G = card.feedback_gain.matrix
        self.needs_feedback = card.feedback_gain.features
        self._names: tuple[str, ...] | None = None
        self._take = np.zeros(len(self.needs_feedback), int)
        self._present = np.zeros(len(self.needs_feedback), bool)

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """Tracker acceleration plus ``G f`` (invalid features count as 0)."""
        u = super().act(inputs)
        fb = inputs.feedback
        if fb is None:
            return u
        if fb.names != self._names:
            index = {name: i for i, name in enumerate(fb.names)}
            self._present = np.array([f in index for f in self.needs_feedback], bool)
            self._take = np.array([index.get(f, 0) for f in self.needs_feedback], int)
            self._names = fb.names
        ok = fb.valid[self._take] & self._present
        f = np.where(ok, fb.values[self._take], 0.0)
        u += self._G @ f
        return u
