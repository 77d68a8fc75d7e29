# SPDX-License-Identifier: Apache-2.0
"""The demo's adapter process faults without DDS: the ``--inject`` specs of ``adapter_stall``
and ``adapter_crash`` (errors name the option and say what was expected), the count of late
decisions a stall makes (checked against a decision-by-decision model written here), the
stop and arm behaviour expected per output, and the followed-motion figures on invented
motions (a rest, a repeated stream command, a position step)."""
from __future__ import annotations

import argparse
import math
import random

import numpy as np
import pytest

from adaptive_streamer.core.adapter_setup import build_session
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.demo.config import build_config
from adaptive_streamer.demo.faults import (NO_STOP, STALL_SLACK, FaultRefused, late_decisions,
                                           plan_faults)
from adaptive_streamer.demo.followed import REST_MIN, after_injection, followed_motion
from adaptive_streamer.demo.options import (Injection, OptionError, add_arguments, describe,
                                            parse_injection)
from adaptive_streamer.io.params_files import load_params_file


def test_fault_specs_with_and_without_a_length_parse():
    assert parse_injection("adapter_stall:0.3@4") == Injection("adapter_stall", 4.0, 0.3)
    crash = parse_injection("adapter_crash@2.5")
    assert (crash.fault, crash.at) == ("adapter_crash", 2.5) and math.isnan(crash.length)
    assert math.isnan(parse_injection("nan_policy@1").length)


@pytest.mark.parametrize("spec, words", [
    ("adapter_stall@4", ["needs its length", "adapter_stall:SECONDS@SECONDS"]),
    ("adapter_stall:abc@4", ["the length 'abc'", "not a number of seconds"]),
    ("adapter_stall:0@4", ["finite number of seconds > 0", "got 0"]),
    ("adapter_stall:-0.2@4", ["finite number of seconds > 0", "got -0.2"]),
    ("adapter_stall:inf@4", ["finite number of seconds > 0"]),
    ("adapter_stall:nan@4", ["finite number of seconds > 0"]),
    ("adapter_crash:0.3@4", ["takes no length", "adapter_crash@SECONDS"]),
    ("adapter_stall:0.3", ["expected FAULT@SECONDS", "FAULT:SECONDS@SECONDS",
                           "adapter_stall"]),
    ("adapter_stall:0.3@soon", ["'soon' is not a number of seconds"]),
    ("adapter_stall:0.3@inf", ["the time must be a finite number of seconds >= 0"]),
    ("adapter_crash@-1", ["the time must be a finite number of seconds >= 0"]),
    ("adapter_hang@1", ["expected FAULT@SECONDS", "adapter_crash", "adapter_stall"]),
])
def test_bad_fault_specs_name_the_option_and_what_was_expected(spec, words):
    with pytest.raises(OptionError) as err:
        parse_injection(spec)
    text = str(err.value)
    assert text.startswith(f"--inject '{spec}': "), text
    for w in words:
        assert w in text, (w, text)


def test_the_help_shows_how_a_length_is_written_and_the_printout_the_length():
    parser = argparse.ArgumentParser()
    add_arguments(parser)
    assert "(written adapter_stall:SECONDS@T)" in " ".join(parser.format_help().split())
    assert "for 0.25 s, then resumed" in describe("adapter_stall", 0.25)
    assert describe("adapter_crash") == "the adapter's process is killed (SIGKILL)"


@pytest.mark.parametrize("stall, period, lead, slack, expected", [
    (0.3, 0.05, 0.0, 0.0, (5, 6)),
    (0.3, 0.05, 0.01, 0.0, (5, 6)),
    (0.3, 0.05, 0.01, 0.015, (5, 6)),
    (0.34, 0.05, 0.01, 0.0, (6, 7)),
    (0.34, 0.05, 0.01, 0.015, (6, 7)),
    (0.15, 0.05, 0.0, 0.0, (2, 3)),      # 0.15 / 0.05 is 2.9999999999999996 in floats
    (0.14, 0.05, 0.0, 0.015, (1, 3)),    # the slack reaches the next instant
    (0.04, 0.05, 0.01, 0.0, (0, 1)),
    (0.02, 0.05, 0.01, 0.0, (0, 0)),
])
def test_late_decisions_of_a_stall(stall, period, lead, slack, expected):
    assert late_decisions(stall, period, lead, slack) == expected


