# SPDX-License-Identifier: Apache-2.0
"""``sensor_bridge`` node: sensor topics -> one stamped, named ``feedback`` vector.

Each configured input subscribes to one topic, reads numeric fields by path (see
`adaptive_streamer.io.field_paths`), and feeds the core feature table
(`adaptive_streamer.core.feedback`), which scales, filters, ages and counts. The node
publishes ``feedback`` (``sensor_msgs/JointState`` as a named vector; encoding in
`adaptive_streamer.core.feedback`) and ``/diagnostics``.

Parameters (a params file cannot hold a list of mappings, so inputs are named entries)::

    sensor_bridge:
      ros__parameters:
        inputs: [edge, angle]            # entry names, in feature order
        publish_rate: 0.0                # Hz; 0 = publish on every accepted sample
        feedback_qos: reliable           # reliable | best_effort | sensor_data | transient_local
        edge:
          topic: edge_sensor/offset      # relative names remap as usual
          type: geometry_msgs/msg/PointStamped     # or geometry_msgs/PointStamped
          fields: [point.y, point.z]     # paths, see field_paths (e.g. position[j3], data[2])
          features: [edge_offset, edge_height]     # output names, one per field, unique
          scale: [1.0, 1.0]              # optional, one per field (default 1)
          offset: [0.0, 0.0]             # optional, one per field (default 0)
          filter: butter                 # none (default) | butter
          order: 2                       # butter order 1..8
          cutoff_hz: 8.0                 # below sample_rate_hz / 2
          sample_rate_hz: 100.0          # the rate the sensor publishes at
          max_age: 0.2                   # s of ROS time; older -> NaN (default 0.5)
          restamp: false                 # true: stamp on arrival (sensor clock not ROS time)
          qos: sensor_data               # default sensor_data

Types without a ``header`` (``std_msgs/msg/Float64``, ``Float64MultiArray``) are always
stamped on arrival. Stamps and ages are ROS time, so everything works under
``use_sim_time``. With ``publish_rate: 0`` the node also publishes when an input turns stale
(checked every quarter of the smallest ``max_age``, between 10 ms and 250 ms).

A bad configuration stops the node at start with an error naming the entry and parameter;
a malformed, NaN or badly stamped message is dropped and counted in the diagnostics.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Any, Callable, Iterable

from builtin_interfaces.msg import Time as TimeMsg
from rclpy.node import Node
from sensor_msgs.msg import JointState

from adaptive_streamer.core.feedback import (FeatureTable, FeedbackError, FilterSpec, InputSpec,
                                             Verdict)
from adaptive_streamer.nodes.common import (ERROR, OK, WARN, DiagnosticsReporter, SetupNode,
                                            declare, now_sec, qos_by_name, run_nodes)
from adaptive_streamer.io.param_specs import SENSOR_BRIDGE
from adaptive_streamer.io.stamps import sec_to_stamp, stamp_to_sec
from adaptive_streamer.io.field_paths import (FieldPathError, compile_fields, is_stamped,
                                                 message_class, type_name)

_ENTRY_NAME = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_"
_LOG_THROTTLE_S = 5.0


class BridgeConfigError(ValueError):
    """The sensor_bridge parameters are missing, mistyped or inconsistent."""


@dataclass(frozen=True)
class _Channel:
    entry: str
    topic: str
    msg_class: type
    extract: Callable[[Any], list[float]]
    stamp_on_arrival: bool
    qos: str


class _Params:
    """Typed reads of dynamically typed parameters; errors name the parameter."""

    def __init__(self, node: Node) -> None:
        self._node = node

    def _get(self, name: str) -> Any:
        """Declare ``name`` from the node's table (``<entry>.<member>`` for an input's)."""
        entry, _, member = name.rpartition(".")
        spec = SENSOR_BRIDGE.member("inputs", entry, member) if entry else SENSOR_BRIDGE[name]
        return declare(self._node, spec)

    def string(self, name: str) -> str:
        value = self._get(name)
        if not isinstance(value, str) or not value:
            raise BridgeConfigError(f"parameter '{name}': expected a non-empty string, "
                                    f"got {value!r}")
        return value

    def strings(self, name: str) -> list[str]:
        value = self._get(name)
        if not isinstance(value, (list, tuple)) or not value \
                or not all(isinstance(v, str) for v in value):
            raise BridgeConfigError(f"parameter '{name}': expected a non-empty list of "
                                    f"strings, got {value!r}")
        return list(value)

    def number(self, name: str) -> float:
        value = self._get(name)
        if not math.isfinite(value):
            raise BridgeConfigError(f"parameter '{name}': expected a finite number, "
                                    f"got {value!r}")
        return float(value)

    def numbers(self, name: str, count: int, default: float) -> list[float]:
        """One number per field (``default`` for each when the parameter is unset)."""
        value = self._get(name)
        if value is None or len(value) == 0 or value == [""]:
            return [default] * count
        if len(value) != count:
            raise BridgeConfigError(f"parameter '{name}': has {len(value)} values but there "
                                    f"are {count} fields (give one per field, or omit it)")
        return [float(v) for v in value]

    def integer(self, name: str) -> int:
        return int(self._get(name))

    def boolean(self, name: str) -> bool:
        return bool(self._get(name))


def _read_entry(p: _Params, entry: str) -> tuple[InputSpec, _Channel]:
    where = f"input '{entry}'"
    topic = p.string(f"{entry}.topic")
    tname = p.string(f"{entry}.type")
    fields = p.strings(f"{entry}.fields")
    features = p.strings(f"{entry}.features")
    if len(features) != len(fields):
        raise BridgeConfigError(f"{where}: {len(fields)} fields but {len(features)} features "
                                "(give one feature name per field)")
    n = len(fields)
    scale = p.numbers(f"{entry}.scale", n, 1.0)
    offset = p.numbers(f"{entry}.offset", n, 0.0)
    spec = FilterSpec(
        kind=p.string(f"{entry}.filter"),
        order=p.integer(f"{entry}.order"),
        cutoff_hz=p.number(f"{entry}.cutoff_hz"),
        sample_rate_hz=p.number(f"{entry}.sample_rate_hz"))
    max_age = p.number(f"{entry}.max_age")
    restamp = p.boolean(f"{entry}.restamp")
    qos = p.string(f"{entry}.qos")
    try:
        qos_by_name(qos)
    except ValueError as exc:
        raise BridgeConfigError(f"{where}: parameter '{entry}.qos': {exc}") from None
    try:
        cls = message_class(tname)
        extract = compile_fields(cls, fields)
        input_spec = InputSpec(entry, tuple(features), tuple(scale), tuple(offset), max_age, spec)
    except (FieldPathError, FeedbackError) as exc:
        msg = str(exc)
        raise BridgeConfigError(msg if msg.startswith(where) else f"{where}: {msg}") from None
    channel = _Channel(entry, topic, cls, extract, restamp or not is_stamped(cls), qos)
    return input_spec, channel


def read_config(node: Node) -> tuple[FeatureTable, list[_Channel]]:
    """Declare and read the input parameters; raise `BridgeConfigError` on bad settings."""
    p = _Params(node)
    entries = p.strings("inputs")
    seen: set[str] = set()
    for entry in entries:
        if not entry or entry[0].isdigit() or any(c not in _ENTRY_NAME for c in entry):
            raise BridgeConfigError(f"parameter 'inputs': entry name '{entry}' must be letters, "
                                    "digits and '_' and start with a letter or '_'")
        if entry in seen:
            raise BridgeConfigError(f"parameter 'inputs': entry '{entry}' is listed twice")
        seen.add(entry)
    specs, channels = [], []
    for entry in entries:
        spec, channel = _read_entry(p, entry)
        specs.append(spec)
        channels.append(channel)
    try:
        table = FeatureTable(specs)
    except FeedbackError as exc:
        raise BridgeConfigError(str(exc)) from None
    return table, channels


class SensorBridge(SetupNode):
    """Subscribes to the configured sensor inputs and publishes ``feedback``."""

    param_error = BridgeConfigError

    def __init__(self, **kwargs: Any) -> None:
        super().__init__("sensor_bridge", **kwargs)

    def _setup(self) -> None:
        p = _Params(self)
        rate = p.number("publish_rate")
        if rate < 0.0:
            raise BridgeConfigError(f"parameter 'publish_rate': must be >= 0 Hz, got {rate:g}")
        feedback_qos = p.string("feedback_qos")
        try:
            out_qos = qos_by_name(feedback_qos)
        except ValueError as exc:
            raise BridgeConfigError(f"parameter 'feedback_qos': {exc}") from None
        self._table, self._channels = read_config(self)
        self._warn_unused_filter_settings()
        self._names = list(self._table.names)
        self._on_arrival = rate == 0.0
        self._last_fresh = self._table.fresh(now_sec(self))
        self._callback_errors = 0
        self._pub = self.create_publisher(JointState, "feedback", out_qos)
        self._topics: list[str] = []
        for k, ch in enumerate(self._channels):
            try:
                sub = self.create_subscription(ch.msg_class, ch.topic,
                                               functools.partial(self._on_message, k),
                                               qos_by_name(ch.qos, depth=10))
            except Exception as exc:  # rclpy raises its own types for bad topic names
                raise BridgeConfigError(f"input '{ch.entry}': cannot subscribe to topic "
                                        f"'{ch.topic}': {exc}") from None
            self._topics.append(sub.topic_name)
        if not self._on_arrival:
            self.create_timer(1.0 / rate, self._on_publish_timer)
        check = min(max(min(s.max_age for s in self._table.inputs) / 4.0, 0.01), 0.25)
        self.create_timer(check, self._on_stale_check)
        self._diag = DiagnosticsReporter(self, "sensor_bridge", values=self._diag_values)
        self._update_status(now_sec(self))
        self.get_logger().info(
            f"bridging {len(self._channels)} input(s) to {len(self._names)} feature(s) "
            f"{self._names}, publishing "
            + ("on arrival" if self._on_arrival else f"at {rate:g} Hz"))

    @property
    def inputs(self) -> tuple[InputSpec, ...]:
        """The validated input settings, in feature order."""
        return self._table.inputs

    def _warn_unused_filter_settings(self) -> None:
        for spec in self._table.inputs:
            f = spec.filter
            if f.kind == "none" and (f.cutoff_hz or f.sample_rate_hz):
                self.get_logger().warning(f"input '{spec.name}': filter is 'none', so "
                                          "cutoff_hz/sample_rate_hz are ignored")

    # ------------------------------------------------------------------ callbacks
    def _on_message(self, k: int, msg: Any) -> None:
        try:
            ch = self._channels[k]
            now = now_sec(self)
            try:
                raw = ch.extract(msg)
            except FieldPathError as exc:
                self._table.reject_malformed(k)
                self._warn_drop(ch, str(exc))
                return
            stamp = now if ch.stamp_on_arrival else stamp_to_sec(msg.header.stamp)
            verdict = self._table.update(k, raw, stamp, now)
            if verdict is not Verdict.ACCEPTED:
                self._warn_drop(ch, verdict.value)
            elif self._on_arrival:
                self._publish(now)
        except Exception as exc:  # no exception may escape a callback
            self._callback_failed(f"input '{self._channels[k].entry}'", exc)

    def _on_publish_timer(self) -> None:
        try:
            self._publish(now_sec(self))
        except Exception as exc:  # no exception may escape a callback
            self._callback_failed("publish timer", exc)

    def _on_stale_check(self) -> None:
        try:
            now = now_sec(self)
            fresh = self._table.fresh(now)
            if self._on_arrival and not (fresh == self._last_fresh).all():
                self._publish(now)
            self._update_status(now)
        except Exception as exc:  # no exception may escape a callback
            self._callback_failed("staleness check", exc)

    # ------------------------------------------------------------------ output
    def _publish(self, now: float) -> None:
        sample = self._table.snapshot(now)
        msg = JointState()
        msg.header.stamp = sec_to_stamp(sample.stamp) if sample.stamp is not None else TimeMsg()
        msg.name = self._names
        msg.position = sample.values.tolist()
        self._pub.publish(msg)
        self._last_fresh = sample.fresh

    def _update_status(self, now: float) -> None:
        fresh = self._table.fresh(now)
        if self._callback_errors:
            self._diag.set(ERROR, f"{self._callback_errors} callback error(s); see the log")
            return
        waiting = [s.name for k, s in enumerate(self._table.inputs)
                   if self._table.age(k, now) is None]
        stale = [s.name for k, s in enumerate(self._table.inputs)
                 if not fresh[k] and s.name not in waiting]
        parts = ([f"stale: {', '.join(stale)}"] if stale else []) + \
                ([f"waiting for: {', '.join(waiting)}"] if waiting else [])
        if parts:
            self._diag.set(WARN, "; ".join(parts))
        else:
            self._diag.set(OK, f"all {len(fresh)} input(s) fresh")

    def _diag_values(self) -> Iterable[tuple[str, Any]]:
        values: list[tuple[str, Any]] = [("callback_errors", self._callback_errors)]
        try:
            now = now_sec(self)
            fresh = self._table.fresh(now)
            for k, ch in enumerate(self._channels):
                age = self._table.age(k, now)
                state = "fresh" if fresh[k] else ("waiting" if age is None else "stale")
                values += [(f"{ch.entry}.topic", self._topics[k]),
                           (f"{ch.entry}.type", type_name(ch.msg_class)),
                           (f"{ch.entry}.state", state),
                           (f"{ch.entry}.age", "none" if age is None else float(age))]
                values += [(f"{ch.entry}.{key}", count)
                           for key, count in vars(self._table.counters(k)).items()]
        except Exception as exc:  # no exception may escape a callback
            self._callback_failed("diagnostics", exc)
        return values

    def _warn_drop(self, ch: _Channel, reason: str) -> None:
        self.get_logger().warning(f"input '{ch.entry}' ({ch.topic}): dropped a message: "
                                  f"{reason}", throttle_duration_sec=_LOG_THROTTLE_S)

    def _callback_failed(self, where: str, exc: Exception) -> None:
        self._callback_errors += 1
        self.get_logger().error(f"{where}: unexpected {type(exc).__name__}: {exc}",
                                throttle_duration_sec=_LOG_THROTTLE_S)


def main(args: list[str] | None = None) -> int:
    """Entry point of the ``sensor_bridge`` executable."""
    return run_nodes([SensorBridge], args)


if __name__ == "__main__":
    raise SystemExit(main())
