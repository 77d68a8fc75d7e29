# SPDX-License-Identifier: Apache-2.0
"""Reading references from rosbag2 topics (with the ``rosbags`` library), and
`load_reference`, which reads any reference file by its kind.

rosbag2 (read with the ``rosbags`` library): a topic of ``sensor_msgs/msg/JointState``
(one sample per message: names, positions) or ``trajectory_msgs/msg/JointTrajectory``
(either exactly one message holding the whole trajectory, times from ``time_from_start``,
or a stream of one-point messages). A stream sample's time is ``header.stamp`` (plus the
point's ``time_from_start``), or the bag's receive time when the stamp is zero. Velocities
and accelerations in the files are ignored: they are derived from the positions by the
reference's spline, so they are always consistent with it.

The samples are checked as `adaptive_streamer.core.reference_files` checks CSV and YAML.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..core.limits import JointLimits
from ..core.reference import ReferenceTrajectory
from ..core.reference_files import (DEFAULT_MAX_GAP, ReferenceFileError, build_reference,
                                    load_csv, load_reference_file, load_yaml)
from ..core.timing import DEFAULT_FRACTION
from .bag_io import decode

__all__ = ["ReferenceFileError", "is_bag", "load_bag", "load_csv", "load_reference", "load_yaml"]

JOINT_STATE = "sensor_msgs/msg/JointState"
JOINT_TRAJECTORY = "trajectory_msgs/msg/JointTrajectory"
BAG_SUFFIXES = (".mcap", ".db3")


def is_bag(path: str | Path) -> bool:
    """True for a rosbag2 directory, or a .mcap/.db3 storage file inside one."""
    p = Path(path)
    return p.is_dir() or p.suffix.lower() in BAG_SUFFIXES


def load_reference(path: str | Path, *, topic: str | None = None,
                   joints: Sequence[str] | None = None, limits: JointLimits | None = None,
                   max_gap: float | None = DEFAULT_MAX_GAP, ends: str = "rest",
                   fraction: float = DEFAULT_FRACTION) -> ReferenceTrajectory:
    """Load a reference from a rosbag2 (``topic`` required) or, for any other path, as
    `adaptive_streamer.core.reference_files.load_reference_file` does (same arguments)."""
    p = Path(path)
    if is_bag(p):
        if not topic:
            raise ReferenceFileError(f"{p}: a rosbag2 reference needs the topic to read")
        return load_bag(p, topic, joints=joints, limits=limits, max_gap=max_gap, ends=ends)
    return load_reference_file(p, joints=joints, limits=limits, max_gap=max_gap, ends=ends,
                               fraction=fraction)


def load_bag(path: str | Path, topic: str, *, joints: Sequence[str] | None = None,
             limits: JointLimits | None = None, max_gap: float | None = DEFAULT_MAX_GAP,
             ends: str = "rest") -> ReferenceTrajectory:
    """Read a JointState or JointTrajectory topic from a rosbag2 (directory or storage file)."""
    from rosbags.rosbag2 import Reader, ReaderError
    from rosbags.serde import SerdeError

    p = Path(path)
    bag = p if p.is_dir() else p.parent
    src = f"{bag} topic '{topic}'"
    msgs: list[tuple[int, Any]] = []
    try:
        with Reader(bag) as reader:
            conns = [c for c in reader.connections if c.topic == topic]
            if not conns:
                topics = sorted({c.topic for c in reader.connections})
                raise ReferenceFileError(f"{bag}: no topic '{topic}' in the bag; topics: {topics}")
            msgtype = conns[0].msgtype
            if msgtype not in (JOINT_STATE, JOINT_TRAJECTORY):
                raise ReferenceFileError(f"{src}: type {msgtype} is not usable; expected "
                                         f"{JOINT_STATE} or {JOINT_TRAJECTORY}")
            for i, (conn, logtime, raw) in enumerate(reader.messages(connections=conns)):
                try:
                    msgs.append((logtime, decode(raw, conn.msgtype)))
                except SerdeError as exc:
                    raise ReferenceFileError(f"{src}: message {i}: cannot decode "
                                             f"{conn.msgtype}: {exc}") from None
    except (ReaderError, OSError) as exc:
        raise ReferenceFileError(f"{bag}: cannot read rosbag2: {exc}") from None
    if not msgs:
        raise ReferenceFileError(f"{src}: the topic has no messages")
    if msgtype == JOINT_STATE:
        names, times, rows, labels = _joint_states(src, msgs)
    else:
        names, times, rows, labels = _joint_trajectories(src, msgs)
    return build_reference(src, names, times, rows, labels, joints, limits, max_gap, ends)


def _stamp(msg: Any, logtime: int) -> float:
    st = msg.header.stamp
    if st.sec == 0 and st.nanosec == 0:
        return logtime * 1e-9
    return st.sec + st.nanosec * 1e-9


def _aligned(src: str, label: str, names: list[str], got: Sequence[str],
             values: np.ndarray) -> list[float]:
    """``values`` reordered from ``got`` to ``names``; errors for unknown/missing/short."""
    got = list(got)
    if len(values) != len(got):
        raise ReferenceFileError(f"{src}: {label}: {len(got)} joint names but {len(values)} "
                                 "positions")
    if sorted(got) != sorted(names):
        extra = [g for g in got if g not in names]
        if extra:
            raise ReferenceFileError(f"{src}: {label}: unknown joint '{extra[0]}' (the first "
                                     f"message has {names})")
        missing = [n for n in names if n not in got]
        if missing:
            raise ReferenceFileError(f"{src}: {label}: joint '{missing[0]}' is missing "
                                     f"(expected {names})")
        raise ReferenceFileError(f"{src}: {label}: a joint name is repeated in {got}")
    return [float(values[got.index(n)]) for n in names]


Rows = tuple[list[str], list[float], list[list[float]], list[str]]


def _joint_states(src: str, msgs: list[tuple[int, Any]]) -> Rows:
    names = list(msgs[0][1].name)
    times, rows, labels = [], [], []
    for i, (logtime, msg) in enumerate(msgs):
        label = f"message {i}"
        rows.append(_aligned(src, label, names, msg.name, np.asarray(msg.position)))
        times.append(_stamp(msg, logtime))
        labels.append(label)
    return names, times, rows, labels


def _joint_trajectories(src: str, msgs: list[tuple[int, Any]]) -> Rows:
    def tfs(pt: Any) -> float:
        return pt.time_from_start.sec + pt.time_from_start.nanosec * 1e-9

    if len(msgs) == 1 and len(msgs[0][1].points) >= 2:
        msg = msgs[0][1]
        names = list(msg.joint_names)
        labels = [f"message 0 point {k}" for k in range(len(msg.points))]
        rows = [_aligned(src, labels[k], names, names, np.asarray(pt.positions))
                for k, pt in enumerate(msg.points)]
        return names, [tfs(pt) for pt in msg.points], rows, labels
    names = list(msgs[0][1].joint_names)
    times, rows, labels = [], [], []
    for i, (logtime, msg) in enumerate(msgs):
        label = f"message {i}"
        if len(msg.points) != 1:
            raise ReferenceFileError(
                f"{src}: {label}: has {len(msg.points)} points; expected either one message "
                "holding the whole trajectory or a stream of one-point messages")
        pt = msg.points[0]
        rows.append(_aligned(src, label, names, msg.joint_names, np.asarray(pt.positions)))
        times.append(_stamp(msg, logtime) + tfs(pt))
        labels.append(label)
    return names, times, rows, labels