def _late_in_model(s0: float, stall: float, period: float, lead: float, e: float) -> int:
    """Decision k (instant k T) is computed at (k - 1) T + e; a suspended adapter computes it
    at the resume; it is late when that is after its deadline k T - lead."""
    resume = s0 + stall
    late = 0
    for k in range(1, int((resume + period) / period) + 3):
        computed = (k - 1) * period + e
        if s0 <= computed < resume and resume > k * period - lead:
            late += 1
    return late


@pytest.mark.parametrize("stall", [0.08, 0.12, 0.149, 0.3, 0.31, 0.47])
def test_late_decisions_bound_a_decision_by_decision_model(stall):
    period, lead = 0.05, 0.01
    rng = random.Random(7)
    fewest, most = late_decisions(stall, period, lead, STALL_SLACK)
    counts = set()
    for _ in range(2000):
        s0 = rng.uniform(1.0, 1.0 + period)
        e = rng.uniform(0.0, 0.005)                  # when the adapter computes
        over = rng.uniform(0.0, STALL_SLACK - 0.005)  # how much longer the stall is made
        counts.add(_late_in_model(s0, stall + over, period, lead, e))
    assert fewest <= min(counts) and max(counts) <= most, (counts, fewest, most)
    exact = {_late_in_model(1.0 + i * period / 200, stall, period, lead, 0.0)
             for i in range(200)}
    assert min(exact) == fewest   # without slack the fewest is reached


@pytest.fixture(scope="module")
def setups(tmp_path_factory):
    """The demo adapter's session with each output, as the demo configures it."""
    parser = argparse.ArgumentParser()
    add_arguments(parser)
    out = {}
    for output in ("plan", "stream"):
        work = tmp_path_factory.mktemp(output)
        cfg = build_config(parser.parse_args(["--output", output]), work)
        out[output] = (build_session(load_params_file(cfg.write_params(work / "p.yaml"))),
                       cfg, work)
    return out


def _planned(setups, output: str, spec: str, run_end: float = 8.0):
    setup, cfg, work = setups[output]
    (fault,) = plan_faults([parse_injection(spec)], setup, cfg.policy_card, cfg.reference,
                           run_end, work, 0.1)
    return fault


@pytest.mark.parametrize("output, spec, expected, accepted, arm", [
    # plan_lead 0.01 s, period 0.05 s, max_overruns 3 in the demo params
    ("plan", "adapter_stall:0.3@4", "overruns", ("overruns",), "rest_within_limits"),
    ("plan", "adapter_stall:0.15@4", f"overruns or {NO_STOP}", ("overruns", NO_STOP),
     "within_limits"),
    ("plan", "adapter_stall:0.05@4", NO_STOP, (NO_STOP,), "within_limits"),
    ("plan", "adapter_crash@4", NO_STOP, (), "rest_within_limits"),
    ("stream", "adapter_stall:0.3@4", "overruns", ("overruns",), "driver_hold"),
    ("stream", "adapter_stall:0.08@4", NO_STOP, (NO_STOP,), "not_judged"),
    ("stream", "adapter_crash@4", NO_STOP, (), "driver_hold"),
])
def test_what_an_adapter_fault_is_expected_to_do(setups, output, spec, expected, accepted,
                                                 arm):
    f = _planned(setups, output, spec)
    assert (f.expected, f.accepted, f.arm) == (expected, accepted, arm), f
    assert f.accepts(expected.split(" or ")[0])


