# SPDX-License-Identifier: Apache-2.0
"""Lock-on, the pass's start condition (core, no ROS): it locks only after `hold` seconds of
fresh readings within the tolerance, restarts on a bad reading or a gap, and fails after
the timeout with the reason."""
import math

import numpy as np
import pytest

from adaptive_streamer.core.lock_on import LockOn, LockOnConfig, LockOnError, LockState

CFG = LockOnConfig("edge_offset", tolerance=1e-3, hold=0.5, timeout=3.0, max_age=0.05)


def _run(values, dt=0.01, t0=10.0):
    lock = LockOn(CFG)
    lock.begin(t0)
    states = []
    for k, v in enumerate(values):
        t = t0 + (k + 1) * dt
        lock.add(t, v)
        states.append(lock.judge(t).state)
    return lock, states


def test_locks_after_hold_of_settled_readings():
    _, states = _run([5e-3] * 30 + [2e-4] * 80)
    first = states.index(LockState.LOCKED)
    # readings 30..80 span 0.5 s (51 readings 10 ms apart): the lock comes with the 51st
    assert first == 30 + 50, first


def test_one_bad_reading_or_a_gap_restarts_the_hold():
    _, states = _run([2e-4] * 40 + [3e-3] + [2e-4] * 60)
    assert states.index(LockState.LOCKED) == 41 + 50
    lock = LockOn(CFG)
    lock.begin(0.0)
    for t in np.arange(1, 41) * 0.01:
        lock.add(t, 0.0)
    for t in 0.5 + np.arange(1, 30) * 0.01:   # 100 ms without a reading, then 0.29 s more
        lock.add(t, 0.0)
        assert lock.judge(t).state is LockState.WAITING


def test_nan_readings_never_lock_and_the_timeout_names_the_cause():
    lock, states = _run([math.nan] * 400)
    assert states[-1] is LockState.FAILED and "no lock-on within 3 s" in lock.judge(20).reason
    lock, states = _run([4e-3] * 400)
    assert states[-1] is LockState.FAILED
    lock = LockOn(CFG)
    lock.begin(0.0)
    verdict = lock.judge(3.5)
    assert verdict.state is LockState.FAILED and "no reading arrived" in verdict.reason


def test_stale_readings_do_not_lock():
    lock = LockOn(CFG)
    lock.begin(0.0)
    for t in np.arange(1, 61) * 0.01:
        lock.add(t, 0.0)
    assert lock.judge(0.7).state is LockState.WAITING   # the last reading is 100 ms old


@pytest.mark.parametrize("kw, words", [
    (dict(tolerance=0.0), "'tolerance' must be a finite number > 0"),
    (dict(hold=math.inf), "'hold' must be a finite number > 0"),
    (dict(timeout=0.4), "must be longer than 'hold'"),
])
def test_bad_settings_are_refused(kw, words):
    base = dict(feature="edge_offset", tolerance=1e-3, hold=0.5, timeout=3.0)
    with pytest.raises(LockOnError, match=words):
        LockOnConfig(**{**base, **kw})
