# SPDX-License-Identifier: Apache-2.0
"""``joint_states`` as drivers send it: several messages, each with some of the joints.

A driver may publish the arm at one rate and a wrist or a gripper in messages of their own,
name joints the adapter does not command, in any order, and leave ``velocity`` empty.
`JointStateMerger` keeps, per commanded joint, the latest position and velocity and when
they were received; `JointStateMerger.state` gives them in the adapter's joint order once
every joint has been seen, with the OLDEST receive time among the joints, so one stale
subset makes the whole state stale, and with each joint's measurement time (the stamp of
the message it came in), so each joint is compared with the command at its own time.

Messages are stored as they come (serialized bytes or ``sensor_msgs/JointState``), the
latest of each set of names only (`structure_key`; a newer message with the same names
replaces the older one unread), and parsed when the state is asked for, newest first,
only until every joint has a value: a decision reads one message per stream however fast
the driver publishes. A rejected message thus leaves its joints at the values merged
before. `joint_positions` reads one message (also for the
watchdog node, which judges each message on its own). rclpy is imported only to
deserialize bytes, so offline tools can use the merger with their own decoder.

Rules for one message: a commanded joint it names must have a finite position, else the
whole message is rejected (counted); a repeated name counts at its first place; names the
adapter does not command are ignored; ``velocity`` is used when it has one value per name
(a non-finite value counts as missing), else it is missing for the message's joints. A
header stamp of zero means "not stamped": the receive time stands in.
"""
from __future__ import annotations

import math
import struct
import threading
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

PENDING_LIMIT = 64   # stored name sets parsed (folded in) when no state was asked for
_U32 = struct.Struct("<I")


class JointStateError(ValueError):
    """A joint_states message is malformed for the commanded joints."""


@dataclass(frozen=True)
class JointStateFields:
    """The fields of one JointState message that matter here."""

    names: Sequence[str]
    position: np.ndarray
    velocity: np.ndarray
    stamp: float           # header stamp [s] (0 when not stamped)


@dataclass(frozen=True)
class MessageJoints:
    """What one message says about the commanded joints (NaN where it says nothing)."""

    present: np.ndarray    # bool per commanded joint
    position: np.ndarray   # NaN where not present
    velocity: np.ndarray   # NaN where not present or not given
    stamp: float           # header stamp [s] (0 when not stamped)


@dataclass(frozen=True)
class MergedJointState:
    """The merged state in the commanded joint order."""

    received: float                # oldest receive time among the joints [s]
    position: np.ndarray
    velocity: np.ndarray | None    # None when a joint's velocity is missing
    stamps: np.ndarray             # per joint: the stamp of the message it came in [s]


Decoder = Callable[[Any], JointStateFields]


def ros_fields(message: Any) -> JointStateFields:
    """Fields of a ``sensor_msgs/JointState`` given as a message object or its serialized
    bytes (deserialized with rclpy)."""
    if isinstance(message, (bytes, bytearray, memoryview)):
        from rclpy.serialization import deserialize_message
        from sensor_msgs.msg import JointState
        try:
            message = deserialize_message(bytes(message), JointState)
        except Exception as exc:  # rclpy raises its own error types for bad bytes
            raise JointStateError(f"not a sensor_msgs/JointState: {exc}") from None
    try:
        return JointStateFields([str(n) for n in message.name],
                                np.asarray(message.position, float),
                                np.asarray(message.velocity, float),
                                message.header.stamp.sec + message.header.stamp.nanosec * 1e-9)
    except (TypeError, ValueError, AttributeError) as exc:
        raise JointStateError(f"unreadable JointState: {exc}") from None


def structure_key(message: Any) -> Any:
    """What makes two messages carry the same joints: ``header.frame_id`` and ``name``.

    For CDR bytes (little-endian, XCDR1: a string is a uint32 length counting the
    terminating NUL, then the characters; the next uint32 is aligned to 4 bytes from the
    data start) the length and character bytes of ``frame_id`` and ``name`` (padding
    bytes are left out: a writer may leave garbage there); bytes that cannot be walked are
    their own key."""
    if isinstance(message, (bytes, bytearray, memoryview)):
        raw = bytes(message)
        parts = []                                      # the strings, without the padding
        try:
            if raw[1] != 1:
                return raw
            off = 12                                    # encapsulation, stamp
            n = _U32.unpack_from(raw, off)[0]           # frame_id
            parts.append(raw[off:off + 4 + n])
            off = 4 + ((off + 4 + n - 4 + 3) & ~3)
            count = _U32.unpack_from(raw, off)[0]
            parts.append(raw[off:off + 4])
            off += 4
            for _ in range(count):
                n = _U32.unpack_from(raw, off)[0]
                parts.append(raw[off:off + 4 + n])
                off = 4 + ((off + 4 + n - 4 + 3) & ~3)
            if off > len(raw):
                return raw
        except (IndexError, struct.error):
            return raw
        return b"".join(parts)
    try:
        return (str(message.header.frame_id), tuple(str(n) for n in message.name))
    except (AttributeError, TypeError):
        return id(message)


