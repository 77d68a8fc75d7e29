# SPDX-License-Identifier: Apache-2.0
"""The committed command plan and the stream clock.

`CommandPlan` keeps the committed constant-jerk segments (start time, start state, decision)
and samples them at any nominal time: the stream publishes the plan, never the wake-up time
of a timer, so timer jitter never becomes position noise. It also answers "what was
commanded at time t" for following-error monitoring with a driver latency.

`StreamClock` turns a wake-up time into the tick index to publish (nominal time
``t0 + i / rate``) and counts ticks that were skipped because a wake-up came late.

`StreamTimeline` is the live stream's time: ROS time read once at an anchor, carried
forward on the monotonic clock, so a step of the system clock neither stops nor bunches the
stream (its stamps stay ROS time as of the anchor).
"""
from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, replace

import numpy as np

from .segment import MotionState


class StreamError(RuntimeError):
    """The plan cannot answer (time before its first or after its last segment)."""


@dataclass(frozen=True)
class Segment:
    """One committed period: from ``state`` at ``start`` with decision ``u`` over ``period``."""

    start: float
    state: MotionState
    u: np.ndarray


class CommandPlan:
    """Committed segments, oldest first, with sampling at nominal times.

    Args:
        period: decision period T [s].
        keep: how many past segments to keep for delayed look-ups.
    """

    def __init__(self, period: float, keep: int = 64) -> None:
        self.period = float(period)
        self._segments: deque[Segment] = deque(maxlen=keep)

    def clear(self) -> None:
        """Forget every segment."""
        self._segments.clear()

    def shift(self, dt: float) -> None:
        """Move every kept segment ``dt`` seconds later."""
        self._segments = deque((replace(s, start=s.start + dt) for s in self._segments),
                               maxlen=self._segments.maxlen)

    def commit(self, segment: Segment) -> None:
        """Append a segment; it must start where the previous one ends."""
        if self._segments:
            last = self._segments[-1]
            expected = last.start + self.period
            if abs(segment.start - expected) > 1e-6 * max(1.0, self.period):
                raise StreamError(f"segment starts at {segment.start:.6f} s, expected {expected:.6f} s")
        self._segments.append(segment)

    @property
    def empty(self) -> bool:
        """True when nothing is committed."""
        return not self._segments

    @property
    def end(self) -> float:
        """Time the last committed segment ends."""
        if not self._segments:
            raise StreamError("no segment committed")
        return self._segments[-1].start + self.period

    @property
    def start(self) -> float:
        """Start time of the oldest kept segment."""
        if not self._segments:
            raise StreamError("no segment committed")
        return self._segments[0].start

    def segment_at(self, t: float) -> Segment:
        """The segment covering time ``t`` (start <= t < start + T; the last one up to its end)."""
        segs = self._segments
        if not segs:
            raise StreamError("no segment committed")
        first = segs[0].start
        k = math.floor((t - first) / self.period + 1e-9)
        if k < 0 or t > self.end + 1e-9:
            raise StreamError(f"time {t:.6f} s outside the plan [{first:.6f}, {self.end:.6f}] s")
        k = min(k, len(segs) - 1)
        # The index from the period is one off near a boundary when the float times round
        # the other way (absolute ROS times resolve 2.4e-7 s) or the starts, each the previous
        # one plus T in float64, have drifted from first + k T: the starts decide.
        if k + 1 < len(segs) and t >= segs[k + 1].start:
            k += 1
        elif k > 0 and t < segs[k].start:
            k -= 1
        return segs[k]

    def sample(self, t: float) -> MotionState:
        """Commanded position, velocity and acceleration at nominal time ``t``."""
        seg = self.segment_at(t)
        p, v, a = seg.state
        tau = t - seg.start
        j = (seg.u - a) / self.period
        return MotionState(p + tau * (v + tau * (0.5 * a + tau * j / 6.0)),
                           v + tau * (a + 0.5 * j * tau), a + j * tau)

    def jerk_at(self, t: float) -> np.ndarray:
        """Commanded jerk at time ``t``."""
        seg = self.segment_at(t)
        return (seg.u - seg.state.acceleration) / self.period


class StreamClock:
    """Nominal tick times ``t0 + i / rate`` and skipped-tick accounting.

    `due(now)` returns the index of the latest tick whose nominal time has come; ticks
    between the previously published one and it were skipped (a late wake-up) and are
    counted.
    """

    def __init__(self, t0: float, rate: float) -> None:
        if not (math.isfinite(rate) and rate > 0):
            raise StreamError(f"stream rate must be positive, got {rate}")
        self.t0 = float(t0)
        self.rate = float(rate)
        self.last_index = -1
        self.skipped = 0

    def time_of(self, index: int) -> float:
        """Nominal time of tick ``index``."""
        return self.t0 + index / self.rate

    def due(self, now: float) -> int | None:
        """Index of the tick to publish at wake-up time ``now`` (None if none is due yet)."""
        # a tick is due from its nominal time on, to within the float64 resolution of the
        # absolute times (2.4e-7 s at today's epoch, far above a 1e-6 tick tolerance)
        i = math.floor((now - self.t0) * self.rate + 1e-6 + 4.0 * math.ulp(now) * self.rate)
        if i <= self.last_index:
            return None
        if self.last_index >= 0 and i > self.last_index + 1:
            self.skipped += i - self.last_index - 1
        self.last_index = i
        return i


class StreamTimeline:
    """Seconds of ROS time carried forward on a monotonic clock from an anchor.

    Args:
        ros_ns: ROS time at the anchor [ns].
        monotonic_ns: the monotonic clock at the same instant [ns] (``time.monotonic_ns``).
    """

    def __init__(self, ros_ns: int, monotonic_ns: int) -> None:
        self._ros_ns, self._mono_ns = int(ros_ns), int(monotonic_ns)

    def ns(self, monotonic_ns: int) -> int:
        """The timeline at monotonic time ``monotonic_ns`` [ns], in integer nanoseconds."""
        return self._ros_ns + (int(monotonic_ns) - self._mono_ns)

    def at(self, monotonic_ns: int) -> float:
        """The timeline at monotonic time ``monotonic_ns``, in seconds."""
        return self.ns(monotonic_ns) * 1e-9
