# SPDX-License-Identifier: Apache-2.0
"""Helpers shared by the rclpy shells: parameters, diagnostics, QoS and a clean main.

Nothing here does motion math; it only moves values between ROS and the core.
"""
from __future__ import annotations

import faulthandler
import math
import signal
import sys
from typing import Any, Callable, Iterable, Sequence

import rclpy
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from rcl_interfaces.msg import FloatingPointRange, IntegerRange, ParameterDescriptor
from rclpy.executors import ExternalShutdownException, Executor, SingleThreadedExecutor
from rclpy.exceptions import InvalidParameterTypeException
from rclpy.lifecycle import LifecycleNode
from rclpy.node import Node
from rclpy.parameter import Parameter
from rclpy.qos import (DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy,
                       qos_profile_sensor_data)

from ..io.param_specs import LIST_KINDS, NodeParams, Param, ParamKind


OK, WARN, ERROR, STALE = (DiagnosticStatus.OK, DiagnosticStatus.WARN, DiagnosticStatus.ERROR,
                          DiagnosticStatus.STALE)


class SetupNode(Node):
    """A node whose parameters, topics and timers are made by ``_setup``. When that fails
    (a bad parameter), the node is destroyed before the error propagates, so no half-made
    node stays in the graph."""

    def __init__(self, name: str, **kwargs: Any) -> None:
        super().__init__(name, **kwargs)
        try:
            self._setup()
        except Exception:
            self.destroy_node()
            raise

    def _setup(self) -> None:
        """Declare parameters, make publishers, subscriptions and timers."""
        raise NotImplementedError


def now_sec(node: Node) -> float:
    """The node's clock (ROS time, so sim time under ``use_sim_time``) in seconds."""
    return node.get_clock().now().nanoseconds * 1e-9


class NodeParamError(ValueError):
    """A parameter given to a node (params file, ``-p``) is unknown, empty where a value is
    needed, of the wrong type or out of range (names the parameter and what was expected)."""


_UNSET = object()
INT64_MIN, INT64_MAX = -(1 << 63), (1 << 63) - 1
SHUTDOWN_REPORT = 8.0   # [s] of shutdown (the controlled stop included) before every
#                         thread's stack is printed (bringup kills a child after 10 s)
_ROS_TYPES = {ParamKind.BOOL: Parameter.Type.BOOL, ParamKind.INTEGER: Parameter.Type.INTEGER,
              ParamKind.NUMBER: Parameter.Type.DOUBLE, ParamKind.STRING: Parameter.Type.STRING,
              ParamKind.STRINGS: Parameter.Type.STRING_ARRAY,
              ParamKind.NUMBERS: Parameter.Type.DOUBLE_ARRAY}


def _overrides(node: Node) -> dict[str, Parameter]:
    """The node's parameter overrides (params files and ``-p`` arguments), by name; rclpy
    keeps them on the node and has no public accessor."""
    return node._parameter_overrides  # noqa: SLF001


def descriptor(spec: Param, lifecycle: bool = False) -> ParameterDescriptor:
    """The ROS parameter descriptor of ``spec``: description, the allowed values in words
    (for a ``lifecycle`` node also when it may change, `Param.change`), read-only, and
    the range of a number or integer, so that parameter tools show it and rclpy refuses a
    value outside it. ROS ranges are closed: an open bound (``(0, 1]``) is given as the
    closed one and the node's own check refuses the bound itself."""
    constraints = spec.expected() + (f"; {spec.change.value}" if lifecycle else "")
    desc = ParameterDescriptor(description=spec.description, read_only=spec.read_only,
                               dynamic_typing=spec.dynamic_typing,
                               additional_constraints=constraints)
    if spec.low is None and spec.high is None:
        return desc
    if spec.kind is ParamKind.NUMBER:
        desc.floating_point_range = [FloatingPointRange(
            from_value=-math.inf if spec.low is None else float(spec.low),
            to_value=math.inf if spec.high is None else float(spec.high), step=0.0)]
    elif spec.kind is ParamKind.INTEGER:
        desc.integer_range = [IntegerRange(
            from_value=INT64_MIN if spec.low is None else int(math.ceil(spec.low)),
            to_value=INT64_MAX if spec.high is None else int(math.floor(spec.high)), step=0)]
    return desc


