# SPDX-License-Identifier: Apache-2.0
"""The parameters of every node of the package: one table per node (name, type, default,
range, description).

The nodes declare their parameters from these tables (`adaptive_streamer.nodes.common.declare`)
and the command line checks a whole params file against them before anything starts
(`check_params_file`: ``bringup``, ``demo``, ``preflight``), so a typo, a wrong type or a
value out of range is refused with the parameter's name, the file's line and what was
expected, instead of being ignored by ROS or noticed by a node much later.

Grouped parameters: some nodes read parameters named after the entries of a list parameter
(the adapter's ``outputs: [position]`` gives ``position.type``, ``position.topic``...;
the sensor bridge's ``inputs`` likewise); a `Group` describes their members.

Types follow rclpy's: a parameter declared with a static type refuses a value of another
type (an integer ``250`` for a number: write ``250.0``); a ``dynamic_typing`` parameter
takes an integer for a number. An empty list (``[]``) has no type in a params file (rclpy
reads it as "not set"); it is accepted where `Param.empty_ok` says so and means "empty".
"""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, replace
from enum import Enum
from pathlib import Path
from typing import Any, Mapping

import yaml

from ..core.adapter_setup import DEFAULTS, WATCHDOG_PARAMS
from ..core.playback import END_MODES, MAX_OVERRIDE, MIN_OVERRIDE
from ..core.provenance import InputTopic
from ..core.watchdog import TIGHTER_WHEN_LOWER
from ..share import expand

# parameters rclpy declares on every node, and prefixes rclpy itself reads
RCLPY_PARAMS = ("use_sim_time", "start_type_description_service")
RCLPY_PREFIXES = ("qos_overrides.",)


class ParamsCheckError(ValueError):
    """A parameter value or a params file does not fit the node's table (names the file,
    line, node and parameter, and what was expected)."""


class ParamKind(Enum):
    """Type of a parameter value."""

    BOOL = "true or false"
    INTEGER = "an integer"
    NUMBER = "a number"
    STRING = "a string"
    STRINGS = "a list of strings"
    NUMBERS = "a list of numbers"


LIST_KINDS = (ParamKind.STRINGS, ParamKind.NUMBERS)


class Change(Enum):
    """When a parameter of the adapter may change once the node runs (the adapter enforces
    it in its set-parameters answer; see `Param.change_problem`)."""

    AT_CONFIGURE = "read at configure: set it while unconfigured"
    LIVE = "applied in any state"
    LOWER_ONLY = "while configured only lowered (lower is safer)"