def test_a_stall_past_the_end_of_the_pass_is_refused_with_the_option(setups):
    with pytest.raises(FaultRefused) as err:
        _planned(setups, "plan", "adapter_stall:3@6", run_end=8.0)
    assert "--inject adapter_stall:3@6" in str(err.value) and "+9 s" in str(err.value)


LIMITS = JointLimits(["a", "b"], [-2.0, -2.0], [2.0, 2.0], [1.0, 2.0], [4.0, 8.0],
                     [40.0, 80.0])
TICK_NS = 4_000_000


def _stream_motion(p: np.ndarray):
    t_ns = 10_000_000_000 + TICK_NS * np.arange(p.shape[0], dtype=np.int64)
    return followed_motion(t_ns, p, None, None)


def test_a_repeated_stream_command_is_no_rest_and_a_hold_is():
    """A ramp at 0.5 rad/s on joint a with one command repeated (a one-tick zero
    difference), then a hold from 1 s on: the rest is the hold, not the repeat."""
    n = 400
    q = np.zeros((n, 2))
    q[:250, 0] = 0.5 * TICK_NS * 1e-9 * np.arange(250)
    q[250:, 0] = q[249, 0]
    q[100, 0] = q[99, 0]          # the repeated command
    m = _stream_motion(q)
    after = after_injection(m, LIMITS, at=m.t[50])
    hold = m.t[250] - m.t[50]
    assert after.first_rest_after == pytest.approx(hold, abs=1e-9)
    assert after.rest_after == pytest.approx(hold, abs=1e-9)
    assert after.speed_at_injection == pytest.approx(0.5, rel=1e-6)  # over 20 ms, not 1 tick
    m_rep = _stream_motion(q)
    at_repeat = after_injection(m_rep, LIMITS, at=m_rep.t[100])
    assert at_repeat.speed_at_injection == pytest.approx(0.5 * 4 / 5, rel=1e-6)


def test_a_position_step_shows_in_the_peak_speed_and_a_short_pause_is_no_rest():
    """Joint a moves at 0.25 rad/s with a 12 ms pause (shorter than `REST_MIN`); joint b
    steps 0.01 rad in one 4 ms tick (2.5 rad/s, over its 2 rad/s limit)."""
    n = 200
    step = np.full(n, 1e-3)
    step[0] = 0.0
    step[61:64] = 0.0
    q = np.zeros((n, 2))
    q[:, 0] = np.cumsum(step)
    q[150:, 1] = 0.01
    assert 3 * TICK_NS * 1e-9 < REST_MIN
    m = _stream_motion(q)
    after = after_injection(m, LIMITS, at=m.t[40])
    assert after.peak_speed == pytest.approx(2.5 / 2.0, rel=1e-6)
    assert math.isnan(after.rest_after) and math.isnan(after.first_rest_after)
    assert after.ticks_over > 0


def test_a_plan_braking_to_rest_within_limits():
    """v and a from the messages: constant-jerk braking to rest, then rest."""
    dt = TICK_NS * 1e-9
    t = dt * np.arange(300)
    jerk, a0 = 20.0, -1.0                   # a from -1 to 0 in 50 ms, v from 0.025 to 0
    tb = -a0 / jerk
    a = np.where(t < tb, a0 + jerk * t, 0.0)
    v = np.where(t < tb, 0.025 + a0 * t + 0.5 * jerk * t * t, 0.0)
    p = np.cumsum(v) * dt
    z = np.zeros_like(t)
    m = followed_motion(10_000_000_000 + TICK_NS * np.arange(300, dtype=np.int64),
                        np.stack([p, z], 1), np.stack([v, z], 1), np.stack([a, z], 1))
    after = after_injection(m, LIMITS, at=m.t[0])
    assert after.ticks_over == 0 and after.peak_jerk == pytest.approx(jerk / 40.0, rel=1e-6)
    first_still = t[np.flatnonzero(np.abs(v) <= 1e-4)[0]]
    assert after.rest_after == pytest.approx(first_still, abs=1e-9)
    assert after.speed_at_injection == pytest.approx(0.025, rel=1e-9)
