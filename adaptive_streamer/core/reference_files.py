# SPDX-License-Identifier: Apache-2.0
"""Reading references from files: CSV and the project's own YAML (rosbag2 topics are read
by `adaptive_streamer.io.reference_bags`, which uses the same checks).

CSV (seconds, radians; ``#`` comment lines and blank lines are skipped)::

    time,j1,j2
    0.0,0.0,0.1
    0.05,0.001,0.1

Own YAML, timed points (seconds, radians)::

    joints: [j1, j2]
    points:
      - {time: 0.0, positions: [0.0, 0.1]}
      - {time: 1.5, positions: [0.4, -0.2]}

or untimed waypoints, timed by `adaptive_streamer.core.timing.time_parameterise` (needs
limits)::

    joints: [j1, j2]
    waypoints:
      - [0.0, 0.1]
      - [0.4, -0.2]

Every file is checked: the joints against the expected joints and the limits (unknown or
missing joint), NaN/inf values, strictly increasing times, no gap between samples larger
than ``max_gap``, positions within the limits. Errors name the file, the line (CSV/YAML) or
message index (bag, counting from 0), and what was wrong. Times are shifted to start at 0.
"""
from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import yaml

from .limits import JointLimits
from .text_files import TextFileError, read_text, yaml_problem
from .reference import ReferenceTrajectory, TrajectoryError
from .timing import DEFAULT_FRACTION, TimingError, time_parameterise

DEFAULT_MAX_GAP = 1.0  # s


class ReferenceFileError(ValueError):
    """A reference file is missing, malformed, or violates the expected joints or limits."""


