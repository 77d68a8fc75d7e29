# SPDX-License-Identifier: Apache-2.0
"""Batch replay: bags x policies -> one ranked table (CSV and Markdown), on worker processes.

Inputs are a fresh live recording (real nodes) and a copy of it; the task metric of the
demo (lateral error of the nozzle from the real edge) comes from the scenario hook.
"""
import csv
import os

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


def _cut_copies(bag, folder, count):
    """``count`` closed bags of the live recording, each ending at its own time (the
    first at half the recorded decisions, the last the whole recording)."""
    from adaptive_streamer.replay.run import replay
    t = [int(round(d.time * 1e9)) for d in replay(bag).recorded]
    ends = [t[len(t) // 2 + (len(t) - 1 - len(t) // 2) * k // (count - 1)] + 20_000_000
            for k in range(count)]
    return [replay_harness.copy_bag(bag, folder / f"cut{k}", end_ns=end)
            for k, end in enumerate(ends)]


def test_dask_batch_equals_in_process(tmp_path, live_bag):
    """6 bags x 2 policies on a local Dask cluster of 2 worker processes started here give
    the in-process batch's table, figure for figure (all but the wall-clock compute time);
    a task whose bag is missing fails by name while the others go on."""
    from distributed import Client, LocalCluster

    bags = _cut_copies(live_bag, tmp_path, 6)
    policies = [None, "tracker"]
    here = run_batch(bags, policies, tmp_path / "here", jobs=1)
    assert len(here) == 12 and not any(r["error"] for r in here)
    assert len({r["cycles"] for r in here}) == 6  # the bags differ
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        pids = set(client.run(os.getpid).values())
        assert len(pids) == 2 and os.getpid() not in pids
        rows = run_batch(bags, policies, tmp_path / "dask", scheduler=cluster.scheduler_address)
        missing = tmp_path / "not_here"
        mixed = run_batch([missing, bags[0]], ["tracker"], tmp_path / "mixed",
                          scheduler=cluster.scheduler_address)
    timing = "decide_p99_ms"  # wall-clock time of decide(): not a result of the replay
    assert [{k: v for k, v in r.items() if k != timing} for r in rows] == \
        [{k: v for k, v in r.items() if k != timing} for r in here]

    def table(folder):
        with (folder / "batch.csv").open() as f:
            return [{k: v for k, v in r.items() if k != timing} for r in csv.DictReader(f)]
    assert table(tmp_path / "dask") == table(tmp_path / "here")
    assert [r["error"] == "" for r in mixed] == [True, False]
    failed = mixed[1]
    assert failed["bag"] == str(missing) and failed["policy"] == "tracker"
    assert "not_here" in failed["error"] and "no such file" in failed["error"]