@dataclass(frozen=True)
class Param:
    """One parameter: ``low``/``high`` bound numbers (``*_open``: the bound is excluded);
    ``choices`` lists the allowed strings; ``empty_ok`` says whether an empty list or
    string is allowed (it means "none" or "the default", see the description)."""

    name: str
    kind: ParamKind
    default: Any
    description: str
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple[str, ...] = ()
    empty_ok: bool = True
    read_only: bool = False
    dynamic_typing: bool = False
    change: Change = Change.AT_CONFIGURE

    def expected(self) -> str:
        """What a valid value is, in words (e.g. "a number in (0, 1]")."""
        text = self.kind.value
        if self.choices:
            return f"one of {', '.join(self.choices)}"
        if self.low is not None or self.high is not None:
            lo = "-inf" if self.low is None else f"{self.low:g}"
            hi = "inf" if self.high is None else f"{self.high:g}"
            text += f" in {'(' if self.low_open or self.low is None else '['}{lo}, " \
                    f"{hi}{')' if self.high_open or self.high is None else ']'}"
        if not self.empty_ok and self.kind in (*LIST_KINDS, ParamKind.STRING):
            text = "a non-empty " + text.removeprefix("a ")
        return text

    def problem(self, value: Any) -> str | None:
        """Why ``value`` does not fit (None when it does); ``value`` None = an empty list."""
        if value is None or (isinstance(value, (list, tuple)) and len(value) == 0):
            if self.kind in LIST_KINDS and self.empty_ok:
                return None
            return f"is empty; expected {self.expected()}"
        if not self._type_ok(value):
            hint = (f" (write {value}.0: an integer is not a number here)"
                    if self.kind is ParamKind.NUMBER and isinstance(value, int)
                    and not isinstance(value, bool) else "")
            if self.kind is ParamKind.STRINGS and isinstance(value, (list, tuple)) \
                    and any(isinstance(v, bool) for v in value):
                hint = (" (YAML reads unquoted y, n, yes, no, on, off, true, false as "
                        "booleans: quote such names)")
            return f"is {value!r}; expected {self.expected()}{hint}"
        items = value if isinstance(value, (list, tuple)) else [value]
        for item in items:
            if isinstance(item, str):
                if self.choices and item not in self.choices:
                    return f"is {value!r}; expected {self.expected()}"
                if not item and not self.empty_ok:
                    return f"is empty; expected {self.expected()}"
            elif isinstance(item, (int, float)) and not isinstance(item, bool):
                if not self._in_range(float(item)):
                    return f"is {value!r}; expected {self.expected()}"
        return None

    def change_problem(self, old: Any, new: Any, state: str) -> str | None:
        """Why changing the value from ``old`` to ``new`` is refused in the lifecycle
        ``state`` (None when it is allowed): a configure-time parameter only changes while
        unconfigured; a `Change.LOWER_ONLY` one only goes down while configured (raising a
        speed scale or loosening a threshold while the arm may move needs a cleanup and a
        new configure, which runs every check again)."""
        if state == "unconfigured" or self.change is Change.LIVE or new == old:
            return None
        if self.change is Change.LOWER_ONLY and isinstance(new, (int, float)) \
                and isinstance(old, (int, float)):
            if new < old:
                return None
            return (f"can only be lowered while the adapter is {state} ({old:g} -> {new:g} "
                    f"loosens it); to raise it, deactivate and clean up, set it, and "
                    f"configure again")
        return (f"is read at configure and the adapter is {state}: deactivate and clean up "
                f"first, then set it (the next configure checks it)")

    def _type_ok(self, value: Any) -> bool:
        def number(x: Any) -> bool:
            if isinstance(x, bool):
                return False
            return isinstance(x, float) or (isinstance(x, int) and self.dynamic_typing)

        kind = self.kind
        if kind is ParamKind.BOOL:
            return isinstance(value, bool)
        if kind is ParamKind.INTEGER:
            return isinstance(value, int) and not isinstance(value, bool)
        if kind is ParamKind.NUMBER:
            return number(value)
        if kind is ParamKind.STRING:
            return isinstance(value, str)
        if not isinstance(value, (list, tuple)):
            return False
        if kind is ParamKind.STRINGS:
            return all(isinstance(v, str) for v in value)
        return all(number(v) for v in value)

    def _in_range(self, x: float) -> bool:
        if math.isnan(x):
            return self.low is None and self.high is None
        if self.low is not None and (x < self.low or (self.low_open and x == self.low)):
            return False
        if self.high is not None and (x > self.high or (self.high_open and x == self.high)):
            return False
        return True


@dataclass(frozen=True)
class Group:
    """Parameters ``<entry>.<member>`` for each entry of the list parameter ``list_param``."""

    list_param: str
    members: tuple[Param, ...]

    def member(self, name: str) -> Param:
        """The member named ``name`` (without the entry prefix)."""
        for m in self.members:
            if m.name == name:
                return m
        raise KeyError(name)


