# SPDX-License-Identifier: Apache-2.0
"""The demo cell's task metric for replay and batch replay: the true lateral error of the
replayed nozzle path (a replay hook, named ``adaptive_streamer.demo.replay_metric:lateral_error_hook``)."""
from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from ..sim.config import load_scenario
from ..sim.metrics import lateral_error

if TYPE_CHECKING:
    from ..replay.compare import Stream
    from ..replay.run import ReplayResult

HOOK = "adaptive_streamer.demo.replay_metric:lateral_error_hook"


def lateral_error_hook(result: "ReplayResult", stream: "Stream", scenario: str | None = None,
                       seed: int | None = None, offset_mm: float | None = None,
                       angle_deg: float | None = None) -> dict[str, float]:
    """The demo's task metric: the true lateral error of the commanded nozzle path [mm].

    The panel is the scenario's real placement (drawn from ``seed``, or the given offset
    and angle); the nozzle point is the demo arm's forward kinematics of the replayed
    setpoint positions while the adapter was following.
    """
    panel = load_scenario(scenario).panel(seed, offset_mm, angle_deg)
    follow = [(d.time, d.time + result.setup.period) for d in result.decisions
              if d.mode == "following"]
    if not follow or not len(stream.t):
        return {"lateral_rms_mm": math.nan, "lateral_max_mm": math.nan}
    starts = np.array([a for a, _ in follow])
    k = np.searchsorted(starts, stream.t, side="right") - 1
    inside = (k >= 0) & (stream.t < starts[np.maximum(k, 0)] + result.setup.period)
    if not inside.any():
        return {"lateral_rms_mm": math.nan, "lateral_max_mm": math.nan}
    e = lateral_error(stream.p[inside], panel) * 1e3
    return {"lateral_rms_mm": float(np.sqrt(np.mean(e * e))),
            "lateral_max_mm": float(np.max(np.abs(e)))}
