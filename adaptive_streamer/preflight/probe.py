# SPDX-License-Identifier: Apache-2.0
"""The pre-flight's own rclpy node (``preflight``): it listens and counts, never publishes.

It runs in a context of its own (so it can share a process with other nodes), subscribes
to ``joint_states`` (per commanded joint: when it was named, the longest gap, using the
middleware's receive time so this process's own scheduling does not count) and, when asked,
to the transient-local ``robot_description``, and counts the subscribers of the command
topics. `Probe.observe` spins until everything was seen for the observation window, or
the timeout.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import rclpy
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import String

from ..io.joint_states import JointStateMerger
from ..nodes.common import qos_by_name, reliable_qos
from .checks import JointStatesSeen

WINDOW = 1.0   # joint_states observed for at least this long [s]


@dataclass(frozen=True)
class Observation:
    """What the probe saw."""

    joint_states: JointStatesSeen
    measured: np.ndarray | None       # merged positions in the commanded order (None: not all)
    robot_description: str | None
    subscribers: dict[str, int]        # command topic (resolved) -> subscriber count


class Probe:
    """A listening node in its own context; `close` destroys it."""

    def __init__(self, namespace: str, want_description: bool) -> None:
        self._context = Context()
        rclpy.init(context=self._context)
        self.node = Node("preflight", namespace=namespace or None, context=self._context)
        self._executor = SingleThreadedExecutor(context=self._context)
        self._executor.add_node(self.node)
        self._description: str | None = None
        self._want_description = want_description
        if want_description:
            self.node.create_subscription(String, "robot_description", self._on_description,
                                          reliable_qos(1, transient_local=True))
        self.joints: tuple[str, ...] = ()
        self.topics: list[str] = []
        self.joint_states_topic = self.node.resolve_topic_name("joint_states")

    def listen(self, joints: Sequence[str], joint_states_qos: str,
               topics: Sequence[str]) -> None:
        """Start listening to ``joint_states`` for ``joints`` and watching ``topics``."""
        self.joints = tuple(joints)
        n = len(self.joints)
        self._index = {j: i for i, j in enumerate(self.joints)}
        self._merger = JointStateMerger(self.joints)
        self._messages = 0
        self._first = math.nan
        self._last = np.full(n, math.nan)
        self._gap = np.zeros(n)
        self._updates = np.zeros(n, dtype=int)
        self._others: set[str] = set()
        self.node.create_subscription(JointState, "joint_states", self._on_joint_states,
                                      qos_by_name(joint_states_qos, 100))
        self.topics = [self.node.resolve_topic_name(t) for t in topics]

    def _on_joint_states(self, msg: JointState, info: dict[str, Any]) -> None:
        stamp = info.get("received_timestamp", 0)
        received = stamp * 1e-9 if stamp else time.time()  # 0: the middleware has none
        self._messages += 1
        if math.isnan(self._first):
            self._first = received
        for name in msg.name:
            i = self._index.get(name)
            if i is None:
                self._others.add(name)
                continue
            if not math.isnan(self._last[i]):
                self._gap[i] = max(self._gap[i], received - self._last[i])
            self._last[i] = received
            self._updates[i] += 1
        self._merger.add(msg, received)

    def _on_description(self, msg: String) -> None:
        self._description = msg.data

    def _subscribers(self) -> dict[str, int]:
        return {t: self.node.count_subscribers(t) for t in self.topics}

    def _complete(self, started: float) -> bool:
        seen = bool(np.all(self._updates > 0))
        watched = not math.isnan(self._first) and time.time() - self._first >= WINDOW
        described = self._description is not None or not self._want_description
        subscribed = all(c > 0 for c in self._subscribers().values())
        return seen and watched and described and subscribed \
            and time.monotonic() - started >= WINDOW

    def observe(self, timeout: float) -> Observation:
        """Spin until all is seen for `WINDOW` seconds, or ``timeout`` [s] passed."""
        started = time.monotonic()
        while time.monotonic() - started < timeout and not self._complete(started):
            self._executor.spin_once(timeout_sec=0.05)
        state = self._merger.state()
        seen = JointStatesSeen(
            self._messages, tuple(bool(u) for u in self._updates > 0), self._first,
            tuple(self._last.tolist()), tuple(self._gap.tolist()),
            tuple(int(u) for u in self._updates), time.time(), tuple(sorted(self._others)))
        return Observation(seen, None if state is None else state.position,
                           self._description, self._subscribers())

    def wait_for_description(self, timeout: float) -> str | None:
        """The ``robot_description`` (transient local), or None after ``timeout`` [s]."""
        end = time.monotonic() + timeout
        while self._description is None and time.monotonic() < end:
            self._executor.spin_once(timeout_sec=0.05)
        return self._description

    def close(self) -> None:
        """Destroy the node and shut its context down."""
        self._executor.shutdown()
        self.node.destroy_node()
        rclpy.shutdown(context=self._context)
