# SPDX-License-Identifier: Apache-2.0
"""Batch replay: several bags x several policies -> one ranked table (CSV and Markdown).

Every (bag, policy) pair is one task on a Dask distributed cluster (`dask.distributed`):
a local cluster of worker processes (one per core by default, one thread each) or an
existing cluster given by its scheduler address. A task replays its bag and compares it
with its recording on a worker; its row of the table comes back to this process, which
ranks the rows and writes the table. With one worker and no scheduler the tasks run in
this process, one after the other. The table ranks the runs by the task
metric: the metric hook's first value when a hook is given (e.g. the demo's lateral
error, `adaptive_streamer.demo.replay_metric:lateral_error_hook`), else the RMS planned deviation from the reference while
following; runs that tripped the watchdog rank after those that did not; failed runs last
(with their error: bag, policy and reason; the other tasks go on).

Where things live when the workers do not share a disk with this process: the workers
open the bags, policy cards, params file and the files the run info names (limits, models)
by the paths given here, so those paths must hold the same files on every worker (a shared
or synced folder, or a copy at the same path); a task whose bag is not there fails with
the bag's error. Nothing is written on the workers (the scratch files of a replay go to
the worker's temporary folder and are removed); ``batch.csv`` and ``batch.md`` are written
here, in ``out``.

A metric hook is named ``module:function`` (so workers can import it) and is called as
``function(result, stream, **options)`` with the `ReplayResult` and the replayed setpoint
`compare.Stream`; it returns ``{name: value}`` (smaller is better for the first one).
"""
from __future__ import annotations

import csv
import importlib
import math
import os
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator, Sequence

from .compare import compare
from .run import replay

BASE_COLUMNS = ("rank", "bag", "policy", "mode", "cycles", "rms_deviation", "max_deviation",
                "trips", "first_trip", "peak_velocity", "peak_acceleration", "peak_jerk",
                "decide_p99_ms", "deterministic", "error")


CONNECT_TIMEOUT_S = 30.0  # waiting for a scheduler given by address


class BatchError(RuntimeError):
    """The batch cannot run (the scheduler cannot be reached)."""


@dataclass(frozen=True)
class Task:
    """One replay of a batch."""

    bag: str
    policy: str | None
    params_file: str | None
    namespace: str | None
    hook: str | None
    hook_options: tuple[tuple[str, Any], ...]


def failed_row(task: Task, reason: str) -> dict[str, Any]:
    """The row of a task that did not produce a result."""
    return {"bag": task.bag, "policy": task.policy or "(recorded)", "error": reason}


def load_hook(spec: str) -> Any:
    """The metric hook named ``module:function``; `ValueError` naming it if it cannot load."""
    module, _, name = spec.partition(":")
    try:
        return getattr(importlib.import_module(module), name)
    except (ImportError, AttributeError) as exc:
        raise ValueError(f"metric hook '{spec}' cannot be loaded ({exc}); expected "
                         "'module:function'") from None


def run_task(task: Task) -> dict[str, Any]:
    """Replay one (bag, policy) pair; a row of the table (``error`` set on failure)."""
    row: dict[str, Any] = failed_row(task, "")
    try:
        result = replay(task.bag, task.params_file, task.policy, task.namespace)
        c, stream, _ = compare(result)
        usage = c.usage["replay"]
        trips = c.trips["replay"]
        row.update({
            "policy": task.policy or result.policy, "mode": result.mode,
            "cycles": result.cycles,
            "rms_deviation": c.task["replay"]["rms_deviation"],
            "max_deviation": c.task["replay"]["max_deviation"],
            "trips": len(trips), "first_trip": f"{trips[0]['kind']}" if trips else "",
            "peak_velocity": max(usage["velocity"]),
            "peak_acceleration": max(usage["acceleration"]),
            "peak_jerk": max(usage["jerk"]) if usage["jerk"] else math.nan,
            "decide_p99_ms": c.compute_ms["replay_decide"].get("p99", math.nan),
            "deterministic": c.deterministic if c.compared and task.policy is None else ""})
        if task.hook:
            row.update(load_hook(task.hook)(result, stream, **dict(task.hook_options)))
    except Exception as exc:  # a failed run is a row of the table, named with its error
        row["error"] = f"{type(exc).__name__}: {exc}"
    return row


def rank(rows: list[dict[str, Any]], metric: str) -> list[dict[str, Any]]:
    """Rows sorted: no error, no trip, then by ``metric`` (NaN last); ``rank`` set."""
    def key(r: dict[str, Any]) -> tuple[int, int, float]:
        value = r.get(metric, math.nan)
        value = value if isinstance(value, (int, float)) and not math.isnan(value) else math.inf
        return (1 if r.get("error") else 0, 1 if r.get("trips") else 0, value)
    out = sorted(rows, key=key)
    for i, r in enumerate(out, 1):
        r["rank"] = i
    return out


