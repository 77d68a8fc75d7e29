# SPDX-License-Identifier: Apache-2.0
"""Rebuild the adapter's `SessionInputs` of each decision cycle from a bag.

The live node (``nodes/adapter.py``) keeps the latest ``reference/window`` and ``feedback``
message with its receive time, merges the ``joint_states`` messages per joint
(`adaptive_streamer.io.joint_states.JointStateMerger`; a message that cannot be used is
skipped) and, at each decision, converts them (`AdapterNode._inputs`). `InputRebuilder`
does the same conversions on bag messages (with the same merger),
with the bag's receive times (the recorder's clock, the same ROS time) standing in for the
node's:

* `exact`: with a decision record, the window and feedback messages are the ones whose
  ``header.stamp`` equals the record's ``window_stamp`` / ``feedback_stamp`` (of several
  with that stamp, the last received by the decision time), so the policy sees exactly
  what it saw live; joint states are the latest received by then.
* `nearest`: without records, every input is the latest message received by ``now``.

Staleness and following-error checks use the recorder's receive times; they can differ
from the live checks only for inputs that arrived within about a millisecond of a
threshold.
"""
from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from adaptive_streamer.core.feedback import FeatureVector, FeedbackParser
from adaptive_streamer.core.playback import Window
from adaptive_streamer.core.session import SessionInputs, feedback_valid_since
from adaptive_streamer.io.joint_states import JointStateMerger, cdr_decoder
from adaptive_streamer.io.trajectory_conversions import TrajectoryMessageError

from ..io import fast_cdr
from ..io.bag_io import TopicData
from ..io.fast_cdr import CdrError, Layouts
from ..io.messages import (JOINT_STATE, JointStateReader, MessageError, WindowReader,
                           header_stamps)

NS = 1e-9


class _Stream:
    """One input topic: receive times, bytes, header stamps and a stamp index."""

    def __init__(self, data: TopicData | None, by_stamp: bool = True) -> None:
        self.times = data.times if data is not None else np.empty(0, np.int64)
        self.raw = data.raw if data is not None else []
        self.stamps = header_stamps(self.raw) if by_stamp else np.empty(0)
        self.by_stamp: dict[float, list[int]] = {}
        for i, s in enumerate(self.stamps.tolist()):
            self.by_stamp.setdefault(s, []).append(i)

    def latest(self, now_ns: int) -> int:
        """Index of the last message received at or before ``now_ns`` (-1: none)."""
        return int(np.searchsorted(self.times, now_ns, side="right")) - 1

    def with_stamp(self, stamp: float, now_ns: int) -> int | None:
        """The message stamped ``stamp``: the last received by ``now_ns``, else the first."""
        found = self.by_stamp.get(stamp)
        if not found:
            return None
        best = found[0]
        for i in found:
            if self.times[i] <= now_ns:
                best = i
        return best

    @property
    def end_ns(self) -> int:
        """Receive time of the last message (-1 when empty)."""
        return int(self.times[-1]) if len(self.times) else -1


def _one_structure(raw: list[bytes]) -> bool:
    """True when every joint_states message has the first one's CDR layout (size, counts,
    frame_id and names bytes), so all have the same names (one merger structure key)."""
    if not raw:
        return False
    try:
        lay = Layouts(JOINT_STATE).layout(raw[0])
    except CdrError:
        return False
    return fast_cdr.stacked(raw, lay) is not None