def cdr_decoder() -> Decoder:
    """A decoder of serialized JointState bytes with the replay's exact CDR reader (the
    numbers bit for bit as rclpy deserializes them, about four times faster)."""
    from .messages import JointStateReader, MessageError

    reader = JointStateReader()

    def decode(raw: Any) -> JointStateFields:
        if not isinstance(raw, (bytes, bytearray, memoryview)):
            return ros_fields(raw)
        try:
            names, position, velocity, sec, nsec = reader.read(bytes(raw))
        except MessageError as exc:
            raise JointStateError(str(exc)) from None
        return JointStateFields(names, position, velocity, sec + nsec * 1e-9)
    return decode


def joint_positions(message: Any, joints: Sequence[str], decode: Decoder = ros_fields,
                    _index: dict | None = None) -> MessageJoints:
    """The commanded ``joints``' values in one JointState (as ``decode`` reads it); raises
    `JointStateError` for a named joint without a finite position."""
    fields = decode(message)
    names, pos, vel = fields.names, fields.position, fields.velocity
    key = tuple(names)
    found = _index.get(key) if _index is not None else None
    if found is None:
        first: dict[str, int] = {}
        for i, name in enumerate(names):
            first.setdefault(name, i)
        pairs = [(k, first[j]) for k, j in enumerate(joints) if j in first]
        found = (np.array([k for k, _ in pairs], int), np.array([i for _, i in pairs], int))
        if _index is not None:
            if len(_index) > 64:   # a publisher changing its names all the time
                _index.clear()
            _index[key] = found
    ks, idx = found
    n = len(joints)
    present = np.zeros(n, bool)
    position = np.full(n, math.nan)
    velocity = np.full(n, math.nan)
    if len(idx) and (idx.max() >= pos.shape[0] or not np.isfinite(pos[idx]).all()):
        bad = next(int(i) for i in idx if i >= pos.shape[0] or not math.isfinite(pos[i]))
        joint = names[bad]
        value = "missing" if bad >= pos.shape[0] else f"{pos[bad]}"
        raise JointStateError(f"joint '{joint}': position {value} (expected a finite number; "
                              f"the message has {len(names)} names and {pos.shape[0]} "
                              "positions)")
    present[ks] = True
    position[ks] = pos[idx]
    if vel.shape == (len(names),):
        velocity[ks] = vel[idx]       # a non-finite velocity counts as missing (NaN)
        velocity[~np.isfinite(velocity)] = math.nan
    return MessageJoints(present, position, velocity, fields.stamp)


class JointStateMerger:
    """Per-joint latest state from ``joint_states`` messages carrying subsets of ``joints``.

    ``decode`` reads a stored message (default `ros_fields`: message objects or bytes via
    rclpy; replay passes its own bag reader). `add` may be called from one thread (the
    subscription) while `state` is called from others.
    """

    def __init__(self, joints: Sequence[str], pending_limit: int = PENDING_LIMIT,
                 decode: Decoder = ros_fields) -> None:
        self.joints = tuple(joints)
        self._decode = decode
        self._index: dict = {}
        n = len(self.joints)
        self._position = np.full(n, math.nan)
        self._velocity = np.full(n, math.nan)
        self._received = np.full(n, -math.inf)
        self._stamp = np.full(n, -math.inf)
        self._pending: dict[Any, tuple[float, Any]] = {}  # structure key -> latest, in order
        self._limit = pending_limit
        self._lock = threading.Lock()
        self._cached: MergedJointState | None = None
        self._rejected = 0
        self.rejected_total = 0
        self.last_error = ""

    def add(self, message: Any, received: float) -> None:
        """Store one message (bytes or JointState) received at ``received`` [s]."""
        key = structure_key(message)
        with self._lock:
            self._pending.pop(key, None)       # a newer message with the same names replaces
            self._pending[key] = (received, message)
            if len(self._pending) > self._limit:
                self._fold()

    def state(self) -> MergedJointState | None:
        """The merged state, or None until every joint has been seen."""
        with self._lock:
            if self._pending:
                self._fold()
            if self._cached is None and np.all(np.isfinite(self._received)):
                vel = self._velocity
                self._cached = MergedJointState(
                    float(self._received.min()), self._position.copy(),
                    None if np.isnan(vel).any() else vel.copy(), self._stamp.copy())
            return self._cached

    def take_rejected(self) -> int:
        """Messages rejected since the last call."""
        with self._lock:
            count, self._rejected = self._rejected, 0
            return count

    def _fold(self) -> None:
        """Parse the pending messages newest first until every joint has a newer value."""
        todo = np.ones(len(self.joints), bool)
        for received, message in reversed(self._pending.values()):
            if not todo.any():
                break
            try:
                got = joint_positions(message, self.joints, self._decode, self._index)
            except JointStateError as exc:
                self._rejected += 1
                self.rejected_total += 1
                self.last_error = str(exc)
                continue
            take = got.present & todo
            self._position[take] = got.position[take]
            self._velocity[take] = got.velocity[take]
            self._received[take] = received
            self._stamp[take] = got.stamp if got.stamp > 0 else received
            todo &= ~got.present
        self._pending.clear()
        self._cached = None