@dataclass(frozen=True)
class NodeParams:
    """The parameter table of one node."""

    node: str
    params: tuple[Param, ...]
    groups: tuple[Group, ...] = ()

    def __getitem__(self, name: str) -> Param:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(f"node '{self.node}' has no parameter '{name}'")

    def group(self, list_param: str) -> Group:
        """The group whose entries ``list_param`` lists."""
        for g in self.groups:
            if g.list_param == list_param:
                return g
        raise KeyError(f"node '{self.node}' has no group '{list_param}'")

    def member(self, list_param: str, entry: str, name: str) -> Param:
        """Member ``name`` of the group ``list_param`` for ``entry``, under its full name
        ``<entry>.<name>``."""
        return replace(self.group(list_param).member(name), name=f"{entry}.{name}")

    def lookup(self, name: str, values: Mapping[str, Any]) -> Param | None:
        """The table entry for the flat parameter ``name`` given the node's ``values``
        (which name the groups' entries); a group member comes back under its full name."""
        for p in self.params:
            if p.name == name:
                return p
        for g in self.groups:
            entries = values.get(g.list_param, self[g.list_param].default) or []
            for entry in entries:
                prefix = f"{entry}."
                if isinstance(entry, str) and entry and name.startswith(prefix):
                    for m in g.members:
                        if name == prefix + m.name:
                            return replace(m, name=name)
        return None

    def known_names(self, values: Mapping[str, Any]) -> list[str]:
        """Every parameter name the node reads, given ``values`` (groups expanded)."""
        names = [p.name for p in self.params]
        for g in self.groups:
            for entry in values.get(g.list_param, self[g.list_param].default) or []:
                if isinstance(entry, str) and entry:
                    names += [f"{entry}.{m.name}" for m in g.members]
        return names

    def unknown(self, name: str, values: Mapping[str, Any]) -> str | None:
        """Why ``name`` is not a parameter of the node, with the closest known name; None
        when it is one (rclpy's own parameters included)."""
        if name in RCLPY_PARAMS or name.startswith(RCLPY_PREFIXES):
            return None
        if self.lookup(name, values) is not None:
            return None
        close = difflib.get_close_matches(name, self.known_names(values), n=1, cutoff=0.6)
        hint = f"; did you mean {close[0]}?" if close else ""
        return f"'{name}' is not a parameter of {self.node}{hint}"

    def problems(self, values: Mapping[str, Any]) -> list[tuple[str, str]]:
        """(parameter, problem) for every value of ``values`` (flat names) that is unknown,
        of the wrong type or out of range."""
        out = []
        for name, value in values.items():
            why = self.unknown(name, values)
            if why is not None:
                out.append((name, why))
                continue
            spec = self.lookup(name, values)
            if spec is None:  # rclpy's own parameter
                continue
            problem = spec.problem(value)
            if problem is not None:
                out.append((name, f"'{name}' {problem}"))
        return out


_N, _I, _S, _B = ParamKind.NUMBER, ParamKind.INTEGER, ParamKind.STRING, ParamKind.BOOL
_SS, _NN = ParamKind.STRINGS, ParamKind.NUMBERS
QOS_CHOICES = ("reliable", "best_effort", "sensor_data")
POSITIVE = {"low": 0.0, "low_open": True}
PRIORITY = {"low": 0, "high": 99}


def _p(name: str, kind: ParamKind, default: Any, description: str, **kw: Any) -> Param:
    return Param(name, kind, default, description, **kw)


def _ro(name: str, kind: ParamKind, default: Any, description: str, **kw: Any) -> Param:
    return Param(name, kind, default, description, read_only=True, **kw)


def _dyn(name: str, kind: ParamKind, default: Any, description: str, **kw: Any) -> Param:
    return Param(name, kind, default, description, dynamic_typing=True, **kw)


_WATCHDOG_HELP = {
    "deviation_joint": "stop when a joint deviates from the reference by more [rad]",
    "deviation_norm": "stop when the joints' deviation norm exceeds this [rad]",
    "following_error": "stop when the measured position lags the command by more [rad]",
    "command_latency": "the driver's command-to-feedback lag [s]",
    "joint_states_timeout": "stop when joint_states is older [s]",
    "feedback_timeout": "stop when the feedback the policy reads is older [s]",
    "reference_timeout": "stop when the reference window is older [s]",
    "max_overruns": "stop after this many decision overruns ...",
    "overrun_window": "... within this many decisions",
    "feedback_frozen": "stop when the feedback stays bit-identical this long while the arm "
                       "moves [s] (0: off)",
    "reset_hold": "a reset needs joint_states, the reference and the feedback the policy "
                  "reads fresh (the feedback changing) this long, and no stop-topic true "
                  "within it [s] (0: off)",
    "path_tolerance": "stop (input_source) when a reference window point is further from "
                      "the whole reference path (reference/path) [rad] (0: off)",
}


# upper bounds of the thresholds: beyond them a check means nothing (a deviation of more
# than a turn, a timeout of more than 10 s, a driver lag of more than a second)
_WATCHDOG_HIGH = {"deviation_joint": 2 * math.pi, "deviation_norm": 2 * math.pi,
                  "following_error": 2 * math.pi, "command_latency": 1.0,
                  "joint_states_timeout": 10.0, "feedback_timeout": 10.0,
                  "reference_timeout": 10.0, "max_overruns": 1000, "overrun_window": 1000,
                  "feedback_frozen": 60.0, "reset_hold": 10.0, "path_tolerance": 2 * math.pi}


