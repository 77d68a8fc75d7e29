# SPDX-License-Identifier: Apache-2.0
"""The adapter's latest reference window and feedback messages, converted to core types
when a decision needs them (each message is converted once)."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

from ..core.feedback import FeatureVector, FeedbackParser
from ..core.playback import Window
from ..core.session import feedback_valid_since
from .stamps import stamp_to_sec
from .trajectory_conversions import TrajectoryMessageError, msg_to_window


@dataclass(frozen=True)
class WindowInput:
    """The usable window (None: none received, or the latest was refused: ``error``)."""

    window: Window | None
    received: float | None
    error: str | None = None


@dataclass(frozen=True)
class FeedbackInput:
    """The parsed feedback (None: none received or unparsable) and since when it has been
    valid (the watchdog's freshness)."""

    feedback: FeatureVector | None
    valid_since: float | None


class LatestInputs:
    """Holds the latest ``reference/window`` and ``feedback`` messages with their receive
    times (set from the subscription callbacks) and converts them on demand."""

    def __init__(self, joints: Sequence[str], parser: FeedbackParser | None) -> None:
        self._joints = list(joints)
        self._parser = parser
        self._window: tuple[float, Any] | None = None
        self._feedback: tuple[float, Any] | None = None
        self._window_cache: tuple[Any, Window | None] = (None, None)
        self._valid_since: float | None = None

    def set_window(self, received: float, msg: Any) -> None:
        """Keep a received JointTrajectory window message."""
        self._window = (received, msg)

    def set_feedback(self, received: float, msg: Any) -> None:
        """Keep a received JointState feedback message."""
        self._feedback = (received, msg)

    @property
    def window_received(self) -> float | None:
        """When the latest window message arrived (None: none yet)."""
        return self._window[0] if self._window is not None else None

    @property
    def feedback_received(self) -> float | None:
        """When the latest feedback message arrived (None: none yet)."""
        return self._feedback[0] if self._feedback is not None else None

    def window(self) -> WindowInput:
        """The latest window as a core `Window` (refused messages give ``error``)."""
        if self._window is None:
            return WindowInput(None, None)
        received, msg = self._window
        if self._window_cache[0] is msg:  # converted (or refused) before
            return WindowInput(self._window_cache[1], received)
        try:
            window = msg_to_window(msg, self._joints)
        except TrajectoryMessageError as exc:
            self._window_cache = (msg, None)
            return WindowInput(None, None, f"reference/window ignored: {exc}")
        self._window_cache = (msg, window)
        return WindowInput(window, received)

    def feedback(self) -> FeedbackInput:
        """The latest feedback parsed into the configured features."""
        feedback = None
        if self._feedback is not None and self._parser is not None:
            received, msg = self._feedback
            try:
                feedback = self._parser.parse(msg.name, msg.position,
                                              stamp_to_sec(msg.header.stamp))
            except ValueError:
                feedback = None
            if feedback is not None and feedback.all_valid:
                self._valid_since = feedback_valid_since(feedback.stamp, received)
        return FeedbackInput(feedback, self._valid_since)
