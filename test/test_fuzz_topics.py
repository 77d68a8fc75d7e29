"""Fuzzing of every input the network can give the live nodes, over real DDS (hypothesis).

One live cell (`fuzz_harness.TopicFuzz`: reference_server, sim_driver, sensor_bridge and the
adapter following a looped reference with a feedback policy) takes fuzzed messages:
``joint_states`` (missing, extra, reordered, repeated and renamed joints, NaN/inf/huge
positions, short arrays, odd stamps), ``reference/window`` (missing or extra joints, no or
one point, short value lists, NaN/inf/huge positions, times not increasing or negative,
stamps far in the past or future), ``feedback`` (missing/extra/repeated features, length
mismatch, NaN/inf/huge values, odd stamps), the sensor_bridge's input (NaN/inf/huge values,
zero/negative/ahead/late stamps) and the driver's command topic (wrong lengths, NaN/inf).

Each case must end in a clear refusal (the adapter's bad_* counter, the bridge's drop
counter by reason, the driver's rejected counter) or a smooth watchdog stop, never an
exception in a callback (the adapter's stream/decision errors and the bridge's callback
errors stay 0 on /diagnostics) and never a setpoint outside the limits (every streamed
setpoint checked with `fuzz_harness.step_check`, mean value theorem bounds). Whether the
adapter must refuse a joint state or a window is decided independently of its code by the
rule "every joint present with a finite position, every point with one value per joint".
Example counts are modest; bench/fuzz_report.py runs more. The counts are printed.

The clock test runs its own small cell in sim time and sends the clock backwards.
"""
import numpy as np
import pytest

import fuzz_harness
from fuzz_harness import Cases, ClockFuzz, TopicFuzz

CASES = Cases()
EXAMPLES = {"joint_states": 20, "reference/window": 12, "feedback": 12,
            "sensor_bridge input": 30, "sim_driver command": 12}


@pytest.fixture(scope="module")
def fuzz(tmp_path_factory, request):
    """The live cell, following; checked and printed after the last case."""
    import rclpy
    rclpy.init()
    f = TopicFuzz(tmp_path_factory.mktemp("topics"))
    try:
        f.start()
        yield f
        f.ensure_following()
        bad = fuzz_harness.step_check(*f.stream())
        assert not bad, f"setpoints outside the limits during the fuzzing: {bad}"
        diag = f.cell.wait_diag(lambda v: True, "adapter diagnostics")[3]
        assert diag["stream_errors"] == "0" and diag["decision_errors"] == "0", diag
        bridge = f.cell.wait_diag(lambda v: True, "bridge diagnostics", name="sensor_bridge")[3]
        assert bridge["callback_errors"] == "0", bridge
        for names, values in f.bridge_out:
            assert all(v != v or abs(v) != float("inf") for v in values), values
    finally:
        f.close()
        rclpy.shutdown()
        fuzz_harness.print_uncaptured(request, "topic fuzzing, cases tried per input kind:\n"
                                      + CASES.table())


@pytest.fixture(scope="module")
def clock(fuzz, tmp_path_factory):
    """The sim-time cell (after the topic fuzzing, which owns rclpy.init)."""
    c = ClockFuzz(tmp_path_factory.mktemp("clock"))
    try:
        c.start()
        yield c
    finally:
        c.close()


@pytest.mark.parametrize("kind", list(EXAMPLES))
def test_fuzzed_message_is_refused_or_stops_smoothly(fuzz, kind):
    fuzz_harness.fuzz_topics(fuzz, kind, EXAMPLES[kind], CASES)
    assert CASES.tried(kind) > 0


def test_feedback_stamped_ahead_of_the_clock_cannot_hide_a_dropout(fuzz):
    """Feedback stamped 30 s ahead of the adapter's clock (a sensor host with a wrong
    clock), then nothing: the dropout must still stop the arm (feedback_stale), not 30 s
    later when the clock reaches the stamp."""
    from sensor_msgs.msg import JointState

    from adaptive_streamer.io.stamps import sec_to_stamp
    fuzz.ensure_following()
    events0 = len(fuzz.adapter.session.watchdog.events)
    fuzz.probe.feedback = None                        # the genuine source goes away
    msg = JointState(name=["edge_offset"], position=[0.0])
    sec_to_stamp(fuzz.now() + 30.0, msg.header.stamp)
    for _ in range(3):
        fuzz.fb_pub.publish(msg)
    try:
        fuzz.ah.wait_until(lambda: len(fuzz.adapter.session.watchdog.events) > events0,
                           "a stop after the feedback dropout", timeout=10.0)
        assert fuzz.adapter.session.watchdog.events[events0].kind == "feedback_stale"
    finally:
        fuzz.probe.feedback = {"edge_offset": 0.0}
    CASES.add("feedback", "stopped (feedback_stale) after a stamp 30 s ahead")


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