def _watchdog(key: str) -> Param:
    default = DEFAULTS[f"watchdog.{key}"]
    kw: dict[str, Any] = {"high": _WATCHDOG_HIGH[key], "change": (
        Change.LOWER_ONLY if key in TIGHTER_WHEN_LOWER else Change.AT_CONFIGURE)}
    if key in ("max_overruns", "overrun_window"):
        return _p(f"watchdog.{key}", _I, default, _WATCHDOG_HELP[key], low=1, **kw)
    if key in ("command_latency", "feedback_frozen", "reset_hold", "path_tolerance"):
        return _p(f"watchdog.{key}", _N, default, _WATCHDOG_HELP[key], low=0.0, **kw)
    return _p(f"watchdog.{key}", _N, float(default), _WATCHDOG_HELP[key], **POSITIVE, **kw)


ADAPTER = NodeParams("adapter", (
    _p("policy", _S, DEFAULTS["policy"], "path of the policy card; setting it swaps the policy",
       change=Change.LIVE),
    _p("shadow_policy", _S, DEFAULTS["shadow_policy"],
       "optional policy card evaluated alongside, never commanded", change=Change.LIVE),
    _p("policy_active", _S, "", "read-only: the policy card that really runs"),
    _p("limits_file", _S, DEFAULTS["limits_file"],
       "limits YAML or URDF (empty: robot_description topic)"),
    _p("limits_dynamics", _S, DEFAULTS["limits_dynamics"],
       "limits YAML with acceleration/jerk beside a URDF"),
    _p("joints", _SS, DEFAULTS["joints"], "joint order (empty: the limits file's order)"),
    _p("decision_period", _N, DEFAULTS["decision_period"],
       "decision period [s] (read at configure)", low=0.001, high=1.0),
    _p("stream_rate", _N, DEFAULTS["stream_rate"],
       "setpoint stream rate [Hz] (read at configure)", low=125.0, high=1000.0),
    _p("horizon", _I, DEFAULTS["horizon"], "reference points per decision (read at configure)",
       low=1),
    _p("limit_scale", _N, DEFAULTS["limit_scale"],
       "scale of velocity/acceleration/jerk limits", low=0.0, low_open=True, high=1.0,
       change=Change.LOWER_ONLY),
    _p("features", _SS, DEFAULTS["features"],
       "feedback features to read (empty: what the policy needs)"),
    _p("outputs", _SS, DEFAULTS["outputs"], "driver output names (each configured as <name>.*)",
       empty_ok=False),
    _p("autostart", _B, False, "configure and activate on start"),
    _p("activation_velocity", _N, 0.02, "max |joint velocity| to accept activation [rad/s]",
       **POSITIVE),
    _p("stop_timeout", _N, 5.0, "max wait for rest on deactivate [s]", **POSITIVE, high=60.0),
    _p("reference_pause_service", _S, "reference_server/pause",
       "Trigger service called (asynchronously) when the watchdog stops the arm; empty: none"),
    _p("joint_states_qos", _S, "sensor_data", "QoS of the joint_states subscription",
       choices=QOS_CHOICES),
    _p("feedback_qos", _S, "sensor_data", "QoS of the feedback subscription",
       choices=QOS_CHOICES),
    _p("stream_priority", _I, 10, "SCHED_FIFO priority of the stream thread (0: normal)",
       **PRIORITY),
    _p("decision_priority", _I, 0, "SCHED_FIFO priority of the thread that runs the "
       "executor and the decisions (0: normal); below stream_priority", **PRIORITY),
    _p("approach_scale", _N, DEFAULTS["approach_scale"], "limit scale of the approach move",
       low=0.0, low_open=True, high=1.0),
    _p("approach_tolerance", _N, DEFAULTS["approach_tolerance"],
       "distance [rad] at which the policy takes over", **POSITIVE),
    _p("approach_bandwidth", _N, DEFAULTS["approach_bandwidth"],
       "approach tracking bandwidth [rad/s]", **POSITIVE),
    _p("stream_jitter", _N, DEFAULTS["stream_jitter"],
       "timing jitter of a sent setpoint [s]: a setpoint advances along the plan at most "
       "the real time since the previous one left plus this, else the plan is re-timed "
       "(read at configure)", low=0.0),
    _p("plan_lead", _N, DEFAULTS["plan_lead"],
       "with a plan output: send each decision's plan at least this long before its "
       "instant, else drop it and follow the sent braking continuation [s]", low=0.0),
    *(_p(t.parameter, _SS, [""], f"nodes allowed to publish {t.value}, fully qualified "
         "(e.g. /cell/driver); empty: exactly one, the one publishing at activation")
      for t in InputTopic),
    *(_watchdog(k) for k in WATCHDOG_PARAMS),
), (Group("outputs", (
    _p("type", _S, "position", "position | velocity | trajectory | plan",
       choices=("position", "velocity", "trajectory", "plan")),
    _p("topic", _S, None, "topic of this output (default: driver/<type>_command, "
       "driver/plan)", empty_ok=False),
    _p("joints", _SS, [""], "driver joint order (empty: adapter order)"),
    _p("qos", _S, "reliable", "reliable | best_effort | sensor_data", choices=QOS_CHOICES),
    _p("depth", _I, 1, "history depth", low=1),
)),))

