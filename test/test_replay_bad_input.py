# SPDX-License-Identifier: Apache-2.0
"""Bad input to replay: each case gives a clear error naming what is missing or wrong.

Bags are made from a fresh live recording (real nodes) with topics dropped or rewritten,
truncated as by a crash, or replaced by garbage. Checks of a partial bag use the live
adapter's records as the reference (bit-identical up to the last complete cycle).
"""
import shutil

import pytest

from adaptive_streamer.replay import cli_replay
from adaptive_streamer.io.bag_io import BagError
from adaptive_streamer.replay.compare import compare
from adaptive_streamer.replay.run import ReplayError, replay
import replay_harness

pytestmark = [pytest.mark.ros, pytest.mark.slow]
SUITE_GROUP = "replay (one live recording)"  # test/run_suite.py


@pytest.fixture(scope="module")
def live_bag(tmp_path_factory):
    return replay_harness.live_recording(tmp_path_factory.getbasetemp())


def test_missing_bag(tmp_path):
    with pytest.raises(BagError, match="no such file or folder"):
        replay(tmp_path / "nothing")


def test_corrupt_bag(tmp_path, live_bag):
    bad = tmp_path / "bad"
    shutil.copytree(live_bag, bad)
    (bad / "metadata.yaml").write_text("rosbag2_bagfile_information: [not, a, mapping\n")
    with pytest.raises(BagError, match="cannot read rosbag2"):
        replay(bad)
    junk = tmp_path / "junk"
    junk.mkdir()
    (junk / "junk.mcap").write_bytes(b"\x89MCAP0\r\n" + b"\x07" * 500)
    with pytest.raises(BagError, match="no complete chunk could be read"):
        replay(junk)


def test_cli_reports_bad_input_with_exit_code_2(tmp_path, capsys):
    assert cli_replay.main([str(tmp_path / "nothing"), "--out", str(tmp_path / "o")]) == 2
    assert "no such file or folder" in capsys.readouterr().err


def test_missing_topics(tmp_path, live_bag):
    no_window = replay_harness.copy_bag(live_bag, tmp_path / "a", drop=("/reference/window",))
    with pytest.raises(ReplayError, match="no messages on topic '/reference/window'"):
        replay(no_window)
    no_feedback = replay_harness.copy_bag(live_bag, tmp_path / "b", drop=("/feedback",))
    with pytest.raises(ReplayError, match=r"reads feedback features \['edge_offset'\].*"
                                          "'/feedback'"):
        replay(no_feedback)


def test_unknown_message_type(tmp_path, live_bag):
    odd = replay_harness.copy_bag(live_bag, tmp_path / "odd", change={
        "/reference/window": ("my_msgs/msg/Window", "float64 x\n",
                              "RIHS01_" + "0" * 64, lambda t, raw: raw)})
    with pytest.raises(ReplayError, match="'/reference/window' has type 'my_msgs/msg/Window'; "
                                          "replay needs trajectory_msgs/msg/JointTrajectory"):
        replay(odd)


def test_joint_names_that_do_not_match_the_limits(tmp_path, live_bag):
    def rename(t, raw):  # same length: the CDR layout stays valid
        return raw.replace(b"j3\x00", b"q3\x00")
    window = replay_harness.copy_bag(live_bag, tmp_path / "w", change={
        "/reference/window": ("trajectory_msgs/msg/JointTrajectory", None, None, rename)})
    with pytest.raises(ReplayError, match=r"'/reference/window': joint 'j3' is not in the "
                                          r"trajectory .*the limits have joints"):
        replay(window)
    states = replay_harness.copy_bag(live_bag, tmp_path / "s", change={
        "/joint_states": ("sensor_msgs/msg/JointState", None, None, rename)})
    with pytest.raises(ReplayError, match="'/joint_states': joint 'j3' of the limits is not in "
                                          "the joint states"):
        replay(states)


def test_no_run_info_needs_params(tmp_path, live_bag):
    bare = replay_harness.copy_bag(live_bag, tmp_path / "bare",
                                   drop=("/adaptive_streamer/run_info",), custom_data=False)
    with pytest.raises(ReplayError, match="no run info in the bag.*--params FILE"):
        replay(bare)
    params = live_bag.parent / "params.yaml"  # what the live adapter was started with
    c, _, _ = compare(replay(bare, params_file=params))
    assert c.deterministic


def test_partial_bag_replays_to_the_last_complete_cycle(tmp_path, live_bag):
    full = replay(live_bag)
    cut = tmp_path / "cut"
    cut.mkdir()
    data = next(live_bag.glob("*.mcap")).read_bytes()
    (cut / "cut.mcap").write_bytes(data[:int(len(data) * 0.6)])  # a crash: no footer
    result = replay(cut)
    assert "not closed by its recorder" in result.notes[0]
    assert "up to the last complete one" in result.partial
    assert 0 < result.cycles < full.cycles
    c, _, _ = compare(result)
    assert c.deterministic  # what it replays is exact


def test_bag_without_decision_records_is_approximate(tmp_path, live_bag):
    other = replay_harness.copy_bag(live_bag, tmp_path / "x", drop=("/adapter/decisions",))
    result = replay(other)
    assert result.mode == "approximate"
    assert any("approximate" in n for n in result.notes)
    assert result.cycles > 20
