# SPDX-License-Identifier: Apache-2.0
"""Batch replay throughput: cost of one (bag, policy) task and bags per hour per worker.

One synthetic recording (`replay_speed.synthetic_recording`: 7 joints, the tracker,
``--cycles`` decisions at 50 ms, 250 Hz stream; invented data) is copied into ``--bags``
bags. The script prints:

* the cost of one task (`batch.run_task`: read, replay, compare; the batch writes no output
  bag per task), in this process, wall and CPU time (fastest of 3),
* a batch of every bag x 2 policies (the recorded tracker card and the built-in
  ``tracker``) on a local Dask cluster of ``--workers`` worker processes, once every worker
  has run a first task (imports): the wall time, tasks per second and (bag, policy) tasks
  per hour per worker; and the time it took to start the cluster and warm the workers.

Run: ``.venv/bin/python bench/batch_speed.py [--cycles N] [--bags B] [--workers W]``.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).parent))
from policy_speed import arm_limits  # noqa: E402
from replay_speed import HORIZON, PERIOD, RATE, synthetic_recording  # noqa: E402

from adaptive_streamer.replay.batch import Task, dask_client, run_batch, run_task  # noqa: E402


def main() -> None:
    """Write the bags, time one task, then the batch on a local cluster."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--cycles", type=int, default=1200)
    ap.add_argument("--bags", type=int, default=8)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    limits = arm_limits()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        limits_file = folder / "limits.yaml"
        limits_file.write_text(yaml.safe_dump(limits.to_dict()))
        card = folder / "tracker.card.yaml"
        card.write_text(yaml.safe_dump({
            "policy_card": 1, "name": "bench_tracker", "kind": "tracker",
            "joints": list(limits.names), "decision_period": PERIOD,
            "limits": str(limits_file)}))
        params = {"limits_file": str(limits_file), "decision_period": PERIOD,
                  "stream_rate": RATE, "horizon": HORIZON, "policy": str(card),
                  "features": [""]}
        first = folder / "bag0"
        synthetic_recording(first, params, args.cycles)
        bags = [first] + [Path(shutil.copytree(first, folder / f"bag{k}"))
                          for k in range(1, args.bags)]
        seconds = args.cycles * PERIOD
        print(f"batch speed: bags of {args.cycles} decision cycles ({seconds:.0f} s of "
              f"recording, 7 joints, {RATE:.0f} Hz stream), {args.bags} bags x 2 policies")
        task = Task(str(first), None, None, None, None, ())
        costs = []
        for _ in range(3):
            w0, c0 = time.perf_counter(), time.process_time()
            row = run_task(task)
            costs.append((time.perf_counter() - w0, time.process_time() - c0))
        if row["error"]:
            raise SystemExit(f"the task failed: {row['error']}")
        wall, cpu = min(costs)
        print(f"  one task in this process: {wall:.2f} s wall, {cpu:.2f} s CPU "
              f"({args.cycles / cpu:.0f} cycles per CPU second)")
        policies = [None, "tracker"]
        t0 = time.perf_counter()
        with dask_client(None, args.workers) as client:
            tw = time.perf_counter()
            client.run(run_task, task)  # each worker's first task also imports the package
            t1 = time.perf_counter()
            rows = run_batch(bags, policies, folder / "out", scheduler=client.scheduler.address)
            t2 = time.perf_counter()
        failed = [r for r in rows if r["error"]]
        if failed:
            raise SystemExit(f"{len(failed)} task(s) failed: {failed[0]['error']}")
        tasks = len(rows)
        per_worker = (t2 - t1) * args.workers / tasks
        print(f"  {tasks} tasks on a local cluster of {args.workers} worker processes: "
              f"{t2 - t1:.1f} s (before: {tw - t0:.1f} s to start the cluster, {t1 - tw:.1f} s "
              f"for a first task on each worker), "
              f"{tasks / (t2 - t1):.2f} tasks/s, {per_worker:.2f} s of a worker per task, "
              f"{3600 / per_worker:.0f} (bag, policy) tasks per hour per worker")
        print(f"  load average: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