def declare(node: Node, spec: Param, default: Any = _UNSET) -> Any:
    """Declare the parameter ``spec`` (its table entry, `adaptive_streamer.io.param_specs`)
    and return its value, checked against the table. ``default`` replaces the table's
    default (for defaults only known at run time). An empty list in a params file (which
    rclpy reads as "not set") means "empty" where the table allows it. A value that does
    not fit raises the node's ``param_error`` (its module's error type; default
    `NodeParamError`)."""
    error = getattr(node, "param_error", NodeParamError)
    value = spec.default if default is _UNSET else default
    if value is None and not spec.dynamic_typing:
        value = _ROS_TYPES[spec.kind]
    desc = descriptor(spec, isinstance(node, LifecycleNode))
    override = _overrides(node).get(spec.name)
    if override is not None and override.type_ != Parameter.Type.NOT_SET:
        problem = spec.problem(override.value)   # before rclpy's own range check
        if problem is not None:
            raise error(f"parameter '{spec.name}' {problem}")
    if override is not None and override.type_ == Parameter.Type.NOT_SET:
        if spec.kind not in LIST_KINDS or not spec.empty_ok:
            raise error(f"parameter '{spec.name}' is empty; expected "
                                 f"{spec.expected()}")
        return node.declare_parameter(spec.name, value, desc, ignore_override=True).value
    try:
        result = node.declare_parameter(spec.name, value, desc).value
    except InvalidParameterTypeException:
        given = override.value if override is not None else None
        raise error(f"parameter '{spec.name}' is {given!r}; expected "
                             f"{spec.expected()}") from None
    problem = spec.problem(result)
    if problem is not None:
        raise error(f"parameter '{spec.name}' {problem}")
    return result


def refuse_undeclared(node: Node, table: NodeParams) -> None:
    """Refuse parameter overrides the node does not read (a typo in a params file would
    otherwise be ignored): raises `NodeParamError` naming the first one and the closest
    known name. Members of a group (``<output>.topic``) count as known for the entries
    the node's list parameters name now. A params file's ``/**`` section reaches every
    node, so its entries must be parameters of each node it starts (``use_sim_time``)."""
    values = {p.name: node.get_parameter(p.name).value for p in table.params
              if node.has_parameter(p.name)}
    for name in sorted(_overrides(node)):
        if node.has_parameter(name):
            continue
        why = table.unknown(name, values)
        if why is not None:
            raise NodeParamError(f"parameter {why} (given to node "
                                 f"'{node.get_fully_qualified_name()}')")