def _cell(x: Any) -> str:
    if isinstance(x, float):
        return "" if math.isnan(x) else f"{x:.6g}"
    return str(x)


def write_tables(rows: list[dict[str, Any]], out: Path, metric: str) -> tuple[Path, Path]:
    """``batch.csv`` and ``batch.md`` in ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    extra = [k for r in rows for k in r if k not in BASE_COLUMNS]
    columns = list(BASE_COLUMNS[:5]) + list(dict.fromkeys(extra)) + list(BASE_COLUMNS[5:])
    csv_path, md_path = out / "batch.csv", out / "batch.md"
    with csv_path.open("w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=columns, extrasaction="ignore")
        w.writeheader()
        for r in rows:
            w.writerow({k: _cell(r.get(k, "")) for k in columns})
    lines = [f"Ranked by `{metric}` (smaller is better; runs with watchdog trips after those "
             "without, failed runs last).", "",
             "| " + " | ".join(columns) + " |", "|" + "---|" * len(columns)]
    for r in rows:
        lines.append("| " + " | ".join(_cell(r.get(k, "")).replace("|", "/") for k in columns)
                     + " |")
    md_path.write_text("\n".join(lines) + "\n")
    return csv_path, md_path


def run_batch(bags: Sequence[str | Path], policies: Sequence[str | None],
              out: str | Path, params_file: str | Path | None = None,
              namespace: str | None = None, hook: str | None = None,
              hook_options: dict[str, Any] | None = None, jobs: int | None = None,
              scheduler: str | None = None, progress: bool = False) -> list[dict[str, Any]]:
    """Replay every bag with every policy (None = the recorded one); write and return the
    ranked table.

    ``scheduler`` is the address of a running Dask scheduler (``tcp://host:8786``); without
    it a local cluster of ``jobs`` worker processes (default: all cores, at most one per
    task) runs the tasks, and ``jobs=1`` runs them here. ``progress`` shows a bar.
    """
    if hook:
        load_hook(hook)  # fail early, before the workers start
    tasks = [Task(str(b), p, str(params_file) if params_file else None, namespace, hook,
                  tuple(sorted((hook_options or {}).items())))
             for b in bags for p in (policies or [None])]
    workers = max(1, min(jobs or os.cpu_count() or 1, len(tasks)))
    bar = _bar(progress, len(tasks))
    try:
        if scheduler is None and workers == 1:
            rows = []
            for t in tasks:
                rows.append(run_task(t))
                if bar is not None:
                    bar.update(1)
        else:
            rows = run_on_cluster(tasks, scheduler, workers, bar)
    finally:
        if bar is not None:
            bar.close()
    metric = "rms_deviation"
    if hook:
        names = [k for r in rows for k in r if k not in BASE_COLUMNS]
        metric = names[0] if names else metric
    rows = rank(rows, metric)
    write_tables(rows, Path(out), metric)
    return rows


def run_on_cluster(tasks: list[Task], scheduler: str | None, workers: int,
                   bar: Any = None) -> list[dict[str, Any]]:
    """The rows of ``tasks`` (in task order), one Dask task each, on the scheduler at
    ``scheduler`` or on a local cluster of ``workers`` processes started and stopped here.
    A task whose worker fails (its process died, or the row could not come back) gives a
    failed row naming its bag, policy and the reason."""
    from distributed import as_completed

    with dask_client(scheduler, workers) as client:
        futures = client.map(run_task, tasks, pure=False)
        order = {f.key: i for i, f in enumerate(futures)}
        rows: dict[int, dict[str, Any]] = {}
        for future in as_completed(futures):
            i = order[future.key]
            try:
                rows[i] = future.result()
            except Exception as exc:  # the task raised outside run_task, or its worker died
                rows[i] = failed_row(tasks[i], f"task failed on the cluster: "
                                               f"{type(exc).__name__}: {exc}")
            future.release()
            if bar is not None:
                bar.update(1)
    return [rows[i] for i in range(len(tasks))]


@contextmanager
def dask_client(address: str | None, workers: int) -> Iterator[Any]:
    """A Dask client of the scheduler at ``address``, or of a local cluster of ``workers``
    single-threaded worker processes (started here, closed with the client)."""
    from distributed import Client, LocalCluster
    if address is not None:
        try:
            client = Client(address, timeout=CONNECT_TIMEOUT_S)
        except (OSError, ValueError) as exc:  # unreachable, timed out, bad address
            raise BatchError(f"cannot connect to the Dask scheduler at '{address}': "
                             f"{exc}") from None
        with client:
            yield client
        return
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        yield client


def _bar(enabled: bool, total: int) -> Any:
    if not enabled:
        return None
    from tqdm import tqdm
    return tqdm(total=total, unit="task", desc="batch replay")
