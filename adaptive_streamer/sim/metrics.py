# SPDX-License-Identifier: Apache-2.0
"""Task metric of the demo: the true lateral placement error of the nozzle."""
from __future__ import annotations

import numpy as np

from .arm import DEMO_ARM, ArmKinematics
from .panel import Panel


def lateral_error(joint_positions: np.ndarray, panel: Panel,
                  arm: ArmKinematics = DEMO_ARM) -> np.ndarray:
    """True lateral error [m] (N,) of the nozzle from the real edge for joints (N, n).

    The nozzle point comes from ``arm.forward``; the error is `Panel.lateral_offset` of that
    point (signed, positive on the left of the real edge; 0 = bead exactly on the edge).
    """
    pose = arm.forward(np.atleast_2d(np.asarray(joint_positions, dtype=float)))
    return panel.lateral_offset(pose[:, :3, 3])