def load_reference_file(path: str | Path, *, joints: Sequence[str] | None = None,
                        limits: JointLimits | None = None,
                        max_gap: float | None = DEFAULT_MAX_GAP, ends: str = "rest",
                        fraction: float = DEFAULT_FRACTION) -> ReferenceTrajectory:
    """Load a reference from a CSV or own YAML file by its suffix.

    ``joints`` fixes the expected joints and their order (default: the file's); ``limits``
    (when given) must name every joint and bounds the positions; waypoint files need it.
    ``max_gap`` is the largest allowed time between samples (None: no check).
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix == ".csv":
        return load_csv(p, joints=joints, limits=limits, max_gap=max_gap, ends=ends)
    if suffix in (".yaml", ".yml"):
        return load_yaml(p, joints=joints, limits=limits, max_gap=max_gap, ends=ends,
                         fraction=fraction)
    raise ReferenceFileError(f"{p}: unknown reference file kind '{suffix}'; expected .csv, "
                             ".yaml/.yml, or a rosbag2 directory (.mcap/.db3)")


# ---------------------------------------------------------------------- CSV
def load_csv(path: str | Path, *, joints: Sequence[str] | None = None,
             limits: JointLimits | None = None, max_gap: float | None = DEFAULT_MAX_GAP,
             ends: str = "rest") -> ReferenceTrajectory:
    """Read a ``time,<joint>,...`` CSV (seconds, radians)."""
    p = Path(path)
    text = _read_text(p)
    header: list[str] | None = None
    times: list[float] = []
    rows: list[list[float]] = []
    labels: list[str] = []
    reader = csv.reader(text.splitlines())
    for cells in reader:
        line = reader.line_num
        if not cells or all(not c.strip() for c in cells) or cells[0].lstrip().startswith("#"):
            continue
        cells = [c.strip() for c in cells]
        if header is None:
            if cells[0] != "time" or len(cells) < 2:
                raise ReferenceFileError(f"{p}: line {line}: expected a header 'time,<joint>,...', "
                                         f"got {','.join(cells)!r}")
            header = cells[1:]
            continue
        if len(cells) != len(header) + 1:
            raise ReferenceFileError(f"{p}: line {line}: expected {len(header) + 1} values "
                                     f"(time and {len(header)} joints), got {len(cells)}")
        values = [_cell(p, line, "time" if k == 0 else f"joint '{header[k - 1]}'", c)
                  for k, c in enumerate(cells)]
        times.append(values[0])
        rows.append(values[1:])
        labels.append(f"line {line}")
    if header is None:
        raise ReferenceFileError(f"{p}: empty file; expected a header 'time,<joint>,...' and rows")
    return build_reference(str(p), header, times, rows, labels, joints, limits, max_gap, ends)


def _cell(path: Path, line: int, what: str, text: str) -> float:
    try:
        return float(text)
    except ValueError:
        raise ReferenceFileError(f"{path}: line {line}: {what}: not a number: {text!r}") from None


# ---------------------------------------------------------------------- YAML
def load_yaml(path: str | Path, *, joints: Sequence[str] | None = None,
              limits: JointLimits | None = None, max_gap: float | None = DEFAULT_MAX_GAP,
              ends: str = "rest", fraction: float = DEFAULT_FRACTION) -> ReferenceTrajectory:
    """Read the own YAML: ``joints`` plus timed ``points`` or untimed ``waypoints``."""
    p = Path(path)
    text = _read_text(p)
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ReferenceFileError(f"{p}: not valid YAML: {yaml_problem(exc)}") from None
    if not isinstance(data, dict):
        raise ReferenceFileError(f"{p}: expected a mapping with 'joints' and 'points' or "
                                 "'waypoints'")
    unknown = set(data) - {"joints", "points", "waypoints"}
    if unknown:
        raise ReferenceFileError(f"{p}: unknown key(s) {sorted(unknown)}; expected 'joints' and "
                                 "'points' or 'waypoints'")
    names = data.get("joints")
    if not isinstance(names, list) or not names or not all(isinstance(n, str) for n in names):
        raise ReferenceFileError(f"{p}: 'joints' must be a non-empty list of joint names")
    kinds = [k for k in ("points", "waypoints") if k in data]
    if len(kinds) != 1:
        raise ReferenceFileError(f"{p}: give exactly one of 'points' (timed) or 'waypoints' "
                                 f"(untimed), got {kinds or 'neither'}")
    kind = kinds[0]
    items = data[kind]
    if not isinstance(items, list) or not items:
        raise ReferenceFileError(f"{p}: '{kind}' must be a non-empty list")
    lines = _item_lines(root, kind)
    labels = [f"{kind}[{i}] (line {ln})" for i, ln in enumerate(lines)]
    n = len(names)
    times: list[float] = []
    rows: list[list[float]] = []
    for i, item in enumerate(items):
        if kind == "points":
            if not isinstance(item, dict) or set(item) != {"time", "positions"}:
                raise ReferenceFileError(f"{p}: {labels[i]}: expected {{time: t, positions: "
                                         f"[{n} values]}}, got {item!r}")
            times.append(_yaml_number(p, labels[i], "time", item["time"]))
            pos = item["positions"]
        else:
            pos = item
        if not isinstance(pos, list) or len(pos) != n:
            raise ReferenceFileError(f"{p}: {labels[i]}: expected a list of {n} positions (joints "
                                     f"{names}), got {pos!r}")
        rows.append([_yaml_number(p, labels[i], f"joint '{names[k]}'", v)
                     for k, v in enumerate(pos)])
    if kind == "points":
        return build_reference(str(p), names, times, rows, labels, joints, limits, max_gap, ends)
    if limits is None:
        raise ReferenceFileError(f"{p}: untimed 'waypoints' need joint limits for the time "
                                 "parameterisation (give a limits file)")
    order, w = _check_samples(str(p), names, None, rows, labels, joints, limits)
    try:
        return time_parameterise(order, w, limits, fraction=fraction, ends=ends)
    except TimingError as exc:
        raise ReferenceFileError(f"{p}: {exc}") from None


def _item_lines(root: Any, key: str) -> list[int]:
    """1-based line of each item of the top-level sequence ``key``."""
    for k, v in root.value:
        if k.value == key and isinstance(v, yaml.SequenceNode):
            return [item.start_mark.line + 1 for item in v.value]
    return []


def _yaml_number(path: Path, label: str, what: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ReferenceFileError(f"{path}: {label}: {what}: not a number: {value!r}")
    return float(value)


# ---------------------------------------------------------------------- shared checks
def _read_text(path: Path) -> str:
    try:
        return read_text(path, "reference file")
    except TextFileError as exc:
        raise ReferenceFileError(str(exc)) from None


def _check_samples(src: str, names: Sequence[str], times: Sequence[float] | None,
                   rows: Sequence[Sequence[float]], labels: Sequence[str],
                   joints: Sequence[str] | None, limits: JointLimits | None
                   ) -> tuple[list[str], np.ndarray]:
    """Joint set, NaN and position-limit checks; returns (ordered names, positions)."""
    names = list(names)
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise ReferenceFileError(f"{src}: joint '{sorted(dup)[0]}' appears twice")
    expected = list(joints) if joints else names
    for n in names:
        if n not in expected:
            raise ReferenceFileError(f"{src}: unknown joint '{n}'; expected joints {expected}")
    for n in expected:
        if n not in names:
            raise ReferenceFileError(f"{src}: joint '{n}' is missing; the file has {names}")
    if limits is not None:
        for n in names:
            if n not in limits.names:
                raise ReferenceFileError(f"{src}: unknown joint '{n}': not in the limits "
                                         f"(joints {list(limits.names)})")
    idx = [names.index(n) for n in expected]
    pos = np.asarray(rows, dtype=float).reshape(len(rows), len(names))[:, idx]
    if times is not None:
        for i, t in enumerate(times):
            if not math.isfinite(t):
                raise ReferenceFileError(f"{src}: {labels[i]}: time is {t}")
    bad = np.argwhere(~np.isfinite(pos))
    if bad.size:
        i, j = bad[0]
        raise ReferenceFileError(f"{src}: {labels[i]}: joint '{expected[j]}' position is "
                                 f"{pos[i, j]}")
    if limits is not None:
        lim = limits.subset(expected)
        out = (pos < lim.position_min) | (pos > lim.position_max)
        if out.any():
            i, j = np.argwhere(out)[0]
            raise ReferenceFileError(
                f"{src}: {labels[i]}: joint '{expected[j]}' position {pos[i, j]:.6g} is outside "
                f"its limits [{lim.position_min[j]:.6g}, {lim.position_max[j]:.6g}]")
    return expected, pos


def build_reference(src: str, names: Sequence[str], times: Sequence[float],
           rows: Sequence[Sequence[float]], labels: Sequence[str],
           joints: Sequence[str] | None, limits: JointLimits | None,
           max_gap: float | None, ends: str) -> ReferenceTrajectory:
    """Validate timed samples and build the reference; errors name ``src`` and the row."""
    if len(rows) < 2:
        raise ReferenceFileError(f"{src}: needs at least 2 samples, got {len(rows)}")
    order, pos = _check_samples(src, names, times, rows, labels, joints, limits)
    t = np.asarray(times, dtype=float)
    for i in range(1, t.size):
        if not t[i] > t[i - 1]:
            raise ReferenceFileError(f"{src}: {labels[i]}: time {t[i]:.9g} s is not after the "
                                     f"previous time {t[i - 1]:.9g} s (times must strictly "
                                     "increase)")
        if max_gap is not None and t[i] - t[i - 1] > max_gap:
            raise ReferenceFileError(f"{src}: {labels[i]}: gap of {t[i] - t[i - 1]:.6g} s after "
                                     f"the previous sample; the largest allowed gap is "
                                     f"{max_gap:g} s")
    try:
        return ReferenceTrajectory(order, t, pos, ends=ends)
    except TrajectoryError as exc:
        raise ReferenceFileError(f"{src}: {exc}") from None
