# SPDX-License-Identifier: Apache-2.0
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

The clock going backwards under sim time is test_fuzz_topics_sim_time.py (its own cell, alone).
"""
import pytest

import fuzz_harness
from fuzz_harness import Cases, TopicFuzz

pytestmark = pytest.mark.ros

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
