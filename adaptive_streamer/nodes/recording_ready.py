# SPDX-License-Identifier: Apache-2.0
"""Whether the recorder records every configured topic that has a publisher, judged from
another node: the demo and `bringup` start motion (activate the adapter) only once it does,
so a recording never begins with decisions whose inputs it lacks.

A subscription that the ROS graph shows is not enough: a publisher in another process can
match the recorder's subscription seconds later (seen: 1.6 s on a loaded 2-core machine), and
until then nothing reaches the bag. So the adapter's inputs (`INPUT_TOPICS`, published all
the time) count as recorded once the recorder has received a message on them (its
diagnostics on ``/diagnostics`` carry a count per topic); any other configured topic with a
publisher, which may stay silent for a long time (``stop``, ``shadow/setpoints``), counts
once the graph shows the recorder's subscription on it. A configured topic with no publisher
yet is not waited for (the recorder picks it up when it appears). And the run info in the
bag must hold the adapter's parameters as they are after configure (`RecordingWatch.wait`
with ``refresh``: the recorder's ``~/refresh_run_info``), so replay does not take the
parameters read before configure for those of the first decisions.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable, Sequence

from diagnostic_msgs.msg import DiagnosticArray
from rclpy.node import Node
from std_srvs.srv import Trigger

from adaptive_streamer.io.recording import STACK_TOPICS

INPUT_TOPICS = ("joint_states", "reference/window", "feedback")
RUN_INFO_KEY = "run_info_current_since"   # the recorder's diagnostics value (nodes.recorder)
RUN_INFO = "run info"                     # the name `RecordingGaps.missing` gives it


class RecordingNotReady(RuntimeError):
    """The recorder did not record every published topic in time."""


@dataclass(frozen=True)
class RecordingGaps:
    """Topics with a publisher that the recorder does not record yet (inputs not yet
    received, other topics not yet subscribed), and how many configured topics have a
    publisher."""

    missing: tuple[str, ...]
    published: int

    @property
    def ready(self) -> bool:
        """Every configured topic with a publisher is recorded."""
        return not self.missing


class RecordingWatch:
    """Follows the recorder named ``recorder_fqn`` (e.g. ``/recorder``, ``/cell1/recorder``)
    from ``node``: its per-topic counts from ``/diagnostics`` and its subscriptions in the
    graph. ``topics`` are the recorder's configured topics (relative names resolve in its
    namespace)."""

    def __init__(self, node: Node, recorder_fqn: str = "/recorder",
                 topics: Sequence[str] = STACK_TOPICS) -> None:
        self._node = node
        self.fqn = "/" + recorder_fqn.strip("/")
        ns, _, self._name = self.fqn.rpartition("/")
        self._ns = ns or "/"
        self.topics = tuple(t if t.startswith("/") else f"{ns}/{t}" for t in topics)
        self._inputs = {f"{ns}/{t}" for t in INPUT_TOPICS}
        self.counts: dict[str, int] = {}
        self.run_info_since = math.nan
        self._sub = node.create_subscription(DiagnosticArray, "/diagnostics", self._on_diag, 50)
        self._refresh = node.create_client(Trigger, f"{self.fqn}/refresh_run_info")

    def _on_diag(self, msg: DiagnosticArray) -> None:
        for status in msg.status:
            if status.name == self.fqn:
                for kv in status.values:
                    try:
                        if kv.key == RUN_INFO_KEY:
                            self.run_info_since = float(kv.value)
                        else:
                            self.counts[kv.key] = int(kv.value)
                    except ValueError:
                        continue

    def gaps(self, run_info_after: float = -math.inf) -> RecordingGaps:
        """The topics not recorded yet (see the module docstring), and `RUN_INFO` while the
        run info was last read before ``run_info_after`` (ROS time [s]; -inf: not asked)."""
        missing, published = [], 0
        unanswered = math.isnan(run_info_after)   # the refresh was not answered yet
        if unanswered or (run_info_after > -math.inf and not
                          self.run_info_since >= run_info_after - 1e-6):   # 1 us in the diag
            missing.append(RUN_INFO)
        for name in self.topics:
            if not self._node.get_publishers_info_by_topic(name):
                continue
            published += 1
            if name in self._inputs:
                if self.counts.get(name, 0) <= 0:
                    missing.append(name)
            elif not any(i.node_name == self._name and i.node_namespace == self._ns
                         for i in self._node.get_subscriptions_info_by_topic(name)):
                missing.append(name)
        return RecordingGaps(tuple(missing), published)

    def wait(self, timeout: float, pause: Callable[[float], None] = time.sleep,
             alive: Callable[[], bool] = lambda: True, refresh: bool = True) -> RecordingGaps:
        """Wait until every published topic is recorded and (``refresh``) the recorder has
        read the adapter's parameters again since this call. ``pause(seconds)`` passes the
        time between checks (it must let the node's subscriptions and clients run:
        `time.sleep` when another thread spins the node, a spin of the node otherwise);
        ``alive`` is asked between checks and ends the wait when False.
        `RecordingNotReady` names what is still not recorded."""
        deadline = time.monotonic() + timeout
        after, asked = (math.nan, None) if refresh else (-math.inf, None)
        while True:
            if refresh and asked is None and self._refresh.service_is_ready():
                asked = self._refresh.call_async(Trigger.Request())
            if asked is not None and asked.done() and math.isnan(after):
                answer = asked.result()
                after = float(answer.message) if answer is not None and answer.success \
                    else -math.inf
            gaps = self.gaps(after)
            if gaps.ready:
                return gaps
            if time.monotonic() > deadline or not alive():
                raise RecordingNotReady(
                    f"the recorder {self.fqn} does not record {', '.join(gaps.missing)} after "
                    f"{timeout:g} s (topics with publishers, or the adapter's parameters as "
                    "configured); motion is not started "
                    "(see the recorder's log)")
            pause(0.05)

    def close(self) -> None:
        """Drop the subscription."""
        self._node.destroy_subscription(self._sub)
        self._node.destroy_client(self._refresh)
