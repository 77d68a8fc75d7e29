# SPDX-License-Identifier: Apache-2.0
"""Bag bytes -> the values the adapter node takes from its messages.

* `WindowReader`: ``reference/window`` (JointTrajectory) -> core `Window`, the same arrays
  ``io.trajectory_conversions.msg_to_window`` gives (it is called for every new layout,
  so errors are the node's; later messages of that layout are gathered with `fast_cdr`
  after a bit-for-bit check on the first one).
* `JointStateReader`: JointState -> names, position, velocity, stamp (``joint_states`` and
  ``feedback``).
* `decision_records`: the ``~/decisions`` topic -> core `Decision` objects.

Everything here reads bytes; there is no DDS. ``rosbags`` is the fallback decoder.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from adaptive_streamer.core import decision_record
from adaptive_streamer.core.cycle import Decision
from adaptive_streamer.core.playback import Window
from adaptive_streamer.io.trajectory_conversions import TrajectoryMessageError, msg_to_window

from . import fast_cdr
from .bag_io import decode
from .fast_cdr import CdrError, Layouts, float_view, int_view, stamp_seconds

JOINT_TRAJECTORY = "trajectory_msgs/msg/JointTrajectory"
JOINT_STATE = "sensor_msgs/msg/JointState"
FLOAT64_ARRAY = "std_msgs/msg/Float64MultiArray"
BOOL = "std_msgs/msg/Bool"
STRING = "std_msgs/msg/String"
DIAGNOSTIC_ARRAY = "diagnostic_msgs/msg/DiagnosticArray"


class MessageError(ValueError):
    """A message cannot be read as the type its topic needs."""


_GENERIC = "generic"  # plan marker: this layout is always read with rosbags


@dataclass(frozen=True)
class FirstPoints:
    """The header stamps and first points of a run of trajectory messages (rows)."""

    sec: np.ndarray
    nanosec: np.ndarray
    positions: np.ndarray      # (messages, joints)
    velocities: np.ndarray
    accelerations: np.ndarray


class WindowReader:
    """Reads window messages into `Window` for ``joints`` (columns in that order)."""

    def __init__(self, joints: Sequence[str]) -> None:
        self.joints = tuple(joints)
        self._layouts = Layouts(JOINT_TRAJECTORY)

    def read(self, raw: bytes) -> Window:
        """The window of ``raw``; raises `TrajectoryMessageError` as the node would."""
        try:
            lay = self._layouts.layout(raw)
        except CdrError:
            return self._generic(raw)
        if lay.plan is None:
            window = self._generic(raw)  # raises the node's error for a bad message
            lay.plan = self._plan(lay)
            if lay.plan is not _GENERIC and not _same_window(self._fast(lay, raw), window):
                lay.plan = _GENERIC
            return window
        if lay.plan is _GENERIC:
            return self._generic(raw)
        return self._fast(lay, raw)

    def first_points(self, raw: Sequence[bytes]) -> FirstPoints | None:
        """Stamps and first points of all of ``raw`` at once, bit for bit as `read` gives
        them, when every message has the first one's layout and that layout is read
        fast; else None (read them one by one). Raises as `read` does for the first one."""
        if not raw:
            return None
        self.read(raw[0])  # the first of a layout is checked against the node's conversion
        try:
            lay = self._layouts.layout(raw[0])
        except CdrError:
            return None
        rows = fast_cdr.stacked(raw, lay) if lay.plan not in (None, _GENERIC) else None
        if rows is None:
            return None
        f = fast_cdr.float_rows(rows)
        P, V, A = (f[:, i[0]] for i in lay.plan)
        return FirstPoints(fast_cdr.int_rows(rows, True)[:, 1].astype(np.int64),
                           fast_cdr.int_rows(rows, False)[:, 2].astype(np.int64), P, V, A)

    def _generic(self, raw: bytes) -> Window:
        try:
            msg = decode(raw, JOINT_TRAJECTORY)
        except Exception as exc:  # rosbags SerdeError
            raise TrajectoryMessageError(f"cannot decode the message: {exc}") from None
        return msg_to_window(msg, self.joints)

    def _plan(self, lay: fast_cdr.Layout) -> Any:
        names = lay.parsed.strings.get("joint_names", [])
        need = ("positions", "velocities", "accelerations")
        if any(f not in lay.floats for f in need) or "tfs_sec" not in lay.ints:
            return _GENERIC
        idx = [names.index(j) for j in self.joints]
        return tuple(lay.floats[f][:, idx] for f in need)

    def _fast(self, lay: fast_cdr.Layout, raw: bytes) -> Window:
        f = float_view(raw)
        P, V, A = (f[i] for i in lay.plan)
        secs = int_view(raw, True)[lay.ints["tfs_sec"]].astype(float)
        nsecs = int_view(raw, False)[lay.ints["tfs_nanosec"]].astype(float)
        sec, nsec = fast_cdr.header_stamp(raw)
        return Window(stamp_seconds(sec, nsec), secs + nsecs * 1e-9, P, V, A, self.joints)


def _same_window(a: Window, b: Window) -> bool:
    return (a.stamp == b.stamp and a.names == b.names and
            all(np.array_equal(x, y, equal_nan=True) and x.shape == y.shape
                for x, y in zip(a[1:5], b[1:5])))


class JointStateReader:
    """Reads JointState bytes: (names, position, velocity, stamp sec, stamp nanosec)."""

    def __init__(self) -> None:
        self._layouts = Layouts(JOINT_STATE)

    def read(self, raw: bytes) -> tuple[tuple[str, ...], np.ndarray, np.ndarray, int, int]:
        """The fields of ``raw``; raises `MessageError` for bytes that are not a JointState."""
        try:
            lay = self._layouts.layout(raw)
        except CdrError:
            try:
                m = decode(raw, JOINT_STATE)
            except Exception as exc:  # rosbags SerdeError
                raise MessageError(f"cannot decode a {JOINT_STATE}: {exc}") from None
            return (tuple(m.name), np.asarray(m.position, float), np.asarray(m.velocity, float),
                    int(m.header.stamp.sec), int(m.header.stamp.nanosec))
        if lay.plan is None:
            runs = lay.parsed.floats
            lay.plan = (tuple(lay.parsed.strings.get("name", [])),
                        *(slice((runs[f][0][0] - 4) // 8, (runs[f][0][0] - 4) // 8 + runs[f][0][1])
                          for f in ("position", "velocity")))
        names, ps, vs = lay.plan
        f = float_view(raw)
        sec, nsec = fast_cdr.header_stamp(raw)
        return names, f[ps].copy(), f[vs].copy(), sec, nsec


def header_stamps(raw: Sequence[bytes]) -> np.ndarray:
    """``header.stamp`` in seconds of every message (NaN where unreadable)."""
    heads = b"".join(r[:12] for r in raw)
    if len(heads) == 12 * len(raw):  # every message has the 12 bytes: gather at once
        rows = np.frombuffer(heads, np.uint8).reshape(len(raw), 12)
        sec = rows[:, 4:8].copy().view("<i4")[:, 0].astype(np.int64)
        nsec = rows[:, 8:12].copy().view("<u4")[:, 0].astype(np.int64)
        out = sec.astype(float) + nsec.astype(float) * 1e-9  # as stamp_seconds
        little = (rows[:, 0] == 0) & (rows[:, 1] == 1)
        todo = np.flatnonzero(~little).tolist()
    else:
        out = np.full(len(raw), np.nan)
        todo = range(len(raw))
    for i in todo:
        out[i] = math.nan
        r = raw[i]
        try:
            out[i] = stamp_seconds(*fast_cdr.header_stamp(r))
        except CdrError:
            try:
                st = decode(r, "std_msgs/msg/Header")  # the header leads the message
                out[i] = stamp_seconds(int(st.stamp.sec), int(st.stamp.nanosec))
            except Exception:  # not a message starting with a header
                continue
    return out


def decision_records(raw: Sequence[bytes]) -> tuple[list[Decision], list[int]]:
    """Decisions of the ``~/decisions`` messages (and the message indices they came from).

    Messages whose ``layout.dim[0].label`` is not the record label are skipped; a record
    with the label that does not decode raises `MessageError` naming its index.
    """
    layouts = Layouts(FLOAT64_ARRAY)
    out: list[Decision] = []
    index: list[int] = []
    for i, r in enumerate(raw):
        try:
            lay = layouts.layout(r)
            labels = lay.parsed.strings.get("label", [])
            off, n = lay.parsed.floats["data"][0]
            data = float_view(r)[(off - 4) // 8:(off - 4) // 8 + n]
        except CdrError:
            try:
                m = decode(r, FLOAT64_ARRAY)
            except Exception as exc:  # rosbags SerdeError
                raise MessageError(f"decision message {i}: cannot decode: {exc}") from None
            labels = [d.label for d in m.layout.dim]
            data = np.asarray(m.data, float)
        if not labels or labels[0] != decision_record.LABEL:
            continue
        try:
            out.append(decision_record.decode(data))
        except decision_record.DecisionRecordError as exc:
            raise MessageError(f"decision message {i}: {exc}") from None
        index.append(i)
    return out, index


def read_bool(raw: bytes) -> bool:
    """std_msgs/Bool bytes -> value."""
    try:
        return bool(decode(raw, BOOL).data)
    except Exception as exc:  # rosbags SerdeError
        raise MessageError(f"cannot decode a {BOOL}: {exc}") from None


def read_string(raw: bytes) -> str:
    """std_msgs/String bytes -> text."""
    try:
        return str(decode(raw, STRING).data)
    except Exception as exc:  # rosbags SerdeError
        raise MessageError(f"cannot decode a {STRING}: {exc}") from None
