"""Whether the adapter may start streaming now, and the first stream tick.

The adapter's activate transition is refused, with the reason, unless ``joint_states`` is
fresh, a fresh reference window has arrived, the arm is nearly still, and every joint is
inside its position range (otherwise the guard would hold back every setpoint of the
recovery move).
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
                     activation_velocity: float) -> ActivationCheck:
    """Judge an activation at ``now`` from the latest joint state and reference window
    (receive times in the node's clock; None: none received)."""
    if joint_state_received is None or positions is None \
            or now - joint_state_received > joint_states_timeout:
        return ActivationCheck("joint_states is not fresh (none within "
                               f"{joint_states_timeout * 1e3:.0f} ms)")
    if window_received is None or now - window_received > reference_timeout:
        return ActivationCheck(f"no fresh reference/window (none within "
                               f"{reference_timeout * 1e3:.0f} ms); is the reference server "
                               "running?")
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
