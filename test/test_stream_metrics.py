# SPDX-License-Identifier: Apache-2.0
"""Checks of a received setpoint stream (core/stream_metrics.py)."""
import numpy as np

from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.stream_metrics import check_stream, time_resolution_of

LIMITS = JointLimits(["a", "b"], [-3.0, -3.0], [3.0, 3.0], [2.0, 2.0], [10.0, 10.0],
                     [100.0, 100.0])
RATE = 250.0


def constant_jerk_stream(t0: float, jerk: float, n: int = 200):
    """Samples of p = j t^3 / 6 (closed form of a constant-jerk motion from rest, common
    practice) at the stream's ticks, on both joints."""
    t = t0 + np.arange(n) / RATE
    s = t - t0
    p = jerk * s ** 3 / 6.0
    v = jerk * s ** 2 / 2.0
    a = jerk * s
    return t, *(np.stack([x, -x], axis=1) for x in (p, v, a))


def test_constant_jerk_at_the_limit_is_clean_and_over_it_is_counted():
    t, p, v, a = constant_jerk_stream(0.0, 100.0, n=20)     # a reaches 7.6 < 10
    rep = check_stream(t, p, v, a, LIMITS, RATE)
    assert rep.total_violations == 0, rep.violations
    assert rep.skipped_ticks == 0
    t, p, v, a = constant_jerk_stream(0.0, 101.0, n=20)
    assert check_stream(t, p, v, a, LIMITS, RATE).violations["jerk"] == 19


def test_skipped_ticks_are_counted_from_the_stamps():
    t, p, v, a = constant_jerk_stream(0.0, 50.0, n=20)
    keep = np.r_[0:5, 8:20]                                 # ticks 5, 6, 7 missing
    rep = check_stream(t[keep], p[keep], v[keep], a[keep], LIMITS, RATE)
    assert rep.skipped_ticks == 3 and rep.total_violations == 0, rep


def test_time_resolution_of_epoch_stamps():
    # IEEE 754 binary64: numbers in [2^30, 2^31) are 2^(30-52) = 2^-22 s apart (common
    # practice); ROS times of 2026 (1.8e9 s) lie there
    assert time_resolution_of(np.array([1.0, 1.796e9])) == 2.0 ** -22
    assert time_resolution_of(np.zeros(0)) == 0.0


def test_epoch_stamps_need_their_resolution():
    """A constant-jerk stream at the jerk limit whose ticks are float64 epoch times, as the
    adapter's are: the stamps' rounding alone makes some steps look over the limit, and the
    resolution allowance takes that back."""
    t0 = 1.796e9
    t = t0 + np.arange(200) / RATE                          # rounded to 2^-22 s
    s = np.arange(200) / RATE                                # the exact motion times
    a = np.stack([np.minimum(100.0 * s, 10.0)] * 2, axis=1)
    v = np.cumsum(np.r_[np.zeros((1, 2)), 0.5 * (a[1:] + a[:-1]) / RATE], axis=0)
    p = np.cumsum(np.r_[np.zeros((1, 2)), 0.5 * (v[1:] + v[:-1]) / RATE
                        - (a[1:] - a[:-1]) / RATE ** 2 / 12.0], axis=0)
    loose = check_stream(t, p, v, a, LIMITS, RATE, time_resolution=time_resolution_of(t))
    assert loose.violations["jerk"] == 0, loose.worst
    strict = check_stream(t, p, v, a, LIMITS, RATE)
    assert strict.violations["jerk"] > 0
