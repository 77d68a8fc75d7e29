# SPDX-License-Identifier: Apache-2.0
"""Whether the adapter's inputs have been fresh, and the feedback changing, for a hold time
(the condition of a reset; no ROS).

The node notes every message of an input as it arrives (`InputHold.note`: the receive time,
for the feedback also its values). An input is *fresh since* the first message after the
last gap longer than its timeout (or after the last message with a value that is not
finite); the feedback is *changing since* the first change of its values after the last
stretch of identical values longer than the feedback timeout (all the values of the
message, also features the policy does not read: a sensor's sample counter counts). A
reset is refused (`InputHold.problems`) unless each input the policy uses has been fresh,
and the feedback changing, for ``reset_hold`` seconds: a node that republishes a dead
sensor's last values does not make the feedback look alive again.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from .provenance import InputTopic


@dataclass
class _Track:
    """What is known of one input's messages."""

    last: float | None = None           # latest receive time
    fresh_since: float | None = None    # first message after the latest gap
    values: np.ndarray | None = None    # latest values (feedback)
    last_change: float | None = None    # latest change of the values
    changing_since: float | None = None  # first change after the latest identical stretch


class InputHold:
    """Since when each input has been fresh (and the feedback changing)."""

    def __init__(self) -> None:
        self._tracks = {topic: _Track() for topic in InputTopic}

    def note(self, topic: InputTopic, received: float, timeout: float,
             values: Sequence[float] | None = None) -> None:
        """One message of ``topic`` arrived at ``received`` [s]; ``timeout`` is the input's
        watchdog timeout, ``values`` the feedback's values (None for the other inputs)."""
        track = self._tracks[topic]
        valid = values is None or bool(np.all(np.isfinite(np.asarray(values, float))))
        if not valid or track.last is None or received - track.last > timeout:
            track.fresh_since = received if valid else None
        track.last = received if valid else None
        if values is None or not valid:
            track.values = None
            return
        vals = np.asarray(values, float)
        if track.values is None or vals.shape != track.values.shape \
                or not np.array_equal(vals, track.values):
            if track.values is None or track.last_change is None \
                    or received - track.last_change > timeout:
                track.changing_since = received
            track.last_change = received
        track.values = vals.copy()

    def problems(self, now: float, hold: float, timeouts: Mapping[InputTopic, float],
                 topics: Sequence[InputTopic]) -> list[str]:
        """Why the inputs ``topics`` have not been fresh (the feedback changing) for
        ``hold`` seconds at ``now`` (empty: they have; ``hold`` 0 turns the check off)."""
        if hold <= 0.0:
            return []
        out = []
        for topic in topics:
            track, timeout = self._tracks[topic], timeouts[topic]
            if track.last is None or track.fresh_since is None or now - track.last > timeout:
                out.append(f"'{topic.value}' is not fresh (reset_hold {hold:g} s)")
            elif now - track.fresh_since < hold:
                out.append(f"'{topic.value}' has been fresh for only "
                           f"{now - track.fresh_since:.3f} s (reset_hold {hold:g} s)")
            elif topic is InputTopic.FEEDBACK:
                out += _changing_problem(track, now, hold, timeout)
        return out


def _changing_problem(track: _Track, now: float, hold: float, timeout: float) -> list[str]:
    if track.last_change is None or now - track.last_change > timeout:
        since = "" if track.last_change is None else f" for {now - track.last_change:.3f} s"
        return [f"the feedback values have not changed{since} (they must change at least "
                f"every feedback_timeout {timeout:g} s for reset_hold {hold:g} s)"]
    if track.changing_since is None or now - track.changing_since < hold:
        return [f"the feedback values have been changing for only "
                f"{now - (track.changing_since or now):.3f} s (reset_hold {hold:g} s)"]
    return []
