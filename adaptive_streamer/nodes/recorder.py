# SPDX-License-Identifier: Apache-2.0
"""Node ``recorder``: records the stack's topics to a rosbag2 bag (MCAP) for replay.

Subscriptions are raw (serialised bytes, never converted) with a QoS matched to what the
publishers offer: reliable only when every publisher is reliable, transient-local only
when every publisher is, so the recorder never asks a publisher for more than it offers
and never changes the stream's timing. Each topic's offered QoS profiles (from the
publishers' endpoint info) are stored with the topic. Topics are picked up as they appear
(checked every ``discovery_period``). Receive times are the node's clock (ROS time, so sim
time under ``use_sim_time``).

The adapter's effective parameters and the files they name are stored as run info
(`adaptive_streamer.io.run_info`): a ``std_msgs/String`` message on
``adaptive_streamer/run_info`` once the adapter's parameter services answer, again when
its parameters change (``/parameter_events``), and in ``metadata.yaml`` at close.

The bag is closed cleanly on Ctrl-C or SIGTERM; chunks are flushed as they close, so a
crash loses at most the chunk being filled (at most ``chunk_size`` bytes or
``chunk_duration`` seconds of messages).

Parameters (read-only):
  output            bag folder to create (default: ``bags/run_<UTC time>``)
  topics            topics to record; relative names resolve in the recorder's namespace
                    (default: `adaptive_streamer.io.recording.STACK_TOPICS`)
  compression       none | zstd | lz4 (MCAP chunk compression, default none)
  chunk_size        bytes per chunk, 1024 .. 1048576 (default 262144)
  chunk_duration    close a chunk once its oldest message is this old [s] (default 1.0)
  discovery_period  how often to look for new topics [s] (default 0.25)
  adapter_node      the adapter whose parameters are stored ('' = none; default 'adapter')
  depth             subscription history depth (default 100)

Diagnostics (``/diagnostics``, name: the node's full name, every 0.5 s and at once when a
topic's first message arrives or the run info is read again): the messages recorded per
topic, and `RUN_INFO_KEY`: the ROS time at which the last completed reading of the
adapter's parameters started. Service ``~/refresh_run_info`` (std_srvs/Trigger) reads them
again and answers with the time of the request, so a caller can wait until the bag's run
info holds the parameters as they are now (the demo and bringup do, after configuring the
adapter and before activating it).

Prints ``recorder: ready <bag>`` and ``recorder: recording <topic> <type>`` lines on stdout
(read by `adaptive_streamer.replay.recorder.Recorder`).
"""
from __future__ import annotations

import array
import math
import datetime as _dt
import functools
import sys
from typing import Any

from rcl_interfaces.msg import ParameterEvent
from rclpy.node import Node
from rclpy.parameter import parameter_value_to_python
from std_srvs.srv import Trigger
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy

from adaptive_streamer.io import run_info
from adaptive_streamer.io.bag_io import BagError, BagWriter, encode, typestore
from adaptive_streamer.io.recording import STACK_TOPICS, installed_message_class, qos_to_rosbags

from ..io.param_specs import RECORDER
from .common import OK, DiagnosticsReporter, declare, run_nodes

STRING = "std_msgs/msg/String"
RUN_INFO_KEY = "run_info_current_since"   # diagnostics: see `RecorderNode._on_refresh`


class RecorderError(ValueError):
    """The recorder's parameters are invalid."""


