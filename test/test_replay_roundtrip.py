# SPDX-License-Identifier: Apache-2.0
"""Record -> replay round trip on a fresh live recording (real nodes, DDS, real bag).

The reference is the live adapter itself: replaying its bag with the same policy must
reproduce every recorded decision bit for bit (tolerance 0; every field of the decision
record except the measured compute time). The output bag is checked with the independent
readers ``rosbags`` and ``mcap``.
"""
import json

import numpy as np
import pytest
import rclpy
from mcap.reader import make_reader
from rclpy.context import Context
from rosbags.rosbag2 import Reader

from adaptive_streamer.core import decision_record
from adaptive_streamer.replay import cli_replay
from adaptive_streamer.io.bag_io import decode
from adaptive_streamer.replay.compare import compare
from adaptive_streamer.replay.run import replay
from adaptive_streamer.core.adapter_setup import DEFAULTS
import replay_harness

pytestmark = [pytest.mark.ros, pytest.mark.slow]
SUITE_GROUP = "replay (one live recording)"  # test/run_suite.py


@pytest.fixture(scope="module")
def live_bag(tmp_path_factory):
    return replay_harness.live_recording(tmp_path_factory.getbasetemp())


def test_replay_reproduces_the_live_decisions(live_bag):
    result = replay(live_bag)
    assert result.mode == "exact" and result.partial is None
    assert not any("starts after" in n for n in result.notes)  # from rest, as activated
    assert sum(r.mode == "following" for r in result.recorded) > 20, "the live run stopped early"
    # the recording was made with the adapter suspended for a moment: decisions came late,
    # and replay fills them with the braking the live session committed, bit for bit
    assert replay_harness.late_decisions(live_bag) >= 1
    assert result.cycles >= 40  # a few seconds at 20 Hz
    c, stream, recorded = compare(result)
    assert c.compared == result.cycles
    assert c.identical == c.compared, c.first_difference       # bit-identical
    assert c.max_difference == 0.0
    # the feedback changed the decisions: the card's gain reads edge_offset
    assert any(np.isfinite(d.feedback_stamp) for d in result.decisions)
    # replayed setpoints match the recorded stream: exactly, except at ticks on a segment
    # boundary, where the plan may take either adjacent segment (rounding only)
    assert max(c.setpoint_max) < 1e-7
    assert recorded is not None and len(stream.t) > 10 * result.cycles


def test_other_policy_replays_on_the_same_inputs(live_bag):
    result = replay(live_bag, policy="tracker")
    c, _, _ = compare(result)
    assert result.policy == "tracker" and result.cycles >= 40
    assert c.identical < c.compared  # a different policy decides differently
    assert c.task["replay"]["rms_deviation"] < 0.01


def test_cli_takes_the_policy_kinds_the_demo_takes(live_bag, tmp_path, capsys):
    # linear_feedback: the demo's card, as `demo --policy linear_feedback` runs it
    assert cli_replay.main([str(live_bag), "--policy", "linear_feedback", "--out",
                            str(tmp_path / "out"), "--quiet", "--no-plots"]) == 0
    assert "policy_feedback.yaml" in capsys.readouterr().out


