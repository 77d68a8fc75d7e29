# SPDX-License-Identifier: Apache-2.0
"""Fast exact reading of the few message types replay reads every decision cycle.

A message of a stream from one publisher keeps its byte layout from message to message
(same joint names, same number of points and values): only the numbers change. `Layouts`
walks a message once (little-endian CDR, XCDR1 alignment as ROS 2 uses it: each primitive
aligned to its size relative to the start of the data after the 4-byte encapsulation;
the elements of a sequence are aligned only when there is at least one), remembers where
its numbers are and which bytes give its structure (counts, strings), and reads later
messages of the same size by checking those structure bytes and gathering the numbers with
numpy. A message whose structure differs is walked again. Only the numbers are taken from
the bytes; padding is never read, so a writer's padding garbage cannot matter.

The numbers come out bit for bit as ``rosbags`` or ``rclpy`` deserialise them (the test
suite checks it); big-endian data (encapsulation ``00 00``) is refused with `CdrError` so
callers fall back to ``rosbags``.

Types: ``trajectory_msgs/msg/JointTrajectory``, ``sensor_msgs/msg/JointState``,
``std_msgs/msg/Float64MultiArray``.
"""
from __future__ import annotations

import struct
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

_U32 = struct.Struct("<I")
_I32 = struct.Struct("<i")
_STAMP = struct.Struct("<iI")


class CdrError(ValueError):
    """The bytes are not a little-endian CDR message of the expected type."""


@dataclass
class Parsed:
    """Numbers and structure of one message.

    ``ints``: name -> list of (byte offset, signed) of 4-byte integers; ``floats``: name ->
    list of (byte offset, count) of float64 runs; ``strings``: name -> list of strings.
    """

    ints: dict[str, list[tuple[int, bool]]]
    floats: dict[str, list[tuple[int, int]]]
    strings: dict[str, list[str]]
    structure: list[int]          # byte offsets of counts and string bytes
    end: int                      # offset after the last byte of the message


class _Walker:
    """Walks CDR bytes, recording where numbers and structure bytes are."""

    def __init__(self, raw: bytes) -> None:
        if len(raw) < 4 or raw[0] != 0 or raw[1] != 1:
            raise CdrError("not little-endian CDR (encapsulation 00 01)")
        self.raw = raw
        self.pos = 4
        self.out = Parsed({}, {}, {}, [], 4)

    def _align(self, n: int) -> None:
        self.pos += (-(self.pos - 4)) % n

    def _need(self, n: int) -> None:
        if self.pos + n > len(self.raw):
            raise CdrError("message is truncated")

    def count(self) -> int:
        """A uint32 count or string length (a structure value)."""
        self._align(4)
        self._need(4)
        (n,) = _U32.unpack_from(self.raw, self.pos)
        self.out.structure.extend(range(self.pos, self.pos + 4))
        self.pos += 4
        return n

    def integer(self, name: str, signed: bool) -> None:
        """A 4-byte number (a value)."""
        self._align(4)
        self._need(4)
        self.out.ints.setdefault(name, []).append((self.pos, signed))
        self.pos += 4

    def string(self, name: str) -> None:
        """A string (length and bytes are structure)."""
        n = self.count()
        self._need(n)
        if n < 1 or self.raw[self.pos + n - 1] != 0:
            raise CdrError("string is not NUL-terminated")
        self.out.strings.setdefault(name, []).append(
            self.raw[self.pos:self.pos + n - 1].decode("utf-8"))
        self.out.structure.extend(range(self.pos, self.pos + n))
        self.pos += n

    def float64s(self, name: str) -> None:
        """A sequence of float64 (count is structure, elements are values)."""
        n = self.count()
        if n:
            self._align(8)
            self._need(8 * n)
        self.out.floats.setdefault(name, []).append((self.pos, n))
        self.pos += 8 * n

    def done(self) -> Parsed:
        self.out.end = self.pos
        return self.out


def _header(w: _Walker) -> None:
    w.integer("stamp_sec", True)
    w.integer("stamp_nanosec", False)
    w.string("frame_id")


def walk_joint_trajectory(w: _Walker) -> None:
    """trajectory_msgs/msg/JointTrajectory."""
    _header(w)
    for _ in range(w.count()):
        w.string("joint_names")
    for _ in range(w.count()):
        for f in ("positions", "velocities", "accelerations", "effort"):
            w.float64s(f)
        w.integer("tfs_sec", True)
        w.integer("tfs_nanosec", False)


def walk_joint_state(w: _Walker) -> None:
    """sensor_msgs/msg/JointState."""
    _header(w)
    for _ in range(w.count()):
        w.string("name")
    for f in ("position", "velocity", "effort"):
        w.float64s(f)


def walk_float64_multi_array(w: _Walker) -> None:
    """std_msgs/msg/Float64MultiArray."""
    for _ in range(w.count()):
        w.string("label")
        w.integer("size", False)
        w.integer("stride", False)
    w.integer("data_offset", False)
    w.float64s("data")


WALKERS: dict[str, Callable[[_Walker], None]] = {
    "trajectory_msgs/msg/JointTrajectory": walk_joint_trajectory,
    "sensor_msgs/msg/JointState": walk_joint_state,
    "std_msgs/msg/Float64MultiArray": walk_float64_multi_array,
}