class RecorderNode(Node):
    """Records the configured topics to a bag (see the module docstring)."""

    param_error = RecorderError

    def __init__(self, **kwargs: Any) -> None:
        super().__init__("recorder", **kwargs)
        stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%d_%H%M%S")
        output = declare(self, RECORDER["output"], f"bags/run_{stamp}")
        topics = declare(self, RECORDER["topics"], list(STACK_TOPICS))
        compression = declare(self, RECORDER["compression"])
        chunk_size = declare(self, RECORDER["chunk_size"])
        chunk_duration = declare(self, RECORDER["chunk_duration"])
        period = declare(self, RECORDER["discovery_period"])
        self._adapter = declare(self, RECORDER["adapter_node"])
        self._depth = int(declare(self, RECORDER["depth"]))
        wanted = [t for t in topics if t]
        if not wanted:
            raise RecorderError("parameter 'topics' is empty")
        if not period > 0:
            raise RecorderError(f"discovery_period must be positive, got {period!r}")
        self._wanted = {self.resolve_topic_name(t): t for t in wanted}
        self._info_topic = self.resolve_topic_name(run_info.TOPIC)
        try:
            self.writer = BagWriter(output, compression, int(chunk_size), float(chunk_duration))
        except BagError as exc:
            raise RecorderError(str(exc)) from None
        self._config = {"node": self.get_fully_qualified_name(), "output": str(output),
                        "topics": sorted(self._wanted), "compression": compression,
                        "chunk_size": int(chunk_size), "chunk_duration": float(chunk_duration)}
        self._subs: dict[str, Any] = {}
        self._skipped: dict[str, str] = {}
        self.counts: dict[str, int] = {}
        self._info_conn = None
        self._info_text: str | None = None
        self._param_client = None
        self._fetching = False
        self._refetch = False      # parameters changed while a fetch was in flight
        self._refresh = False      # a ~/refresh_run_info request waits for a fetch to start
        self._asked = math.nan     # ROS time [s] the fetch in flight was started
        self.current_since = math.nan   # start of the last completed fetch (none pending)
        self._told_since = math.nan
        if self._adapter:
            from rclpy.parameter_client import AsyncParameterClient
            self._adapter_fqn = self.resolve_topic_name(self._adapter)
            self._param_client = AsyncParameterClient(self, self._adapter_fqn)
            self._events = self.create_subscription(ParameterEvent, "/parameter_events",
                                                    self._on_parameter_event, 10)
        self._diag = DiagnosticsReporter(
            self, self.get_fully_qualified_name(), 0.5,
            values=lambda: sorted(self.counts.items()) + [(RUN_INFO_KEY, self.current_since)])
        self.create_service(Trigger, "~/refresh_run_info", self._on_refresh)
        self._diag.set(OK, "recording")
        self._received = 0   # topics with a message, when the diagnostics were last sent
        self.create_timer(float(period), self._discover)
        self.create_timer(0.1, self._tick)
        self._discover()
        print(f"recorder: ready {self.writer.path}", flush=True)

    # ------------------------------------------------------------------ topics
    def _discover(self) -> None:
        for name, types in self.get_topic_names_and_types():
            if name not in self._wanted or name in self._subs or name in self._skipped:
                continue
            infos = self.get_publishers_info_by_topic(name)
            if not infos:
                continue  # no publisher yet: its QoS is not known
            msgtype = types[0]
            cls = installed_message_class(msgtype)
            if cls is None or msgtype not in typestore().types:
                self._skipped[name] = msgtype
                self.get_logger().error(f"topic '{name}': message type '{msgtype}' is unknown "
                                        "here; not recorded")
                continue
            offered = [i.qos_profile for i in infos]
            conn = self.writer.add_topic(name, msgtype, [qos_to_rosbags(q) for q in offered])
            self.counts[name] = 0
            self._subs[name] = self.create_subscription(
                cls, name, functools.partial(self._on_message, name, conn),
                self._subscription_qos(offered), raw=True)
            print(f"recorder: recording {name} {msgtype}", flush=True)

    def _subscription_qos(self, offered: list[QoSProfile]) -> QoSProfile:
        reliable = all(q.reliability == ReliabilityPolicy.RELIABLE for q in offered)
        latched = all(q.durability == DurabilityPolicy.TRANSIENT_LOCAL for q in offered)
        return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=self._depth,
                          reliability=(ReliabilityPolicy.RELIABLE if reliable
                                       else ReliabilityPolicy.BEST_EFFORT),
                          durability=(DurabilityPolicy.TRANSIENT_LOCAL if latched
                                      else DurabilityPolicy.VOLATILE))

    def _on_message(self, name: str, conn: Any, raw: bytes) -> None:
        if self.writer.closed:
            return
        self.writer.write(conn, self.get_clock().now().nanoseconds, raw)
        self.counts[name] += 1

    def _tick(self) -> None:
        if not self.writer.closed:
            self.writer.maybe_close_chunk(self.get_clock().now().nanoseconds)
        received = sum(1 for c in self.counts.values() if c)
        since = self.current_since
        if received != self._received or not (since == self._told_since or
                                               math.isnan(since)):
            self._received, self._told_since = received, since   # say it at once
            self._diag.publish()
        if self._refresh and not self._fetching:
            self._fetch_parameters()
        if self._param_client is not None and self._info_text is None and not self._fetching:
            self._fetch_parameters()

    def _on_refresh(self, request: Trigger.Request, response: Trigger.Response
                    ) -> Trigger.Response:
        """~/refresh_run_info: read the adapter's parameters again; the answer is the ROS
        time [s] of the request: the diagnostics value `RUN_INFO_KEY` reaches it once the
        run info in the bag holds the parameters as they were then."""
        now = self.get_clock().now().nanoseconds * 1e-9
        if self._param_client is None:
            response.success, response.message = False, "no adapter_node to read"
            return response
        if self._fetching:
            self._refetch = True
        else:
            self._refresh = True
        response.success, response.message = True, repr(now)
        return response

    # ------------------------------------------------------------------ run info
    def _on_parameter_event(self, event: ParameterEvent) -> None:
        if event.node != self._adapter_fqn or not (event.changed_parameters or
                                                   event.new_parameters):
            return
        if self._fetching:
            self._refetch = True   # the values in flight may predate this change
        elif self._info_text:
            self._fetch_parameters()

    def _fetch_parameters(self) -> None:
        client = self._param_client
        if client is None or self._fetching or not client.services_are_ready():
            return
        self._fetching, self._refresh = True, False
        self._asked = self.get_clock().now().nanoseconds * 1e-9
        client.list_parameters([], 0).add_done_callback(self._on_list)

    def _on_list(self, future: Any) -> None:
        try:
            names = list(future.result().result.names)
        except Exception as exc:  # the adapter went away: try again later
            self._fetching = False
            self.get_logger().warn(f"reading the adapter's parameters failed: {exc}")
            return
        self._param_client.get_parameters(names).add_done_callback(
            functools.partial(self._on_values, names))

    def _on_values(self, names: list[str], future: Any) -> None:
        self._fetching = False
        asked, pending = self._asked, self._refetch
        if self._refetch:          # a change came while these values were fetched
            self._refetch = False
            self._fetch_parameters()
        try:
            values = [parameter_value_to_python(v) for v in future.result().values]
        except Exception as exc:  # the adapter went away: try again later
            self.get_logger().warn(f"reading the adapter's parameters failed: {exc}")
            return
        if not pending:
            self.current_since = asked
        params = {n: list(v) if isinstance(v, (list, tuple, array.array)) else v
                  for n, v in zip(names, values)}
        text = run_info.build(self._adapter_fqn, params, self._config)
        if self._info_text is not None and _same_run(text, self._info_text):
            return
        self._info_text = text
        if self.writer.closed:
            return
        if self._info_conn is None:
            self._info_conn = self.writer.add_topic(self._info_topic, STRING)
        msg = typestore().types[STRING](data=text)
        self.writer.write(self._info_conn, self.get_clock().now().nanoseconds,
                          encode(msg, STRING))
        print(f"recorder: run info of {self._adapter_fqn} stored", flush=True)

    # ------------------------------------------------------------------ close
    def close(self) -> None:
        """Close the bag (idempotent)."""
        if self.writer.closed:
            return
        if self._info_text is not None:
            self.writer.set_custom_data(run_info.CUSTOM_KEY, self._info_text)
        self.writer.close()
        total = sum(self.counts.values())
        print(f"recorder: closed {self.writer.path} ({total} messages, "
              f"{len(self.counts)} topics)", flush=True)

    def destroy_node(self) -> None:
        """Close the bag, then destroy the node."""
        self.close()
        super().destroy_node()


def _same_run(a: str, b: str) -> bool:
    """True when two run-info documents differ only in their creation time."""
    pa, pb = run_info.parse(a), run_info.parse(b)
    return pa.parameters == pb.parameters and pa.files == pb.files


def main(args: list[str] | None = None) -> int:
    """Record until Ctrl-C or SIGTERM, then close the bag."""
    return run_nodes([RecorderNode], args=args)


if __name__ == "__main__":
    sys.exit(main())