def reliable_qos(depth: int = 1, transient_local: bool = False) -> QoSProfile:
    """Reliable keep-last QoS (transient-local durability when asked)."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=depth,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=(DurabilityPolicy.TRANSIENT_LOCAL if transient_local
                                  else DurabilityPolicy.VOLATILE))


def qos_by_name(name: str, depth: int = 1) -> QoSProfile:
    """QoS from a parameter value: 'reliable', 'best_effort', 'sensor_data' or 'transient_local'."""
    if name == "reliable":
        return reliable_qos(depth)
    if name == "transient_local":
        return reliable_qos(depth, transient_local=True)
    if name == "best_effort":
        return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=depth,
                          reliability=ReliabilityPolicy.BEST_EFFORT)
    if name == "sensor_data":
        return qos_profile_sensor_data
    raise ValueError(f"unknown QoS '{name}'; expected reliable, best_effort, sensor_data or "
                     "transient_local")


class DiagnosticsReporter:
    """Publishes one DiagnosticStatus for a node on ``/diagnostics`` from a slow timer.

    The node sets ``level``/``message`` and fills ``values`` (or a callable returning them);
    publishing is about once per ``period`` seconds, never per control tick.
    """

    def __init__(self, node: Node, name: str, period: float = 1.0,
                 values: Callable[[], Iterable[tuple[str, Any]]] | None = None) -> None:
        self._node = node
        self._pub = node.create_publisher(DiagnosticArray, "/diagnostics", 10)
        self.name = name
        self.hardware_id = node.get_fully_qualified_name()
        self.level = OK
        self.message = "starting"
        self._values = values
        self._timer = node.create_timer(period, self.publish)

    def set(self, level: int, message: str) -> None:
        """Set the summary level (OK/WARN/ERROR/STALE) and message."""
        self.level, self.message = level, message

    def publish(self) -> None:
        """Publish the current status now."""
        status = DiagnosticStatus(level=self.level, name=self.name, message=self.message,
                                  hardware_id=self.hardware_id)
        if self._values is not None:
            status.values = [KeyValue(key=str(k), value=_fmt(v)) for k, v in self._values()]
        arr = DiagnosticArray()
        arr.header.stamp = self._node.get_clock().now().to_msg()
        arr.status = [status]
        self._pub.publish(arr)


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6f}" if abs(value) >= 1e5 else f"{value:.6g}"  # keep times exact
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_fmt(v) for v in value) + "]"
    return str(value)


def run_nodes(factories: Sequence[Callable[[], Node]], args: list[str] | None = None,
              executor: Callable[[], Executor] | None = None,
              before_shutdown: Callable[[list[Node], Executor], None] | None = None,
              after_start: Callable[[list[Node]], None] | None = None) -> int:
    """Init rclpy, build the nodes, spin until Ctrl-C/SIGTERM, shut down cleanly (no traceback).

    ``executor`` makes the executor (after rclpy.init; default single-threaded).
    ``after_start`` runs once the nodes are in the executor; ``before_shutdown`` runs on
    every way out once the nodes exist (Ctrl-C, SIGTERM, an error raised from a callback
    while spinning), before any node is destroyed (e.g. to bring the arm to rest while the
    executor still runs the rest). Returns a process exit code.
    """
    rclpy.init(args=args, signal_handler_options=rclpy.signals.SignalHandlerOptions.NO)
    stop = {"flag": False}

    def _handler(signum: int, frame: Any) -> None:  # noqa: ARG001
        stop["flag"] = True

    old = {s: signal.signal(s, _handler) for s in (signal.SIGINT, signal.SIGTERM)}
    nodes: list[Node] = []
    code = 0
    ex = executor() if executor is not None else SingleThreadedExecutor()
    try:
        nodes = [f() for f in factories]
        for n in nodes:
            ex.add_node(n)
        if after_start is not None:
            after_start(nodes)
        while not stop["flag"] and rclpy.ok():
            ex.spin_once(timeout_sec=0.1)
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    except Exception as exc:  # a node failed to start or a callback raised: say why
        print(f"error: {type(exc).__name__}: {exc}", file=sys.stderr)
        code = 1
    # a shutdown that hangs (seen once: a child not stopping within bringup's 10 s) leaves
    # every thread's stack in the log first
    try:   # to the process's own stderr (a captured sys.stderr may have no file number)
        faulthandler.dump_traceback_later(SHUTDOWN_REPORT, exit=False, file=sys.__stderr__)
    except (AttributeError, ValueError, OSError):
        pass   # no usable stderr: no report
    try:
        if before_shutdown is not None and nodes and rclpy.ok():
            before_shutdown(nodes, ex)
    except Exception as exc:
        print(f"error while shutting down: {type(exc).__name__}: {exc}", file=sys.stderr)
        code = 1
    finally:
        for s, h in old.items():
            signal.signal(s, h)
        for n in nodes:
            ex.remove_node(n)
            n.destroy_node()
        ex.shutdown()
        if rclpy.ok():
            rclpy.shutdown()
        faulthandler.cancel_dump_traceback_later()
    return code
