"""``joint_states`` as drivers send it: several messages, each with some of the joints.

A driver may publish the arm at one rate and a wrist or a gripper in messages of their own,
name joints the adapter does not command, in any order, and leave ``velocity`` empty.
`JointStateMerger` keeps, per commanded joint, the latest position and velocity and when
they were received; `JointStateMerger.state` gives them in the adapter's joint order once
every joint has been seen, with the OLDEST receive time (and header stamp) among the joints,
so one stale subset makes the whole state stale.

Messages are stored as they come (serialized bytes or ``sensor_msgs/JointState``) and parsed
when the state is asked for, newest first, only until every joint has a value (a decision
reads one or two of a 500 Hz stream). `joint_positions` reads one message (also for the
watchdog node, which judges each message on its own).

Rules for one message: a commanded joint it names must have a finite position, else the
whole message is rejected (counted); a repeated name counts at its first place; names the
adapter does not command are ignored; ``velocity`` is used when it has one value per name
(a non-finite value counts as missing), else it is missing for the message's joints. A
header stamp of zero means "not stamped": the receive time stands in.
"""
from __future__ import annotations

import math
import threading
from collections import deque
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
from rclpy.serialization import deserialize_message
from sensor_msgs.msg import JointState

PENDING_LIMIT = 256  # stored messages parsed (folded in) when no state was asked for


class JointStateError(ValueError):
    """A joint_states message is malformed for the commanded joints."""


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
    stamp: float                   # oldest stamp among the joints [s]
    position: np.ndarray
    velocity: np.ndarray | None    # None when a joint's velocity is missing


def _message(message: Any) -> Any:
    if isinstance(message, (bytes, bytearray, memoryview)):
        try:
            return deserialize_message(bytes(message), JointState)
        except Exception as exc:  # rclpy raises its own error types for bad bytes
            raise JointStateError(f"not a sensor_msgs/JointState: {exc}") from None
    return message


def joint_positions(message: Any, joints: Sequence[str]) -> MessageJoints:
    """The commanded ``joints``' values in one JointState (bytes or message); raises
    `JointStateError` for a named joint without a finite position."""
    msg = _message(message)
    try:
        names = [str(n) for n in msg.name]
        pos = np.asarray(msg.position, float)
        vel = np.asarray(msg.velocity, float)
        stamp = msg.header.stamp.sec + msg.header.stamp.nanosec * 1e-9
    except (TypeError, ValueError, AttributeError) as exc:
        raise JointStateError(f"unreadable JointState: {exc}") from None
    first: dict[str, int] = {}
    for i, name in enumerate(names):
        first.setdefault(name, i)
    n = len(joints)
    present = np.zeros(n, bool)
    position = np.full(n, math.nan)
    velocity = np.full(n, math.nan)
    with_velocity = vel.shape == (len(names),)
    for k, joint in enumerate(joints):
        i = first.get(joint)
        if i is None:
            continue
        if i >= pos.shape[0] or not math.isfinite(pos[i]):
            value = "missing" if i >= pos.shape[0] else f"{pos[i]}"
            raise JointStateError(f"joint '{joint}': position {value} (expected a finite "
                                  f"number; the message has {len(names)} names and "
                                  f"{pos.shape[0]} positions)")
        present[k] = True
        position[k] = pos[i]
        if with_velocity and math.isfinite(vel[i]):
            velocity[k] = vel[i]
    return MessageJoints(present, position, velocity, stamp)


class JointStateMerger:
    """Per-joint latest state from ``joint_states`` messages carrying subsets of ``joints``.

    `add` may be called from one thread (the subscription) while `state` is called from
    others.
    """

    def __init__(self, joints: Sequence[str], pending_limit: int = PENDING_LIMIT) -> None:
        self.joints = tuple(joints)
        n = len(self.joints)
        self._position = np.full(n, math.nan)
        self._velocity = np.full(n, math.nan)
        self._received = np.full(n, -math.inf)
        self._stamp = np.full(n, -math.inf)
        self._pending: deque[tuple[float, Any]] = deque()
        self._limit = pending_limit
        self._lock = threading.Lock()
        self._cached: MergedJointState | None = None
        self._rejected = 0
        self.rejected_total = 0
        self.last_error = ""

    def add(self, message: Any, received: float) -> None:
        """Store one message (bytes or JointState) received at ``received`` [s]."""
        with self._lock:
            self._pending.append((received, message))
            if len(self._pending) > self._limit:
                self._fold()

    def state(self) -> MergedJointState | None:
        """The merged state, or None until every joint has been seen."""
        with self._lock:
            if self._pending:
                self._fold()
                self._cached = None
            if self._cached is None and np.all(np.isfinite(self._received)):
                vel = self._velocity
                self._cached = MergedJointState(
                    float(self._received.min()), float(self._stamp.min()),
                    self._position.copy(), None if np.isnan(vel).any() else vel.copy())
            return self._cached

    def take_rejected(self) -> int:
        """Messages rejected since the last call."""
        with self._lock:
            count, self._rejected = self._rejected, 0
            return count

    def _fold(self) -> None:
        """Parse the pending messages newest first until every joint has a newer value."""
        todo = np.ones(len(self.joints), bool)
        while self._pending and todo.any():
            received, message = self._pending.pop()
            try:
                got = joint_positions(message, self.joints)
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
