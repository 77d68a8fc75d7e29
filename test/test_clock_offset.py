# SPDX-License-Identifier: Apache-2.0
"""The driver-clock estimate: the smallest arrival - stamp over a sliding window (the
one-way offset estimate, common practice), against a brute-force minimum."""
import math

import numpy as np

from adaptive_streamer.core.clock_offset import DriverClock


def test_sliding_minimum_matches_brute_force_and_forgets_old_arrivals():
    rng = np.random.default_rng(3)
    clock = DriverClock(window=2.0, tolerance=0.05)
    assert math.isnan(clock.estimate) and clock.correction == 0.0
    arrivals = np.cumsum(rng.uniform(0.002, 0.06, 400))
    offset = np.where(arrivals < 8.0, -0.5, 0.2)            # the driver's clock is reset
    delays = rng.exponential(0.004, arrivals.size) + 0.0005  # transport: never negative
    stamps = arrivals - delays - offset
    for k, (a, st) in enumerate(zip(arrivals, stamps)):
        clock.update(a, st)
        clock.update(a, st)    # the same message seen again changes nothing
        recent = (arrivals[: k + 1] >= a - 2.0)
        expected = float(np.min((arrivals[: k + 1] - stamps[: k + 1])[recent]))
        assert clock.estimate == expected
    # 2 s after the reset only the new offset is left: offset + shortest delay
    assert abs(clock.correction - 0.2) < 0.002


def test_synchronised_clocks_are_not_corrected():
    clock = DriverClock(window=2.0, tolerance=0.05)
    for i in range(100):
        clock.update(i * 0.01, i * 0.01 - 0.003)
    assert abs(clock.estimate - 0.003) < 1e-12 and clock.correction == 0.0
