# SPDX-License-Identifier: Apache-2.0
"""The clock going backwards under ``use_sim_time``, over real DDS.

Its own small cell (`fuzz_harness.ClockFuzz`: reference_server, sim_driver and the adapter
on ``/clock``), alone in the process once the topic fuzzing's cell is gone. The outcomes are
printed.
"""
import numpy as np
import pytest

import fuzz_harness
from fuzz_harness import Cases, ClockFuzz

pytestmark = pytest.mark.ros

CASES = Cases()


@pytest.fixture(scope="module")
def clock(tmp_path_factory, request):
    """The sim-time cell, following."""
    import rclpy
    rclpy.init()
    c = ClockFuzz(tmp_path_factory.mktemp("clock"))
    try:
        c.start()
        yield c
    finally:
        try:
            c.close()
        finally:
            rclpy.shutdown()
            fuzz_harness.print_uncaptured(request, "sim time going backwards, outcomes:\n"
                                          + CASES.table())


@pytest.mark.parametrize("back", [0.02, 0.4, 2.5])
def test_sim_time_going_backwards_pauses_the_stream_then_it_goes_on_or_stops_smoothly(
        clock, back):
    """Under use_sim_time the clock goes back by ``back`` seconds mid-motion: the adapter
    never streams a setpoint at a time already passed (stamps strictly increase), says so
    in its log (for a jump of more than a tick), the reference server refuses to play
    backwards, and the stream stays within the limits; afterwards it either follows on or
    stopped smoothly with a named reason."""
    n0 = len(clock.setpoints)
    outcome = clock.run_jump(back)
    CASES.add("sim time backwards", outcome)
    ns, p, v, a = clock.stream()
    assert np.all(np.diff(ns) > 0), "a setpoint stamp went backwards"
    bad = fuzz_harness.step_check(ns, p, v, a)
    assert not bad, bad
    assert len(clock.setpoints) > n0, "the stream did not go on after the clock passed the jump"
    if back > 0.05:
        assert any(name.endswith("adapter") and "ROS time went back" in text
                   for name, text in clock.logs), clock.logs[-10:]
        assert any(name.endswith("reference_server") and "time went backwards" in text
                   for name, text in clock.logs), clock.logs[-10:]
    diag_errors = {k: clock.adapter._counters[k] for k in ("stream_errors", "decision_errors")}
    assert diag_errors == {"stream_errors": 0, "decision_errors": 0}, diag_errors