REFERENCE_SERVER = NodeParams("reference_server", (
    _ro("reference_file", _S, None, "reference CSV / YAML / rosbag2 path", empty_ok=False),
    _ro("bag_topic", _S, "", "topic to read when reference_file is a bag"),
    _ro("joint_names", _SS, None, "expected joints and their order (default: the file's)"),
    _ro("limits_file", _S, None, "joint limits YAML or URDF", empty_ok=False),
    _ro("horizon", _I, 10, "points per window", low=1),
    _ro("decision_period", _N, 0.05, "window spacing and publish period [s]", **POSITIVE),
    _p("speed_override", _N, 1.0, "time-scaling factor", low=MIN_OVERRIDE, high=MAX_OVERRIDE),
    _ro("override_ramp_time", _N, 1.0, "duration of each override ramp [s]", **POSITIVE),
    _ro("end_mode", _S, "hold", "'hold' or 'loop'", choices=END_MODES),
    _ro("start_mode", _S, "service", "'service' or 'immediate'",
        choices=("service", "immediate")),
    _ro("slow_down", _B, False, "slow an infeasible reference down"),
    _ro("limit_fraction", _N, 0.8, "fraction of limits for timing/slow-down",
        low=0.0, low_open=True, high=1.0),
    _ro("max_gap", _N, 1.0, "largest gap between file samples [s]; 0: off", low=0.0),
    _ro("start_condition", _S, "none", "'none' or 'lock_on' (start once the lock-on feature "
        "settled)", choices=("none", "lock_on")),
    _ro("lock_on.feature", _S, "", "feedback feature judged by lock-on"),
    _ro("lock_on.tolerance", _N, 0.001, "settled |value| (feature unit)", **POSITIVE),
    _ro("lock_on.hold", _N, 0.5, "settled for this long [s]", **POSITIVE),
    _ro("lock_on.timeout", _N, 10.0, "lock-on timeout [s]", **POSITIVE),
    _ro("lock_on.max_age", _N, 0.1, "longest reading gap [s]", **POSITIVE),
))

