# SPDX-License-Identifier: Apache-2.0
"""Whether the adapter may start streaming now, and the first stream tick.

The adapter's activate transition is refused, with the reason, unless ``joint_states`` is
fresh, a fresh reference window has arrived, fresh feedback has arrived when the policy
reads feedback features (else the watchdog stops the arm with ``feedback_stale`` as soon as
it follows: the sensor's publisher may match the adapter's subscription seconds after
another's), the arm is nearly still, and every joint is inside its position range
(otherwise the guard would hold back every setpoint of the recovery move).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .limits import JointLimits


@dataclass(frozen=True)
class ActivationCheck:
    """The verdict: ``refusal`` is None when activation may go ahead."""

    refusal: str | None

    @property
    def ok(self) -> bool:
        """True when activation may go ahead."""
        return self.refusal is None


def check_activation(now: float, joints: Sequence[str], limits: JointLimits,
                     joint_state_received: float | None, positions: np.ndarray | None,
                     velocities: np.ndarray | None, joint_states_timeout: float,
                     window_received: float | None, reference_timeout: float,
                     activation_velocity: float, features: Sequence[str] = (),
                     feedback_received: float | None = None,
                     feedback_timeout: float = math.inf) -> ActivationCheck:
    """Judge an activation at ``now`` from the latest joint state, reference window and,
    when the policy reads the feedback ``features``, feedback message (receive times in the
    node's clock; None: none received)."""
    if joint_state_received is None or positions is None \
            or now - joint_state_received > joint_states_timeout:
        return ActivationCheck("joint_states is not fresh (none within "
                               f"{joint_states_timeout * 1e3:.0f} ms)")
    if window_received is None or now - window_received > reference_timeout:
        return ActivationCheck(f"no fresh reference/window (none within "
                               f"{reference_timeout * 1e3:.0f} ms); is the reference server "
                               "running?")
    if features and (feedback_received is None or now - feedback_received > feedback_timeout):
        return ActivationCheck(f"no fresh feedback (none within {feedback_timeout * 1e3:.0f} "
                               f"ms) for the policy's features {list(features)}; is the "
                               "sensor bridge running?")
    if velocities is not None and np.max(np.abs(velocities)) > activation_velocity:
        i = int(np.argmax(np.abs(velocities)))
        return ActivationCheck(f"joint '{joints[i]}' is moving at {velocities[i]:.4g} rad/s "
                               f"(activation_velocity {activation_velocity:g})")
    outside = (positions < limits.position_min) | (positions > limits.position_max)
    if outside.any():
        i = int(np.argmax(outside))
        return ActivationCheck(
            f"joint '{joints[i]}' is at {positions[i]:.6g} rad, outside its position range "
            f"[{limits.position_min[i]:.6g}, {limits.position_max[i]:.6g}] rad (limits_file); "
            "bring it into the range first")
    return ActivationCheck(None)


def first_tick(now: float, rate: float) -> float:
    """The first stream tick at or after ``now`` on the grid of ``1 / rate``."""
    return math.ceil(now * rate) / rate