def test_cli_writes_bag_report_and_plots(live_bag, tmp_path):
    out = tmp_path / "out"
    assert cli_replay.main([str(live_bag), "--out", str(out), "--quiet"]) == 0
    facts = json.loads((out / "summary.json").read_text())
    assert facts["deterministic"] is True and facts["mode"] == "exact"
    assert "bit-identical" in (out / "report.md").read_text()
    for name in ("accelerations", "positions", "limit_usage", "compute_time"):
        assert (out / f"{name}.png").stat().st_size > 1000
    # the output bag, read by rosbags (reference reader 1)
    with Reader(out / "bag") as r:
        topics = {c.topic: c.msgcount for c in r.connections}
        records = [decode(raw, "std_msgs/msg/Float64MultiArray") for c, _, raw in
                   r.messages([c for c in r.connections if c.topic == "/adapter/decisions"])]
        setpoints = [decode(raw, "trajectory_msgs/msg/JointTrajectory") for c, _, raw in
                     r.messages([c for c in r.connections if c.topic == "/setpoints"])]
    assert topics["/setpoints"] > 10 * facts["cycles"]
    assert topics["/adapter/decisions"] == facts["cycles"]
    again = replay(live_bag)
    _, stream, _ = compare(again)
    assert len(setpoints) == len(stream.t)
    for k in (0, len(setpoints) // 2, -1):
        pt = setpoints[k].points[0]
        assert np.array_equal(pt.positions, stream.p[k])
        assert np.array_equal(pt.accelerations, stream.a[k])
        stamp = setpoints[k].header.stamp
        assert abs(stamp.sec + stamp.nanosec * 1e-9 - stream.t[k]) < 1e-6
    for msg, d in zip(records, again.decisions):
        assert msg.layout.dim[0].label == decision_record.LABEL
        a, b = np.array(msg.data, float), decision_record.encode(d)
        a[9] = b[9] = 0.0  # compute time
        assert np.array_equal(a, b, equal_nan=True)
    # and by the mcap package (reference reader 2)
    with open(next((out / "bag").glob("*.mcap")), "rb") as f:
        counts = {}
        for _, channel, _ in make_reader(f).iter_messages():
            counts[channel.topic] = counts.get(channel.topic, 0) + 1
    assert counts == topics


def test_session_defaults_are_the_adapter_node_defaults():
    # the node's declared parameters are the reference for replay's defaults
    from adaptive_streamer.nodes.adapter import AdapterNode
    ctx = Context()
    rclpy.init(context=ctx)
    try:
        node = AdapterNode(context=ctx)
        for name, value in DEFAULTS.items():
            got = node.get_parameter(name).value
            assert (list(got) if isinstance(got, (list, tuple)) else got) == value, name
        node.destroy_node()
    finally:
        rclpy.shutdown(context=ctx)


def test_recording_that_starts_late_replays_from_its_first_record(live_bag, tmp_path):
    full = replay(live_bag)
    skip_before = full.decisions[10].time

    def late(t, raw):  # records of the first cycles lost, as when recording starts late
        return raw if t * 1e-9 > skip_before + 0.01 else None
    bag = replay_harness.copy_bag(live_bag, tmp_path / "late", change={
        "/adapter/decisions": ("std_msgs/msg/Float64MultiArray", None, None, late)})
    result = replay(bag)
    assert any("starts after the adapter did" in n for n in result.notes)
    c, _, _ = compare(result)
    assert c.deterministic and result.cycles < full.cycles - 5


def test_recording_whose_inputs_start_late_replays_from_the_first_complete_cycle(live_bag,
                                                                                 tmp_path):
    # the recorder picked up the inputs 1.5 s after the adapter's own topics: the first
    # decision records name inputs the bag does not hold
    full = replay(live_bag)
    t_cut = full.decisions[0].time + 1.5

    def late(t, raw):
        return raw if t * 1e-9 > t_cut else None
    change = {topic: (msgtype, None, None, late) for topic, msgtype in (
        ("/joint_states", "sensor_msgs/msg/JointState"),
        ("/reference/window", "trajectory_msgs/msg/JointTrajectory"),
        ("/feedback", "sensor_msgs/msg/JointState"))}
    bag = replay_harness.copy_bag(live_bag, tmp_path / "inputs_late", change=change)
    result = replay(bag)
    assert result.partial is None, result.partial
    assert any("skipped" in n for n in result.notes), result.notes
    c, _, _ = compare(result)
    assert c.deterministic and result.cycles >= full.cycles - 40, (result.cycles, full.cycles)
    assert c.identical == c.compared and c.compared > 0, c.first_difference


def test_bag_reading_matches_rosbags(live_bag, tmp_path):
    """`read_bag` reads the recorder's chunks itself: every message, receive time and byte
    as ``rosbags``' reader yields them (its public ``Reader.messages``), for the live
    recording and for replay's own output bag; the batched header stamps as one by one."""
    from adaptive_streamer.io.bag_io import read_bag
    from adaptive_streamer.io.fast_cdr import header_stamp, stamp_seconds
    from adaptive_streamer.io.messages import header_stamps

    out = tmp_path / "out"
    assert cli_replay.main([str(live_bag), "--out", str(out), "--quiet", "--no-plots"]) == 0
    for path in (live_bag, out / "bag"):
        bag = read_bag(path)
        expected: dict[str, list[tuple[int, bytes]]] = {}
        with Reader(path) as reader:
            for conn, t, raw in reader.messages():
                expected.setdefault(conn.topic, []).append((t, bytes(raw)))
        assert sorted(n for n, d in bag.topics.items() if len(d)) == sorted(expected)
        for name, data in bag.topics.items():
            want = sorted(expected.get(name, []), key=lambda m: m[0])
            assert [int(t) for t in data.times] == [t for t, _ in want], name
            assert data.raw == [r for _, r in want], name
        for name in ("/joint_states", "/reference/window", "/feedback", "/setpoints"):
            raw = bag.topics[name].raw if name in bag.topics else []
            assert np.array_equal(header_stamps(raw),
                                  [stamp_seconds(*header_stamp(r)) for r in raw]), name