_BRIDGE_QOS = ("sensor_data", "best_effort", "reliable", "transient_local")
SENSOR_BRIDGE = NodeParams("sensor_bridge", (
    _dyn("publish_rate", _N, 0.0, "feedback rate [Hz]; 0 = on every accepted sample", low=0.0),
    _dyn("feedback_qos", _S, "reliable", "QoS of the feedback publisher",
         choices=_BRIDGE_QOS),
    _dyn("inputs", _SS, None, "Names of the input entries (each configured as <name>.*)",
         empty_ok=False),
), (Group("inputs", (
    _dyn("topic", _S, None, "Topic to subscribe to", empty_ok=False),
    _dyn("type", _S, None, "Message type, e.g. geometry_msgs/msg/PointStamped",
         empty_ok=False),
    _dyn("fields", _SS, None, "Numeric field paths, e.g. point.y, data[2], position[j3]",
         empty_ok=False),
    _dyn("features", _SS, None, "Output feature names, one per field", empty_ok=False),
    _dyn("scale", _NN, None, "Scale per field (value = scale * raw + offset; empty: 1)"),
    _dyn("offset", _NN, None, "Offset per field (empty: 0)"),
    _dyn("filter", _S, "none", "Low-pass filter: none or butter", choices=("none", "butter")),
    _dyn("order", _I, 2, "Butterworth order (1..8)", low=1, high=8),
    _dyn("cutoff_hz", _N, 0.0, "Filter cutoff [Hz]", low=0.0),
    _dyn("sample_rate_hz", _N, 0.0, "Rate the sensor publishes at [Hz] (filter design rate)",
         low=0.0),
    _dyn("max_age", _N, 0.5, "Samples older than this [s, ROS time] are stale", **POSITIVE),
    _dyn("restamp", _B, False, "Stamp samples on arrival instead of header.stamp"),
    _dyn("qos", _S, "sensor_data", "Input QoS: sensor_data, best_effort, reliable, "
         "transient_local", choices=_BRIDGE_QOS),
)),))

_SIM = {"read_only": True, "dynamic_typing": True}
SIM_DRIVER = NodeParams("sim_driver", (
    Param("joints", _SS, ["j1", "j2", "j3", "j4", "j5", "j6"], "joint names", empty_ok=False,
          **_SIM),
    Param("initial_positions", _NN, None, "start positions [rad] (one per joint; default: 0)",
          empty_ok=False, **_SIM),
    Param("rate", _N, 250.0, "tick and publish rate [Hz]", **POSITIVE, **_SIM),
    Param("command_interface", _S, "position", "position | velocity | trajectory | plan",
          choices=("position", "velocity", "trajectory", "plan"), **_SIM),
    Param("natural_frequency", _N, 60.0, "lag wn [rad/s]", **POSITIVE, **_SIM),
    Param("damping", _N, 0.7, "lag damping ratio", **POSITIVE, **_SIM),
    Param("delay_ticks", _I, 2, "transport delay [ticks]", low=0, **_SIM),
    Param("command_timeout", _N, 0.1, "hold when the latest command is older [s]",
          **POSITIVE, **_SIM),
    Param("position_noise", _N, 2e-5, "position noise [rad]", low=0.0, **_SIM),
    Param("velocity_noise", _N, 2e-3, "velocity noise [rad/s]", low=0.0, **_SIM),
    Param("seed", _I, 0, "noise seed", **_SIM),
    Param("command_qos", _S, "reliable", "reliable | best_effort | sensor_data",
          choices=QOS_CHOICES, **_SIM),
    Param("joint_states_qos", _S, "reliable", "reliable | best_effort | sensor_data",
          choices=QOS_CHOICES, **_SIM),
    _ro("publish_followed", _B, False, "publish driver/followed every tick"),
    _p("stall", _B, False, "fault injection: stop publishing joint_states while true"),
))

EDGE_SENSOR = NodeParams("edge_sensor", (
    Param("scenario", _S, "", "scenario YAML ('' = the demo's)", **_SIM),
    Param("seed", _I, -1, "run seed (-1 = the scenario file's)", low=-1, **_SIM),
    Param("panel_offset_mm", _N, math.nan, "real placement offset [mm] (NaN = drawn from "
          "the seed)", **_SIM),
    Param("panel_angle_deg", _N, math.nan, "real placement angle [deg] (NaN = drawn from "
          "the seed)", **_SIM),
    Param("joint_states_qos", _S, "reliable", "reliable | best_effort | sensor_data",
          choices=QOS_CHOICES, **_SIM),
    Param("output_qos", _S, "reliable", "reliable | best_effort | sensor_data",
          choices=QOS_CHOICES, **_SIM),
    _p("dropout", _B, False, "fault injection: publish no readings while true"),
))

WATCHDOG = NodeParams("watchdog", (
    _ro("limits_file", _S, None, "limits YAML or URDF", empty_ok=False),
    _ro("limits_dynamics", _S, "", "limits YAML beside a URDF"),
    _ro("following_error", _N, DEFAULTS["watchdog.following_error"],
        "following error threshold [rad]", **POSITIVE),
    _ro("command_latency", _N, DEFAULTS["watchdog.command_latency"],
        "driver latency assumed [s]", low=0.0),
    _ro("stop_on_violation", _B, False, "call stop_service on a violation"),
    _ro("stop_service", _S, "adapter/stop", "the adapter's stop service (std_srvs/Trigger)"),
    _ro("joint_states_qos", _S, "sensor_data", "joint_states QoS", choices=QOS_CHOICES),
))

