# SPDX-License-Identifier: Apache-2.0
"""Reference tracking: PD on the position and velocity error one period ahead, plus
reference-acceleration feed-forward.

The decision ``u`` is the acceleration at ``t_{k+1}``. The state it leads to,
``x_{k+1}(u) = integrate(state, u, T)`` (`adaptive_streamer.core.segment`), is affine in
``u``::

    p1(u) = p1(0) + (T^2 / 6) u          v1(u) = v1(0) + (T / 2) u

so the implicit tracking law, evaluated on the predicted state,

    u = ff a_ref[1] + kp (p_ref[1] - p1(u)) + kd (v_ref[1] - v1(u))

has the closed-form solution

    u = (ff a_ref[1] + kp (p_ref[1] - p1(0)) + kd (v_ref[1] - v1(0))) / (1 + kp T^2 / 6 + kd T / 2)

(row 1 of the reference is the point one period ahead). Per joint, vectorised. Default
gains: see `adaptive_streamer.core.policies.card.default_natural_frequency`.
"""
from __future__ import annotations

import numpy as np

from ..segment import integrate
from .base import PolicyError, PolicyInputs
from .card import PolicyCard


class TrackerPolicy:
    """Tracks the reference with the card's gains; action meaning ``acceleration``."""

    action_meaning = "acceleration"
    needs_feedback: tuple[str, ...] = ()

    def __init__(self, card: PolicyCard) -> None:
        if card.gains is None:
            raise PolicyError(f"{card.source}: kind '{card.kind}' has no tracking gains")
        self.card = card
        self._T = T = card.decision_period
        g = card.gains
        self._kp, self._kd, self._ff = g.kp, g.kd, g.feedforward
        slope = integrate(0.0, 0.0, 0.0, 1.0, T)  # d p1/du = T^2/6, d v1/du = T/2
        self._inv = 1.0 / (1.0 + self._kp * slope.position + self._kd * slope.velocity)

    def reset(self) -> None:
        """Nothing to forget: the tracker is stateless."""

    def act(self, inputs: PolicyInputs) -> np.ndarray:
        """Next acceleration [rad/s^2] per joint (closed-form solution of the tracking law)."""
        p, v, a = inputs.state
        free = integrate(p, v, a, 0.0, self._T)
        rhs = self._ff * inputs.ref_accelerations[1]
        rhs += self._kp * (inputs.ref_positions[1] - free.position)
        rhs += self._kd * (inputs.ref_velocities[1] - free.velocity)
        rhs *= self._inv
        return rhs
