# SPDX-License-Identifier: Apache-2.0
"""The offset of a driver's clock from this computer's, estimated from its joint_states.

A driver stamps ``joint_states`` on its own clock. When that clock is not synchronised with
the adapter's (no PTP or NTP between the two computers), every stamp is off by about the
same amount, often hundreds of milliseconds, and comparing the measured positions with
what was commanded "at the stamp" compares them with the wrong command, or with no command
at all (a stamp outside the kept plan).

Estimate (common practice for one-way clock offset): the smallest ``arrival - stamp``
over the last `WINDOW` seconds. Transport delays are never negative, so that minimum is the
offset plus the shortest delay seen, which on a working network is a few milliseconds.
An estimate within `TOLERANCE` of zero counts as synchronised clocks (the stamps are used as
they are, so a synchronised driver's stamps keep their exact meaning); beyond it, stamps
are mapped onto this computer's clock by adding the estimate.
"""
from __future__ import annotations

import math
from collections import deque

WINDOW = 2.0       # [s] of arrivals the minimum is taken over
TOLERANCE = 0.05   # [s] |estimate| up to which the clocks count as synchronised


class DriverClock:
    """Running estimate of ``arrival - stamp`` (sliding-window minimum, O(1) amortised)."""

    def __init__(self, window: float = WINDOW, tolerance: float = TOLERANCE) -> None:
        self.window = window
        self.tolerance = tolerance
        self._low: deque[tuple[float, float]] = deque()   # (arrival, delta), delta increasing
        self._last_arrival = -math.inf

    def update(self, arrival: float, stamp: float) -> None:
        """Add one message's arrival time (this computer's clock) and stamp (the driver's)."""
        if arrival == self._last_arrival:
            return   # the same message again (decisions outpace a slow driver)
        self._last_arrival = arrival
        delta = arrival - stamp
        while self._low and self._low[-1][1] >= delta:
            self._low.pop()
        self._low.append((arrival, delta))
        while self._low[0][0] < arrival - self.window:
            self._low.popleft()

    @property
    def estimate(self) -> float:
        """Smallest ``arrival - stamp`` in the window [s] (NaN before any message)."""
        return self._low[0][1] if self._low else math.nan

    @property
    def correction(self) -> float:
        """What to add to a stamp to put it on this computer's clock: 0 for synchronised
        clocks (or before any message), else the estimate."""
        est = self.estimate
        return est if math.isfinite(est) and abs(est) > self.tolerance else 0.0