RECORDER = NodeParams("recorder", (
    _ro("output", _S, None, "bag folder to create (default: bags/run_<UTC time>)"),
    _ro("topics", _SS, None, "topics to record (default: every stack topic)", empty_ok=False),
    _ro("compression", _S, "none", "none | zstd | lz4", choices=("none", "zstd", "lz4")),
    _ro("chunk_size", _I, 256 * 1024, "bytes per chunk", low=1),
    _ro("chunk_duration", _N, 1.0, "max age of a chunk [s]", low=0.0),
    _ro("discovery_period", _N, 0.25, "topic discovery period [s]", **POSITIVE),
    _ro("adapter_node", _S, "adapter", "adapter to store"),
    _ro("depth", _I, 100, "subscription history depth", low=1),
))

NODE_PARAMS: dict[str, NodeParams] = {t.node: t for t in (
    ADAPTER, REFERENCE_SERVER, SENSOR_BRIDGE, SIM_DRIVER, EDGE_SENSOR, WATCHDOG, RECORDER)}


def flatten(data: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Nested parameter mappings as flat names joined with dots (as ROS reads them)."""
    out: dict[str, Any] = {}
    for k, v in data.items():
        key = f"{prefix}{k}"
        if isinstance(v, Mapping):
            out.update(flatten(v, key + "."))
        else:
            out[key] = v
    return out


def _lines(node: yaml.Node, prefix: str = "") -> dict[str, int]:
    """1-based line of every flat key under a composed YAML mapping."""
    out: dict[str, int] = {}
    if isinstance(node, yaml.MappingNode):
        for key, value in node.value:
            name = f"{prefix}{key.value}"
            out[name] = key.start_mark.line + 1
            if isinstance(value, yaml.MappingNode):
                out.update(_lines(value, name + "."))
    return out


def check_node_params(kind: str, params: Mapping[str, Any], where: str = "",
                      lines: Mapping[str, int] | None = None) -> list[str]:
    """Problems of the ``ros__parameters`` ``params`` (nested or flat) of a node of kind
    ``kind``, each as ``<where>:<line>: <kind>: <problem>``."""
    table = NODE_PARAMS[kind]
    flat = flatten(params)
    out = []
    for name, why in table.problems(flat):
        line = (lines or {}).get(name)
        at = f"{where}:{line}: " if where and line else (f"{where}: " if where else "")
        out.append(f"{at}{kind}: parameter {why}")
    return out


def check_params_file(path: str | Path, text: str | None = None) -> None:
    """Check every node section of the params file ``path`` (a key whose last path element
    names a node of the package; ``/**`` is not checked) against its node's table
    (``text``: the file's text with ``$(share)`` expanded, read when None). Raises
    `ParamsCheckError` listing every problem."""
    path = Path(path)
    if text is None:
        try:
            text = expand(path.read_text())
        except OSError as exc:
            raise ParamsCheckError(f"cannot read params file '{path}': {exc.strerror}") from None
    try:
        root = yaml.compose(text)
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ParamsCheckError(f"{path}: not valid YAML: {exc}") from None
    if not isinstance(data, Mapping) or not isinstance(root, yaml.MappingNode):
        raise ParamsCheckError(f"{path}: expected a ROS 2 params file (node: ros__parameters: ...)")
    lines = _lines(root)
    sections = [(str(k), str(k).strip("/").split("/")[-1]) for k in data]
    problems = []
    for key, kind in sections:
        if kind not in NODE_PARAMS:
            continue
        body = data.get(key)
        params = body.get("ros__parameters") if isinstance(body, Mapping) else None
        if not isinstance(params, Mapping):
            continue
        prefix = f"{key}.ros__parameters."
        node_lines = {k[len(prefix):]: v for k, v in lines.items() if k.startswith(prefix)}
        problems += check_node_params(kind, params, str(path), node_lines)
    if problems:
        raise ParamsCheckError("\n".join(problems))
