"""Batch replay: several bags x several policies -> one ranked table (CSV and Markdown).

Every (bag, policy) pair is replayed in its own worker process (`multiprocessing`, all
cores by default) and compared with its recording. The table ranks the runs by the task
metric: the metric hook's first value when a hook is given (e.g. the demo's lateral
error, `adaptive_streamer.demo.replay_metric:lateral_error_hook`), else the RMS planned deviation from the reference while
following; runs that tripped the watchdog rank after those that did not; failed runs last
(with their error).

A metric hook is named ``module:function`` (so workers can import it) and is called as
``function(result, stream, **options)`` with the `ReplayResult` and the replayed setpoint
`compare.Stream`; it returns ``{name: value}`` (smaller is better for the first one).
"""
from __future__ import annotations

import csv
import importlib
import math
import multiprocessing
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

from .compare import compare
from .run import replay

BASE_COLUMNS = ("rank", "bag", "policy", "mode", "cycles", "rms_deviation", "max_deviation",
                "trips", "first_trip", "peak_velocity", "peak_acceleration", "peak_jerk",
                "decide_p99_ms", "deterministic", "error")


@dataclass(frozen=True)
class Task:
    """One replay of a batch."""

    bag: str
    policy: str | None
    params_file: str | None
    namespace: str | None
    hook: str | None
    hook_options: tuple[tuple[str, Any], ...]


def load_hook(spec: str) -> Any:
    module, _, name = spec.partition(":")
    try:
        return getattr(importlib.import_module(module), name)
    except (ImportError, AttributeError) as exc:
        raise ValueError(f"metric hook '{spec}' cannot be loaded ({exc}); expected "
                         "'module:function'") from None


def run_task(task: Task) -> dict[str, Any]:
    """Replay one (bag, policy) pair; a row of the table (``error`` set on failure)."""
    row: dict[str, Any] = {"bag": task.bag, "policy": task.policy or "(recorded)"}
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
            "deterministic": c.deterministic if c.compared and task.policy is None else "",
            "error": ""})
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
              hook_options: dict[str, Any] | None = None,
              jobs: int | None = None) -> list[dict[str, Any]]:
    """Replay every bag with every policy (None = the recorded one) on ``jobs`` processes
    (default: all cores); write and return the ranked table."""
    if hook:
        load_hook(hook)  # fail early, before the workers start
    tasks = [Task(str(b), p, str(params_file) if params_file else None, namespace, hook,
                  tuple(sorted((hook_options or {}).items())))
             for b in bags for p in (policies or [None])]
    workers = max(1, min(jobs or os.cpu_count() or 1, len(tasks)))
    if workers == 1:
        rows = [run_task(t) for t in tasks]
    else:
        with multiprocessing.get_context("spawn").Pool(workers) as pool:
            rows = pool.map(run_task, tasks)
    metric = "rms_deviation"
    if hook:
        names = [k for r in rows for k in r if k not in BASE_COLUMNS]
        metric = names[0] if names else metric
    rows = rank(rows, metric)
    write_tables(rows, Path(out), metric)
    return rows
