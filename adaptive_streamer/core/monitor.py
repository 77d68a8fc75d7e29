# SPDX-License-Identifier: Apache-2.0
"""Watching a setpoint stream from outside the adapter (the ``watchdog`` node's core).

`StreamMonitor` receives what went out and what the driver measured, and applies the same
rules the adapter applies to itself, with the same code:

* every setpoint goes through a `SetpointGuard` (finite, within the position, velocity and
  acceleration limits, continuous with the previous one under the velocity, acceleration
  and jerk limits);
* every measured joint state is compared with the command ``command_latency`` earlier by
  `Watchdog.following` (threshold ``following_error``); the command at that time is
  interpolated linearly between the two received setpoints around it (the stream is at
  125-1000 Hz, so the interpolation error is below ``a h^2 / 8``, micro-radians). A joint
  state older than the kept setpoints, or newer than the last one, is not judged.

Verdicts are counted and the latest reason of each kind is kept for diagnostics.
"""
from __future__ import annotations

import bisect
from collections import deque
from dataclasses import dataclass

import numpy as np

from .clock_offset import DriverClock
from .guard import SetpointGuard
from .limits import JointLimits
from .segment import MotionState
from .watchdog import Watchdog, WatchdogConfig


class MonitorError(ValueError):
    """A monitor input has the wrong shape or is out of order."""


@dataclass
class MonitorStats:
    """Counters and the latest reasons."""

    setpoints: int = 0
    setpoint_violations: int = 0
    last_setpoint_violation: str = ""
    joint_states: int = 0
    judged: int = 0
    following_violations: int = 0
    following_error_max: float = 0.0
    last_following_violation: str = ""


class StreamMonitor:
    """Checks setpoints and joint states for ``limits`` (joint order of ``limits.names``).

    Args:
        limits: the hardware limits the stream must respect.
        config: watchdog thresholds (``following_error``, ``command_latency`` are used).
        history: setpoints kept for the following-error look-up.
    """

    def __init__(self, limits: JointLimits, config: WatchdogConfig, history: int = 1000) -> None:
        self.limits = limits
        self.config = config
        self.guard = SetpointGuard(limits)
        self.watchdog = Watchdog(config, limits.names)
        self.stats = MonitorStats()
        self._times: deque[float] = deque(maxlen=history)
        self._positions: deque[np.ndarray] = deque(maxlen=history)
        self._n = len(limits)
        self.driver_clock = DriverClock()

    def setpoint(self, t: float, sp: MotionState) -> str | None:
        """Check one setpoint at nominal time ``t``; the reason when it fails (counted)."""
        if any(np.shape(x) != (self._n,) for x in sp):
            raise MonitorError(f"setpoint must hold {self._n} positions, velocities and "
                               f"accelerations (joints {list(self.limits.names)})")
        self.stats.setpoints += 1
        reason = self.guard.check(t, sp)
        if reason is not None:
            self.stats.setpoint_violations += 1
            self.stats.last_setpoint_violation = reason
        if not self._times or t > self._times[-1]:
            self._times.append(t)
            self._positions.append(np.array(sp.position, float))
        return reason

    def joint_state(self, stamp: float, positions: np.ndarray,
                    present: np.ndarray | None = None,
                    arrival: float | None = None) -> str | None:
        """Compare measured ``positions`` taken at ``stamp`` with the command
        ``command_latency`` earlier; the reason when over ``following_error`` (counted).

        ``present`` (bool per joint) limits the comparison to the joints a message carried
        (a driver may send the joints in several messages). ``arrival`` (this computer's
        clock) feeds the driver-clock estimate (`adaptive_streamer.core.clock_offset`):
        stamps from an unsynchronised driver clock are mapped onto this one."""
        positions = np.asarray(positions, float)
        if positions.shape != (self._n,):
            raise MonitorError(f"joint state must hold {self._n} positions (joints "
                               f"{list(self.limits.names)}), got shape {positions.shape}")
        self.stats.joint_states += 1
        if arrival is not None:
            self.driver_clock.update(arrival, stamp)
        commanded = self.commanded_at(stamp + self.driver_clock.correction
                                      - self.config.command_latency)
        if commanded is None:
            return None
        self.stats.judged += 1
        if present is not None:
            positions = np.where(present, positions, commanded)
        err, reason = self.watchdog.following(positions, commanded)
        self.stats.following_error_max = max(self.stats.following_error_max, err)
        if reason is not None:
            self.stats.following_violations += 1
            self.stats.last_following_violation = reason
        return reason

    def commanded_at(self, t: float) -> np.ndarray | None:
        """Commanded positions at ``t`` from the received setpoints (None outside them)."""
        times = self._times
        if not times or t < times[0] or t > times[-1]:
            return None
        k = bisect.bisect_right(times, t)
        if k >= len(times):
            return self._positions[-1].copy()
        t0, t1 = times[k - 1], times[k]
        w = (t - t0) / (t1 - t0)
        return (1.0 - w) * self._positions[k - 1] + w * self._positions[k]