class InputRebuilder:
    """Builds `SessionInputs` for ``joints`` from the input topics of a bag."""

    def __init__(self, joints: Sequence[str], parser: FeedbackParser | None,
                 window: TopicData | None, feedback: TopicData | None,
                 joint_states: TopicData | None) -> None:
        self.joints = tuple(joints)
        self.parser = parser
        self.windows = _Stream(window)
        self.feedback = _Stream(feedback)
        self.joint_states = _Stream(joint_states, by_stamp=False)
        self._window_reader = WindowReader(self.joints)
        self._state_reader = JointStateReader()
        self._window_cache: tuple[int, Window | None] = (-1, None)
        self._joint_decode = cdr_decoder()
        self._merger = JointStateMerger(self.joints, decode=self._joint_decode)
        self._joint_last = -1
        self._joint_uniform = _one_structure(self.joint_states.raw)
        self.valid_since: float | None = None
        self.bad_windows = 0
        self.bad_joint_states = 0
        self.window_errors: list[str] = []

    # ------------------------------------------------------------------ conversions
    def _window(self, i: int) -> Window | None:
        if self._window_cache[0] == i:
            return self._window_cache[1]
        try:
            w: Window | None = self._window_reader.read(self.windows.raw[i])
        except TrajectoryMessageError as exc:
            self.bad_windows += 1
            if len(self.window_errors) < 5:
                self.window_errors.append(f"reference/window message {i}: {exc}")
            w = None
        self._window_cache = (i, w)
        return w

    def _feedback(self, parser: FeedbackParser, i: int) -> tuple[float, FeatureVector | None]:
        rx = int(self.feedback.times[i]) * NS
        try:
            names, position, _, sec, nsec = self._state_reader.read(self.feedback.raw[i])
            return rx, parser.parse(names, position, sec + nsec * 1e-9)
        except (ValueError, MessageError):
            return rx, None

    def _latest_joint(self, now_ns: int) -> tuple[float, np.ndarray, np.ndarray] | None:
        """As the node: every joint_states message received by ``now_ns`` merged per joint
        (oldest received, stamp per joint, positions); None until every joint was seen."""
        i = self.joint_states.latest(now_ns)
        if i < self._joint_last:  # asked for an earlier time: merge again from the start
            self._merger = JointStateMerger(self.joints, decode=self._joint_decode)
            self._joint_last = -1
        # of messages with the same names only the latest received counts (the merger
        # keeps the newest per structure): with one structure, only that one is added
        first = max(self._joint_last + 1, i if self._joint_uniform else 0)
        for k in range(first, i + 1):
            self._merger.add(self.joint_states.raw[k], int(self.joint_states.times[k]) * NS)
        self._joint_last = i
        js = self._merger.state()
        self.bad_joint_states += self._merger.take_rejected()
        return None if js is None else (js.received, js.stamps, js.position)

    def _assemble(self, wi: int | None, fi: int | None, now_ns: int) -> SessionInputs:
        window, window_rx = None, None
        if wi is not None:
            window = self._window(wi)
            window_rx = int(self.windows.times[wi]) * NS if window is not None else None
        feedback = None
        if fi is not None and self.parser is not None:
            rx, feedback = self._feedback(self.parser, fi)
            if feedback is not None and feedback.all_valid:
                self.valid_since = feedback_valid_since(feedback.stamp, rx)
        js = self._latest_joint(now_ns)
        return SessionInputs(window, window_rx, feedback, self.valid_since,
                             js[2] if js else None, js[1] if js else None,
                             js[0] if js else None)

    # ------------------------------------------------------------------ public
    def exact(self, now_ns: int, window_stamp: float, feedback_stamp: float
              ) -> tuple[SessionInputs, list[str]]:
        """Inputs of a recorded decision; also the inputs not found in the bag."""
        missing: list[str] = []
        wi: int | None = None
        if not math.isnan(window_stamp):
            wi = self.windows.with_stamp(window_stamp, now_ns)
            if wi is None:
                missing.append("reference/window")
                latest = self.windows.latest(now_ns)
                wi = latest if latest >= 0 else None
        fi: int | None = None
        if self.parser is not None:
            if not math.isnan(feedback_stamp):
                fi = self.feedback.with_stamp(feedback_stamp, now_ns)
                if fi is None:
                    missing.append("feedback")
                    latest = self.feedback.latest(now_ns)
                    fi = latest if latest >= 0 else None
            else:  # no stamp: nothing was valid live (same bytes), or no feedback was read
                latest = self.feedback.latest(now_ns)
                fi = latest if latest >= 0 else None
        return self._assemble(wi, fi, now_ns), missing

    def nearest(self, now_ns: int) -> SessionInputs:
        """Inputs as the latest messages received by ``now_ns`` (no decision record)."""
        wi = self.windows.latest(now_ns)
        fi = self.feedback.latest(now_ns)
        return self._assemble(wi if wi >= 0 else None, fi if fi >= 0 else None, now_ns)

    def measured_at(self, now_ns: int) -> np.ndarray | None:
        """Positions of the latest valid joint state by ``now_ns``."""
        js = self._latest_joint(now_ns)
        return None if js is None else js[2]
