# SPDX-License-Identifier: Apache-2.0
"""Lock-on: the start condition of a process pass (ROS-free).

Before a pass starts, the task feedback must show that the correction has settled: every
reading of the feature over the last ``hold`` seconds fresh (no older than ``max_age`` when
judged, no gap longer than ``max_age`` between readings) and within ``tolerance`` of zero.
If that does not happen within ``timeout`` seconds of the request, the start fails with the
reason. In a real cell this is the seam-finding step before the process starts.

    lock = LockOn(LockOnConfig("edge_offset", tolerance=1e-3, hold=0.5, timeout=10.0))
    lock.begin(t)
    lock.add(t_reading, value)      # each feedback reading (its time, its value)
    verdict = lock.judge(t)         # LockState.WAITING / LOCKED / FAILED, with the reason
"""
from __future__ import annotations

import enum
import math
from dataclasses import dataclass


class LockOnError(ValueError):
    """A lock-on setting is out of range."""


class LockState(enum.Enum):
    """Where a lock-on request stands."""

    IDLE = "idle"            # not requested
    WAITING = "waiting"      # requested, not settled yet
    LOCKED = "locked"        # settled: the pass may start
    FAILED = "failed"        # not settled within the timeout


@dataclass(frozen=True)
class LockOnConfig:
    """Feature name, tolerance (in the feature's unit), hold, timeout and max_age [s]."""

    feature: str
    tolerance: float
    hold: float
    timeout: float
    max_age: float = 0.1

    def __post_init__(self) -> None:
        if not self.feature:
            raise LockOnError("lock-on: 'feature' must name a feedback feature")
        for name in ("tolerance", "hold", "timeout", "max_age"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0.0):
                raise LockOnError(f"lock-on: '{name}' must be a finite number > 0, got {value}")
        if self.timeout <= self.hold:
            raise LockOnError(f"lock-on: 'timeout' ({self.timeout:g} s) must be longer than "
                              f"'hold' ({self.hold:g} s)")


@dataclass(frozen=True)
class LockVerdict:
    """A judgement: the state, and why (the reason of a failure, or what is awaited)."""

    state: LockState
    reason: str = ""


class LockOn:
    """Judges the start condition from the feature's readings (see the module docstring)."""

    def __init__(self, config: LockOnConfig) -> None:
        self.config = config
        self.state = LockState.IDLE
        self._requested = math.nan
        self._since = math.nan        # start of the current run of good readings
        self._last = math.nan         # time of the last reading
        self._last_value = math.nan
        self._worst = 0.0             # largest |value| since the request
        self._final = LockVerdict(LockState.IDLE)   # the verdict once LOCKED or FAILED

    def begin(self, t: float) -> None:
        """A start was requested at ``t``: judge from the readings after it."""
        self.state = LockState.WAITING
        self._requested = t
        self._since = math.nan
        self._last = math.nan
        self._last_value = math.nan
        self._worst = 0.0

    def add(self, t: float, value: float) -> None:
        """A reading of the feature taken at ``t`` (NaN: invalid)."""
        if self.state is not LockState.WAITING or not t >= self._requested:
            return
        good = math.isfinite(value) and abs(value) <= self.config.tolerance
        gap = t - self._last if math.isfinite(self._last) else 0.0
        if not good or gap > self.config.max_age:
            self._since = t if good else math.nan
        elif math.isnan(self._since):
            self._since = t
        self._last, self._last_value = t, value
        if math.isfinite(value):
            self._worst = max(self._worst, abs(value))

    def judge(self, t: float) -> LockVerdict:
        """The state at ``t`` (it moves to LOCKED or FAILED here, once; later calls return
        that verdict)."""
        cfg = self.config
        if self.state is not LockState.WAITING:
            return self._final
        fresh = math.isfinite(self._last) and t - self._last <= cfg.max_age
        if fresh and math.isfinite(self._since) and self._last - self._since >= cfg.hold:
            self.state = LockState.LOCKED
            self._final = LockVerdict(self.state, f"{cfg.feature} within {cfg.tolerance:g} "
                                                  f"for {cfg.hold:g} s")
            return self._final
        if t - self._requested <= cfg.timeout:
            return LockVerdict(self.state, f"waiting for {cfg.feature} within "
                                           f"{cfg.tolerance:g} for {cfg.hold:g} s")
        self.state = LockState.FAILED
        if not math.isfinite(self._last):
            why = "no reading arrived"
        elif not fresh:
            why = f"the last reading is {t - self._last:.3f} s old (max_age {cfg.max_age:g} s)"
        else:
            why = (f"the last reading is {self._last_value:.6g}, the largest "
                   f"{self._worst:.6g} (tolerance {cfg.tolerance:g})")
        self._final = LockVerdict(self.state, f"no lock-on within {cfg.timeout:g} s: {why}")
        return self._final
