"""Batch replay: bags x policies -> one ranked table (CSV and Markdown), on worker processes.

Inputs are a fresh live recording (real nodes) and a copy of it; the task metric of the
demo (lateral error of the nozzle from the real edge) comes from the scenario hook.
"""
import csv

import pytest

from adaptive_streamer.replay.batch import run_batch
from adaptive_streamer.share import demo_file
import replay_harness

pytestmark = [pytest.mark.ros, pytest.mark.slow]
SUITE_GROUP = "replay (one live recording)"  # test/run_suite.py


@pytest.fixture(scope="module")
def live_bag(tmp_path_factory):
    return replay_harness.live_recording(tmp_path_factory.getbasetemp())


def test_batch_table_ranks_bags_and_policies(tmp_path, live_bag):
    second = replay_harness.copy_bag(live_bag, tmp_path / "second")
    rows = run_batch([live_bag, second], [None, "hold", str(tmp_path / "missing.card.yaml")],
                     tmp_path / "out", hook="adaptive_streamer.demo.replay_metric:lateral_error_hook",
                     hook_options={"scenario": str(demo_file("scenario.yaml"))}, jobs=2)
    assert len(rows) == 6 and [r["rank"] for r in rows] == list(range(1, 7))
    failed = [r for r in rows if r["error"]]
    assert len(failed) == 2 and all("missing.card.yaml" in r["error"] for r in failed)
    assert rows[-2:] == failed  # failed runs rank last
    ok = [r for r in rows if not r["error"]]
    recorded = [r for r in ok if r["policy"].endswith("feedback.card.yaml")]
    assert len(recorded) == 2 and all(r["deterministic"] is True for r in recorded)
    assert all(r["lateral_rms_mm"] > 0 for r in ok)
    # holding still instead of following deviates from the reference: it trips and ranks
    # after the policy that follows
    hold = [r for r in ok if r["policy"] == "hold"]
    assert all(r["trips"] >= 1 for r in hold)
    assert max(r["rank"] for r in recorded) < min(r["rank"] for r in hold)
    with (tmp_path / "out" / "batch.csv").open() as f:
        table = list(csv.DictReader(f))
    assert [int(r["rank"]) for r in table] == list(range(1, 7))
    assert "lateral_rms_mm" in table[0]
    md = (tmp_path / "out" / "batch.md").read_text()
    assert "Ranked by `lateral_rms_mm`" in md and md.count("\n| ") == 7