def parse(raw: bytes, msgtype: str) -> Parsed:
    """Walk ``raw`` as ``msgtype`` (one of `WALKERS`)."""
    w = _Walker(raw)
    try:
        WALKERS[msgtype](w)
    except (struct.error, UnicodeDecodeError) as exc:
        raise CdrError(f"{msgtype}: {exc}") from None
    return w.done()


class Layout:
    """Where the numbers of one message layout are, as numpy index arrays.

    ``floats[name]`` is an index array into the message viewed as float64 from byte 4
    (one row per run, runs of equal length) ; ``ints[name]`` indexes the message viewed as
    4-byte integers from byte 0.
    """

    def __init__(self, raw: bytes, parsed: Parsed) -> None:
        self.size = len(raw)
        self.parsed = parsed
        self.structure = np.asarray(parsed.structure, np.intp)
        self.signature = np.frombuffer(raw, np.uint8)[self.structure].copy()
        self.floats: dict[str, np.ndarray] = {}
        for name, runs in parsed.floats.items():
            counts = {n for _, n in runs}
            if len(counts) == 1:
                n = counts.pop()
                self.floats[name] = np.array([[(off - 4) // 8 + i for i in range(n)]
                                              for off, _ in runs], np.intp).reshape(len(runs), n)
        self.ints = {name: np.array([off // 4 for off, _ in slots], np.intp)
                     for name, slots in parsed.ints.items()}
        self.plan: Any = None  # what a reader derives from the layout (set by the reader)

    def matches(self, raw: bytes) -> bool:
        """True when ``raw`` has this layout (same size and structure bytes)."""
        return (len(raw) == self.size and
                np.array_equal(np.frombuffer(raw, np.uint8)[self.structure], self.signature))


class Layouts:
    """A cache of layouts of one message type, keyed by message size."""

    def __init__(self, msgtype: str) -> None:
        if msgtype not in WALKERS:
            raise CdrError(f"no fast reader for {msgtype}")
        self.msgtype = msgtype
        self._by_size: dict[int, Layout] = {}

    def layout(self, raw: bytes) -> Layout:
        """The layout of ``raw`` (walked and cached when new)."""
        lay = self._by_size.get(len(raw))
        if lay is not None and lay.matches(raw):
            return lay
        lay = Layout(raw, parse(raw, self.msgtype))
        self._by_size[len(raw)] = lay
        return lay


def stacked(raw: Sequence[bytes], lay: Layout) -> np.ndarray | None:
    """The messages ``raw`` as the rows of one uint8 array when every one has the layout
    ``lay`` (`Layout.matches` for all of them at once), else None."""
    if not raw or any(len(r) != lay.size for r in raw):
        return None
    rows = np.frombuffer(b"".join(raw), np.uint8).reshape(len(raw), lay.size)
    return rows if bool((rows[:, lay.structure] == lay.signature).all()) else None


def float_rows(rows: np.ndarray) -> np.ndarray:
    """`float_view` of every row of a `stacked` array."""
    count = (rows.shape[1] - 4) // 8
    return np.ascontiguousarray(rows[:, 4:4 + 8 * count]).view("<f8")


def int_rows(rows: np.ndarray, signed: bool) -> np.ndarray:
    """`int_view` of every row of a `stacked` array."""
    count = rows.shape[1] // 4
    return np.ascontiguousarray(rows[:, :4 * count]).view("<i4" if signed else "<u4")


def float_view(raw: bytes) -> np.ndarray:
    """The message viewed as float64 from byte 4 (for `Layout.floats` indices)."""
    return np.frombuffer(raw, "<f8", count=(len(raw) - 4) // 8, offset=4)


def int_view(raw: bytes, signed: bool) -> np.ndarray:
    """The message viewed as 4-byte integers from byte 0 (for `Layout.ints` indices)."""
    return np.frombuffer(raw, "<i4" if signed else "<u4", count=len(raw) // 4)


def header_stamp(raw: bytes) -> tuple[int, int]:
    """(sec, nanosec) of a message that starts with a std_msgs/Header."""
    if len(raw) < 12 or raw[0] != 0 or raw[1] != 1:
        raise CdrError("not little-endian CDR (encapsulation 00 01)")
    return _STAMP.unpack_from(raw, 4)


def stamp_seconds(sec: int, nanosec: int) -> float:
    """Seconds from a Time, computed exactly as ``io.stamps.stamp_to_sec`` does."""
    return sec + nanosec * 1e-9


def rosbags_like(parsed: Parsed, raw: bytes) -> dict[str, Any]:
    """Plain values of a walked message (for tests and error paths)."""
    f = float_view(raw)
    out: dict[str, Any] = {k: list(v) for k, v in parsed.strings.items()}
    for name, runs in parsed.floats.items():
        out[name] = [f[(off - 4) // 8:(off - 4) // 8 + n].copy() for off, n in runs]
    for name, slots in parsed.ints.items():
        out[name] = [(_I32 if s else _U32).unpack_from(raw, off)[0] for off, s in slots]
    return out
