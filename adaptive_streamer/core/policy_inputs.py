# SPDX-License-Identifier: Apache-2.0
"""What a policy sees at one decision instant (shared by the policies and the observation
builder, so neither imports the other)."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .feedback import FeatureVector
from .segment import MotionState


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
