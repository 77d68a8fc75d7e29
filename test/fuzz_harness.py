# SPDX-License-Identifier: Apache-2.0
"""Shared helpers of the reliability tests (fuzzing, network cut, soak) and bench/fuzz_report.py.

* `Cases`: the cases tried per input kind and how each ended (accepted, refused with the
  module's error, stopped smoothly), printed by the tests and by bench/fuzz_report.py.
* File fuzzing (ROS-free), one target per input kind a user edits: limits files (own YAML
  and URDF), params files (`adaptive_streamer.bringup.read_params`), policy cards and ONNX
  models. A target takes one generated input, runs the package on it and classifies the
  outcome; anything but the module's own error escaping, or a decision outside the limits,
  fails it. `fuzz_files(kind, examples, cases, folder)` runs one with hypothesis.
* `step_check`: an independent check of a setpoint stream by the mean value theorem (fact
  of calculus, common practice): between samples ``h`` apart a motion within the limits
  cannot change position by more than ``V h``, velocity by more than ``A h``, acceleration
  by more than ``J h``; ``h`` is taken from integer-nanosecond stamps and widened by two
  float64 spacings of the absolute stamp (the resolution the adapter samples its plan at).
"""
from __future__ import annotations

import math
import string
import time
from collections import Counter
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable

import numpy as np
import onnx
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper

from adaptive_streamer.bringup import NODE_KINDS, BringupError, read_params
from adaptive_streamer.core.cycle import CycleConfig, DecisionCycle
from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limit_stage import LimitStage, LimitStageError
from adaptive_streamer.core.limits import JointLimits, LimitsError
from adaptive_streamer.core.playback import Window
from adaptive_streamer.core.policies import PolicyError, build_policy, parse_card, \
    policy_for_kind
from adaptive_streamer.core.policies.base import RunningConfig
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.core.watchdog import Watchdog, WatchdogConfig, WatchdogError

REPO = Path(__file__).resolve().parents[1]
LIMITS_FILE = REPO / "config" / "demo" / "limits.yaml"
LIMITS = JointLimits.from_file(LIMITS_FILE)
JOINTS = list(LIMITS.names)
N = len(JOINTS)
PERIOD = 0.05                      # decision period (common practice)
FEATURES = ("edge_offset", "edge_angle")
RUNNING = RunningConfig(LIMITS.names, PERIOD, LIMITS, 10, FEATURES)
REL = 1e-9                          # relative rounding allowance on the limits


# ---------------------------------------------------------------------------- counting
@dataclass
class Cases:
    """How the cases of each input kind ended: ``{kind: Counter(outcome)}``."""

    counts: dict[str, Counter] = field(default_factory=dict)

    def add(self, kind: str, outcome: str) -> None:
        """Count one case of ``kind`` ending in ``outcome``."""
        self.counts.setdefault(kind, Counter())[outcome] += 1

    def tried(self, kind: str) -> int:
        """Cases tried of ``kind``."""
        return sum(self.counts.get(kind, Counter()).values())

    def table(self) -> str:
        """One line per input kind: cases tried and outcomes."""
        lines = [f"{'input kind':24s} {'tried':>6s}  outcomes"]
        for kind in sorted(self.counts):
            c = self.counts[kind]
            lines.append(f"{kind:24s} {sum(c.values()):6d}  "
                         + ", ".join(f"{k} {v}" for k, v in sorted(c.items())))
        return "\n".join(lines)


def print_uncaptured(request: Any, text: str) -> None:
    """Print ``text`` to the terminal from a pytest fixture, past output capturing."""
    capture = request.config.pluginmanager.getplugin("capturemanager")
    if capture is None:
        print(text)
        return
    with capture.global_and_fixture_disabled():
        print("\n" + "\n".join("  " + line for line in text.splitlines()), flush=True)


# ---------------------------------------------------------------------------- values
def weird_numbers() -> st.SearchStrategy:
    """Numbers a file may hold: ordinary, zero, negative, huge, tiny, NaN, inf."""
    return st.one_of(st.floats(allow_nan=True, allow_infinity=True),
                     st.floats(min_value=-10.0, max_value=10.0),
                     st.sampled_from([0.0, -1.0, 1e-300, 1e300, math.nan, math.inf, -math.inf]),
                     st.integers(min_value=-10 ** 20, max_value=10 ** 20))


def junk() -> st.SearchStrategy:
    """Any YAML-representable value of the wrong kind."""
    scalars = st.one_of(st.none(), st.booleans(), weird_numbers(),
                        st.text(alphabet=string.printable, max_size=8))
    return st.recursive(scalars, lambda inner: st.one_of(
        st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=4), inner, max_size=3)),
        max_leaves=6)


@st.composite
def mutated(draw: Callable, base: dict[str, Any], extra_keys: list[str]) -> dict[str, Any]:
    """``base`` (a valid mapping) with a few fields dropped, replaced by junk, added."""
    data = dict(base)
    for _ in range(draw(st.sampled_from([0, 0, 1, 1, 1, 2, 3]))):
        action = draw(st.sampled_from(["drop", "junk", "number", "add"]))
        if action == "add":
            data[draw(st.sampled_from(extra_keys + ["typo", "Joints", ""]))] = draw(junk())
        elif data:
            key = draw(st.sampled_from(sorted(data, key=str)))
            if action == "drop":
                del data[key]
            elif action == "junk":
                data[key] = draw(junk())
            else:
                data[key] = draw(weird_numbers())
    return data


# ---------------------------------------------------------------------------- limits files
BASE_JOINT = {"position": [-2.0, 2.0], "velocity": 2.0, "acceleration": 8.0, "jerk": 80.0}
LIMIT_FIELDS = ["position", "velocity", "acceleration", "jerk", "continuous"]


@st.composite
def limits_documents(draw: Callable) -> tuple[str, bytes]:
    """(file name, content) of a limits file: own YAML (mostly near-valid), a URDF, or
    garbage text or bytes."""
    form = draw(st.sampled_from(["yaml", "yaml", "yaml", "urdf", "text", "bytes"]))
    if form == "text":
        return "limits.yaml", draw(st.text(max_size=80)).encode()
    if form == "bytes":
        return "limits.yaml", draw(st.binary(max_size=40))
    names = draw(st.lists(st.sampled_from(["j1", "j2", "j3", "", "j1 ", "7"]), min_size=0,
                          max_size=4))
    joints = {}
    for name in names:
        entry = draw(mutated(BASE_JOINT, LIMIT_FIELDS))
        if draw(st.booleans()) and "position" in entry:
            entry["position"] = draw(st.one_of(
                st.none(), st.lists(weird_numbers(), min_size=0, max_size=3), junk()))
        joints[name] = entry
    if form == "yaml":
        doc = draw(st.one_of(st.just({"joints": joints}), mutated({"joints": joints}, ["joint"])))
        return "limits.yaml", yaml.safe_dump(doc).encode()
    rows = []
    for name, entry in joints.items():
        kind = draw(st.sampled_from(["revolute", "continuous", "prismatic", "fixed", "weird"]))
        pos = entry.get("position") if isinstance(entry.get("position"), list) else [None, None]
        attrs = {"lower": pos[0] if pos else None, "upper": pos[1] if len(pos) > 1 else None,
                 "velocity": entry.get("velocity")}
        attr = " ".join(f'{k}="{v}"' for k, v in attrs.items() if v is not None)
        rows.append(f'<joint name="{name}" type="{kind}"><limit {attr}/></joint>')
    return "robot.urdf", ("<robot name='r'>" + "".join(rows) + "</robot>").encode()


def limits_case(doc: tuple[str, bytes], cases: Cases, folder: Path) -> None:
    """Load a limits file; a `JointLimits` must be sound and give the limit stage a state
    at rest (0 admissible at rest in the middle of the range), or a `LimitsError`."""
    name, content = doc
    path = folder / name
    path.write_bytes(content)
    if name.endswith(".urdf"):      # acceleration/jerk beside it: the demo's, for j1..j3
        (folder / "robot.limits.yaml").write_text(yaml.safe_dump(
            {"joints": {j: {"acceleration": 8.0, "jerk": 80.0} for j in ("j1", "j2", "j3")}}))
    try:
        limits = JointLimits.from_file(path)
    except LimitsError as exc:
        assert str(exc), "a LimitsError without a message"
        cases.add("limits file", "refused")
        return
    assert len(set(limits.names)) == len(limits.names) and all(limits.names)
    for arr in (limits.velocity_max, limits.acceleration_max, limits.jerk_max):
        assert np.all(np.isfinite(arr) & (arr > 0)), f"accepted a non-positive bound: {limits}"
    assert np.all(limits.position_min < limits.position_max)
    try:
        stage = LimitStage(limits, PERIOD)
    except LimitStageError as exc:
        assert "joint" in str(exc)
        cases.add("limits file", "refused by the limit stage")
        return
    mid = np.where(limits.has_position_limits,
                   0.5 * (np.where(limits.has_position_limits, limits.position_min, 0.0)
                          + np.where(limits.has_position_limits, limits.position_max, 0.0)), 0.0)
    z = np.zeros(len(limits))
    lo, hi = stage.admissible_range(mid, z, z)
    assert np.all(np.isfinite(lo) & np.isfinite(hi)), f"non-finite interval at rest: {lo} {hi}"
    assert np.all(lo <= 0.0) and np.all(hi >= 0.0), f"holding still not admissible: {lo} {hi}"
    cases.add("limits file", "accepted")


# ---------------------------------------------------------------------------- params files
@st.composite
def params_documents(draw: Callable) -> bytes:
    """Content of a ROS 2 params file: node keys (known, namespaced, unknown, wildcard) with
    ``ros__parameters`` mappings (or junk), or garbage text or bytes."""
    form = draw(st.sampled_from(["doc", "doc", "doc", "text", "bytes"]))
    if form == "text":
        return draw(st.text(max_size=80)).encode()
    if form == "bytes":
        return draw(st.binary(max_size=40))
    keys = st.one_of(st.sampled_from(sorted(NODE_KINDS)),
                     st.sampled_from(["/cell/adapter", "a/b/sim_driver", "/**", "**", "robot",
                                      "/", "adapter/", "", "//adapter"]),
                     st.text(max_size=6))
    doc: dict[Any, Any] = {}
    for key in draw(st.lists(keys, max_size=4)):
        watchdog = draw(mutated({"joint_states_timeout": 0.1, "deviation_joint": 0.05,
                                 "command_latency": 0.012, "max_overruns": 3},
                                ["overrun_window", "feedback_timeout"]))
        body = {"policy": "x.yaml", "stream_rate": draw(weird_numbers()), "watchdog": watchdog}
        doc[key] = draw(st.one_of(st.just({"ros__parameters": body}),
                                  mutated({"ros__parameters": body}, ["ros_parameters"]), junk()))
    text = yaml.safe_dump(doc) if doc else draw(st.sampled_from(["", "{}", "[]", "null"]))
    return text.encode()


WATCHDOG_NUMBERS = ("deviation_joint", "deviation_norm", "following_error", "command_latency",
                    "joint_states_timeout", "feedback_timeout", "reference_timeout")


def params_case(content: bytes, cases: Cases, folder: Path) -> None:
    """`read_params` gives well-formed `NodeEntry`s or a `BringupError`; the numeric
    watchdog values an adapter entry carries (as ROS would type them: numbers) give a
    `WatchdogConfig` or a `WatchdogError`."""
    path = folder / "params.yaml"
    path.write_bytes(content)
    try:
        entries, expanded = read_params(path)
    except BringupError as exc:
        assert str(path) in str(exc), f"the error does not name the file: {exc}"
        cases.add("params file", "refused")
        return
    assert entries and isinstance(expanded, str)
    for e in entries:
        assert e.kind in NODE_KINDS and (e.namespace == "" or e.namespace.startswith("/"))
        assert isinstance(e.params, dict)
        wd = e.params.get("watchdog")
        if e.kind == "adapter" and isinstance(wd, dict):
            values = {k: v for k, v in wd.items() if k in WATCHDOG_NUMBERS
                      and isinstance(v, (int, float)) and not isinstance(v, bool)}
            try:
                WatchdogConfig(**values)
            except WatchdogError as exc:
                assert "watchdog parameter" in str(exc)
                cases.add("params file", "accepted; watchdog values refused")
                continue
    cases.add("params file", "accepted")


# ---------------------------------------------------------------------------- policy cards
TRACKING_OBS = ["joint_velocity", "joint_acceleration",
                {"block": "reference_position", "horizon": 2},
                {"block": "reference_velocity", "horizon": 2},
                {"block": "reference_acceleration", "horizon": 2}]


def base_cards(folder: Path) -> dict[str, dict[str, Any]]:
    """A valid card of every kind for the demo arm (the ONNX one with a zero model)."""
    common = {"policy_card": 1, "name": "fuzz", "joints": JOINTS, "decision_period": PERIOD,
              "limits": str(LIMITS_FILE)}
    model = folder / "zero.onnx"
    if not model.exists():
        onnx.save(linear_model(8 * N, N), str(model))
    return {
        "onnx": {**common, "kind": "onnx", "model": model.name, "action": "normalised",
                 "observation": TRACKING_OBS + [{"block": "feedback",
                                                 "features": list(FEATURES)}],
                 "onnx": {"input": "obs", "output": "action"}},
        "tracker": {**common, "kind": "tracker", "gains": {"kp": 40.0, "kd": 12.0}},
        "linear_feedback": {**common, "kind": "linear_feedback",
                            "feedback_gain": {"features": ["edge_offset"],
                                              "matrix": [[0.0]] * N}},
        "hold": {**common, "kind": "hold"},
    }


CARD_FIELDS = ["policy_card", "name", "kind", "joints", "decision_period", "limits", "model",
               "action", "observation", "onnx", "gains", "feedback_gain", "description"]


@st.composite
def card_documents(draw: Callable, folder: Path) -> dict[str, Any]:
    """A card structure: a valid card of some kind, mutated at the top level and inside
    (observation blocks, gains, feedback matrix, onnx options)."""
    bases = base_cards(folder)
    data = dict(bases[draw(st.sampled_from(sorted(bases)))])
    for key in ("observation", "gains", "feedback_gain", "onnx"):
        if key in data and draw(st.sampled_from([False, False, True])):
            value = data[key]
            if isinstance(value, list):
                value = list(value)
                i = draw(st.integers(min_value=0, max_value=len(value)))
                entry = draw(st.one_of(
                    junk(), st.sampled_from(["joint_position", "previous_action", "nope"]),
                    mutated({"block": "reference_position", "horizon": 3, "scale": 0.1},
                            ["features", "offset"]),
                    mutated({"block": "feedback", "features": ["edge_offset"], "scale": 0.01},
                            ["horizon", "offset"])))
                value.insert(i, entry)
            elif isinstance(value, dict):
                value = draw(mutated(value, ["features", "matrix", "input", "extra"]))
            data[key] = value
    return draw(mutated(data, CARD_FIELDS))


def card_case(data: dict[str, Any], cases: Cases, folder: Path) -> None:
    """Parse a card and build its policy for the demo adapter: a `PolicyError` (card or
    fit), or a policy whose decisions stay within the limits (`run_cycle`)."""
    try:
        card = parse_card(data, "fuzz card", folder)
        policy = build_policy(card, RUNNING)
    except PolicyError as exc:
        assert "fuzz card" in str(exc) or "zero.onnx" in str(exc), \
            f"the error does not name the card: {exc}"
        cases.add("policy card", "refused")
        return
    cases.add("policy card", run_cycle(policy, np.random.default_rng(len(str(data)))))


# ---------------------------------------------------------------------------- ONNX models
def linear_model(size: int, n: int, w: np.ndarray | None = None) -> onnx.ModelProto:
    """obs [1, size] float32 -> action [1, n] = obs W (zeros by default)."""
    W = np.zeros((size, n), np.float32) if w is None else w.astype(np.float32)
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["obs", "W"], ["action"])], "linear",
        [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, size])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, n])],
        [numpy_helper.from_array(W, "W")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


ELEM = {"float32": TensorProto.FLOAT, "float64": TensorProto.DOUBLE,
        "float16": TensorProto.FLOAT16, "int64": TensorProto.INT64}


@dataclass(frozen=True)
class ModelSpec:
    """A generated model: names, declared types and shapes, what its output holds."""

    in_name: str
    in_type: str
    in_shape: tuple
    out_name: str
    out_type: str
    out_shape: tuple
    values: str          # finite | nan | inf | huge | nan_when_moving | bad_reshape
    card_input: str | None
    card_output: str | None
    extra_input: bool
    corrupt: str         # '' | truncated | garbage


VALID_SPEC = ModelSpec("obs", "float32", (1, 8 * N), "action", "float32", (1, N), "finite",
                       "obs", "action", False, "")


@st.composite
def model_specs(draw: Callable) -> ModelSpec:
    """Models with right and wrong names, dtypes, shapes, values; some corrupted files:
    the valid model with up to three of its properties changed, and half the time outputs
    that are not finite numbers (NaN, inf, 1e30, NaN once moving, a failing reshape)."""
    size, n = 8 * N, N
    dims = lambda k: st.sampled_from([(1, k), (k,), ("N", k), (1, k + 1), (2, k), (k, 1),  # noqa: E731
                                      (), (1, k - 1)])
    choices = {
        "in_name": st.sampled_from(["obs", "x"]), "in_type": st.sampled_from(sorted(ELEM)),
        "in_shape": dims(size), "out_name": st.sampled_from(["action", "y"]),
        "out_type": st.sampled_from(sorted(ELEM)), "out_shape": dims(n),
        "card_input": st.sampled_from(["obs", "x", None, "wrong"]),
        "card_output": st.sampled_from(["action", "y", None]),
        "extra_input": st.booleans(), "corrupt": st.sampled_from(["truncated", "garbage"]),
    }
    count = draw(st.sampled_from([0, 1, 1, 1, 2, 3]))
    changes = draw(st.lists(st.sampled_from(sorted(choices)), min_size=count, max_size=count,
                            unique=True))
    values = draw(st.sampled_from(["finite"] * 5 + ["nan", "inf", "huge", "nan_when_moving",
                                                    "bad_reshape"]))
    return replace(VALID_SPEC, values=values, **{k: draw(choices[k]) for k in changes})


def spec_model(spec: ModelSpec) -> onnx.ModelProto:
    """The ONNX model of ``spec`` (declared types/shapes as given; never checked)."""
    size, n = 8 * N, N
    rng = np.random.default_rng(5)
    nodes = [helper.make_node("Cast", [spec.in_name], ["x32"], to=TensorProto.FLOAT),
             helper.make_node("Reshape", ["x32", "flat_obs"], ["x_row"]),
             helper.make_node("MatMul", ["x_row", "W"], ["u"])]
    inits = [numpy_helper.from_array(np.array([1, -1], np.int64), "flat_obs"),
             numpy_helper.from_array((0.5 * rng.standard_normal((size, n))).astype(np.float32),
                                     "W")]
    last = "u"
    const = {"nan": math.nan, "inf": math.inf, "huge": 1e30}
    if spec.values in const:
        inits.append(numpy_helper.from_array(np.array(const[spec.values], np.float32), "c"))
        nodes.append(helper.make_node("Add" if spec.values != "huge" else "Mul", [last, "c"],
                                      ["u2"]))
        last = "u2"
    elif spec.values == "nan_when_moving":   # NaN once |v| / V of joint 0 exceeds 1e-3
        inits += [numpy_helper.from_array(np.array([0], np.int64), "i0"),
                  numpy_helper.from_array(np.array([1], np.int64), "i1"),
                  numpy_helper.from_array(np.array([1], np.int64), "ax"),
                  numpy_helper.from_array(np.array(1e-3, np.float32), "thr"),
                  numpy_helper.from_array(np.array(math.nan, np.float32), "nan")]
        nodes += [helper.make_node("Slice", ["x_row", "i0", "i1", "ax"], ["v0"]),
                  helper.make_node("Abs", ["v0"], ["v0a"]),
                  helper.make_node("Greater", ["v0a", "thr"], ["moving"]),
                  helper.make_node("Where", ["moving", "nan", last], ["u2"])]
        last = "u2"
    elif spec.values == "bad_reshape":     # a reshape onnxruntime refuses when run
        inits.append(numpy_helper.from_array(np.array([n + 1, -1], np.int64), "bad"))
        nodes.append(helper.make_node("Reshape", [last, "bad"], ["u2"]))
        last = "u2"
    nodes.append(helper.make_node("Cast", [last], [spec.out_name], to=ELEM[spec.out_type]))
    inputs = [helper.make_tensor_value_info(spec.in_name, ELEM[spec.in_type],
                                            list(spec.in_shape))]
    if spec.extra_input:
        inputs.append(helper.make_tensor_value_info("extra", TensorProto.FLOAT, [1]))
    graph = helper.make_graph(
        nodes, "fuzz", inputs,
        [helper.make_tensor_value_info(spec.out_name, ELEM[spec.out_type], list(spec.out_shape))],
        inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


def model_case(spec: ModelSpec, cases: Cases, folder: Path) -> None:
    """Write the model and a card for it, load the policy: a `PolicyError`, or a policy
    whose NaN/inf/failing outputs become a controlled stop (`run_cycle`)."""
    path = folder / "fuzz.onnx"
    data = spec_model(spec).SerializeToString()
    if spec.corrupt == "truncated":
        data = data[: len(data) // 2]
    elif spec.corrupt == "garbage":
        data = bytes(range(256)) * 3
    path.write_bytes(data)
    options = {k: v for k, v in (("input", spec.card_input), ("output", spec.card_output))
               if v is not None}
    card = {"policy_card": 1, "name": "fuzz model", "kind": "onnx", "model": path.name,
            "joints": JOINTS, "decision_period": PERIOD, "limits": str(LIMITS_FILE),
            "observation": TRACKING_OBS, "action": "normalised", "onnx": options}
    try:
        policy = build_policy(parse_card(card, "fuzz model card", folder), RUNNING)
    except PolicyError as exc:
        assert "fuzz model card" in str(exc), f"the error does not name the card: {exc}"
        cases.add("onnx model", "refused")
        return
    cases.add("onnx model", run_cycle(policy, np.random.default_rng(7)))


# ---------------------------------------------------------------------------- the cycle
def run_cycle(policy: Any, rng: np.random.Generator, decisions: int = 12) -> str:
    """Follow a moving reference with ``policy`` from a random state for a few decisions;
    every committed acceleration must lie in its admissible interval and respect the limits
    over the segment. Returns ``'accepted'`` or ``'stopped (KIND)'``."""
    stage = LimitStage(LIMITS, PERIOD)
    watchdog = Watchdog(WatchdogConfig(deviation_joint=10.0, deviation_norm=10.0), LIMITS.names)
    approach = policy_for_kind("tracker", RUNNING)
    cycle = DecisionCycle(stage, stage, policy, approach, watchdog, CycleConfig())
    mid = 0.5 * (LIMITS.position_min + LIMITS.position_max)
    cycle.begin_following(1.0, MotionState(mid + rng.uniform(-0.2, 0.2, N),
                                           rng.uniform(-0.3, 0.3, N) * LIMITS.velocity_max,
                                           np.zeros(N)))
    H = 12
    for k in range(decisions):
        t = cycle.t
        times = np.arange(H) * PERIOD
        ref = mid[None, :] + 0.1 * np.sin(2.0 * (t + times))[:, None]
        window = Window(t, times, ref, 0.2 * np.cos(2.0 * (t + times))[:, None] * np.ones(N),
                        -0.4 * np.sin(2.0 * (t + times))[:, None] * np.ones(N), LIMITS.names)
        fb = FeatureVector(FEATURES, rng.normal(0, 0.003, 2), np.ones(2, bool), t)
        state = cycle.state
        d = cycle.step(window, fb)
        check_segment(state, d.u, d.lo, d.hi)
    trip = watchdog.trip
    return "accepted" if trip is None else f"stopped ({trip.kind})"


def check_segment(state: MotionState, u: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> None:
    """The committed ``u`` lies in [lo, hi] and the constant-jerk segment from ``state``
    keeps |a| <= A, |j| <= J and |v| <= V at 21 points (closed forms, Biagiotti &
    Melchiorri 2008, ch. 3, from memory)."""
    A, J, V = LIMITS.acceleration_max, LIMITS.jerk_max, LIMITS.velocity_max
    assert np.all(np.isfinite(u)), f"non-finite committed acceleration {u}"
    tol = REL * A
    assert np.all(u >= lo - tol) and np.all(u <= hi + tol), f"u {u} outside [{lo}, {hi}]"
    p, v, a = state
    j = (u - a) / PERIOD
    assert np.all(np.abs(j) <= J * (1 + 1e-6)), f"jerk {j} over {J}"
    assert np.all(np.abs(u) <= A * (1 + 1e-6)), f"acceleration {u} over {A}"
    for s in np.linspace(0.0, PERIOD, 21):
        vs = v + a * s + 0.5 * j * s * s
        assert np.all(np.abs(vs) <= V * (1 + 1e-6)), f"velocity {vs} over {V}"


# ---------------------------------------------------------------------------- running
FILE_KINDS: dict[str, tuple[Callable, Callable[[Path], st.SearchStrategy]]] = {
    "limits file": (limits_case, lambda folder: limits_documents()),
    "params file": (params_case, lambda folder: params_documents()),
    "policy card": (card_case, lambda folder: card_documents(folder)),
    "onnx model": (model_case, lambda folder: model_specs()),
}


def fuzz_files(kind: str, examples: int, cases: Cases, folder: Path, seed: int = 0) -> None:
    """Run the ``kind`` target on ``examples`` generated inputs (hypothesis, derandomised
    by ``seed``); a property violation raises with the shrunk example."""
    target, strategy = FILE_KINDS[kind]
    folder.mkdir(parents=True, exist_ok=True)

    @settings(max_examples=examples, deadline=None, database=None, derandomize=seed == 0,
              suppress_health_check=list(HealthCheck))
    @given(strategy(folder))
    def run(x: Any) -> None:
        target(x, cases, folder)

    if seed:
        from hypothesis import seed as hseed
        run = hseed(seed)(run)
    run()


# ---------------------------------------------------------------------------- streams
def step_check(stamps_ns: np.ndarray, p: np.ndarray, v: np.ndarray, a: np.ndarray,
               limits: JointLimits = LIMITS) -> dict[str, int]:
    """Violations by kind of a setpoint stream (see the module docstring); empty = none."""
    ns = np.asarray(stamps_ns, np.int64)
    p, v, a = (np.asarray(x, float) for x in (p, v, a))
    if not ns.shape[0] == p.shape[0] == v.shape[0] == a.shape[0]:
        raise ValueError(f"step_check: {ns.shape[0]} stamps for {p.shape[0]}, {v.shape[0]}, "
                         f"{a.shape[0]} samples")
    out: dict[str, int] = {}

    def count(kind: str, bad: np.ndarray) -> None:
        if bad.any():
            out[kind] = int(bad.any(axis=-1).sum()) if bad.ndim > 1 else int(bad.sum())

    count("not finite", ~(np.isfinite(p) & np.isfinite(v) & np.isfinite(a)))
    tol = 1e-6
    count("position below min", p < limits.position_min - tol * (1 + np.abs(limits.position_min)))
    count("position above max", p > limits.position_max + tol * (1 + np.abs(limits.position_max)))
    count("velocity", np.abs(v) > limits.velocity_max * (1 + tol))
    count("acceleration", np.abs(a) > limits.acceleration_max * (1 + tol))
    if ns.shape[0] > 1:
        h = np.diff(ns) * 1e-9
        count("stamps not increasing", h <= 0)
        span = (h + 2.0 * np.spacing(ns[-1] * 1e-9))[:, None] * (1 + tol) + 1e-12
        count("position step over V h", np.abs(np.diff(p, axis=0)) > limits.velocity_max * span)
        count("velocity step over A h", np.abs(np.diff(v, axis=0))
              > limits.acceleration_max * span)
        count("acceleration step over J h", np.abs(np.diff(a, axis=0))
              > limits.jerk_max * span)
    return out


# ---------------------------------------------------------------------------- topics (DDS)
JS_NAMES = ("same", "same", "reordered", "missing", "extra", "duplicate", "empty", "renamed")
JS_VALUES = ("same", "same", "nan", "inf", "huge", "small_shift", "short", "no_velocity",
             "velocity_length")
STAMPS = ("same", "same", "zero", "past", "future", "far_future")
WINDOW_POINTS = ("same", "same", "none", "one", "short_values", "nan", "inf", "huge",
                 "not_increasing", "negative_times")
FEEDBACK = ("valid", "missing", "extra", "duplicate", "length", "nan", "inf", "huge", "empty")
BRIDGE_VALUES = ("finite", "finite", "nan", "inf", "huge")
BRIDGE_STAMPS = ("now", "now", "zero", "past", "slightly_ahead", "far_ahead", "negative")
COMMANDS = ("short", "long", "empty", "nan", "inf")
TOPIC_CASES = {
    "joint_states": st.fixed_dictionaries({"names": st.sampled_from(JS_NAMES),
                                           "values": st.sampled_from(JS_VALUES),
                                           "stamp": st.sampled_from(STAMPS),
                                           "joint": st.integers(0, N - 1),
                                           "huge": st.sampled_from([1e3, 1e9, 1e300])}),
    "reference/window": st.fixed_dictionaries({"names": st.sampled_from(JS_NAMES[:7]),
                                               "points": st.sampled_from(WINDOW_POINTS),
                                               "stamp": st.sampled_from(STAMPS),
                                               "joint": st.integers(0, N - 1)}),
    "feedback": st.fixed_dictionaries({"form": st.sampled_from(FEEDBACK),
                                       "stamp": st.sampled_from(STAMPS)}),
    "sensor_bridge input": st.fixed_dictionaries({"values": st.sampled_from(BRIDGE_VALUES),
                                                  "stamp": st.sampled_from(BRIDGE_STAMPS)}),
    "sim_driver command": st.fixed_dictionaries({"form": st.sampled_from(COMMANDS),
                                                 "joint": st.integers(0, N - 1)}),
}


def _stamp(kind: str, now: float, original: float) -> float:
    return {"same": original, "zero": 0.0, "past": now - 5.0, "future": now + 5.0,
            "far_future": now + 1e6}[kind]


def joint_state_fields(spec: dict[str, Any], names: list[str], pos: list[float],
                       vel: list[float]) -> tuple[list[str], list[float], list[float], bool]:
    """(names, positions, velocities, expected to be refused) of a mutated joint state.

    Refused (by the adapter's own rule, read independently here): a joint of the adapter
    named in ``name`` whose position is missing or not finite. A message without some of
    the adapter's joints is not refused (drivers send joints in several messages)."""
    names, pos, vel = list(names), list(pos), list(vel)
    j = spec["joint"] % len(names)
    form = spec["names"]
    if form == "reordered":
        order = list(reversed(range(len(names))))
        names, pos, vel = ([x[i] for i in order] for x in (names, pos, vel))
    elif form == "missing":
        del names[j], pos[j], vel[j]
    elif form == "extra":
        names, pos, vel = names + ["gripper"], pos + [0.01], vel + [0.0]
    elif form == "duplicate":        # the first of a repeated name counts
        names, pos, vel = names + [names[j]], pos + [pos[j] + 1.0], vel + [0.0]
    elif form == "empty":
        names, pos, vel = [], [], []
    elif form == "renamed":
        names[j] = names[j].upper()
    values = spec["values"]
    if pos and values in ("nan", "inf", "huge", "small_shift"):
        pos[j % len(pos)] = {"nan": math.nan, "inf": math.inf, "huge": spec["huge"],
                             "small_shift": pos[j % len(pos)] + 0.02}[values]
    elif values == "short":
        pos = pos[:max(0, len(pos) - 1)]
    elif values == "no_velocity":
        vel = []
    elif values == "velocity_length":
        vel = vel + [0.0]
    index = {}
    for i, name in enumerate(names):
        index.setdefault(name, i)
    refused = any(index[name] >= len(pos) or not math.isfinite(pos[index[name]])
                  for name in JOINTS if name in index)
    return names, pos, vel, refused


class TopicFuzz:
    """A live cell over DDS with a fuzzing node: `adapter_harness.Cell` (reference_server,
    sim_driver, the adapter following a looped reference with a linear_feedback policy that
    reads ``edge_offset`` at gain 1 on j1), a sensor_bridge on ``fuzz/edge`` publishing
    ``bridge/feedback``, and `case` methods that publish one fuzzed message and classify
    what followed. While a case is published to the adapter, the genuine source of that
    input is held back (the harness's relays), so the fuzzed message is the one decided on.
    """

    def __init__(self, folder: Path) -> None:
        import adapter_harness as ah
        from geometry_msgs.msg import PointStamped
        from rclpy.parameter import Parameter
        from sensor_msgs.msg import JointState
        from std_msgs.msg import Float64MultiArray
        from trajectory_msgs.msg import JointTrajectory

        from adaptive_streamer.nodes.common import reliable_qos
        from adaptive_streamer.nodes.sensor_bridge import SensorBridge

        self.ah = ah
        card = ah.write_card(folder, "fuzz_feedback", "linear_feedback", feedback_gain={
            "features": ["edge_offset"], "matrix": [[1.0]] + [[0.0]] * (N - 1)})
        # the adapter in this process: its counters and events classify the cases; the
        # fuzzer is an allowed second publisher of each input (sources.*)
        self.cell = ah.Cell(folder, card, adapter_in_process=True,
                            sources__joint_states=["/cell_relay", "/topic_fuzzer"],
                            sources__reference=["/cell_relay", "/topic_fuzzer"],
                            sources__feedback=["/adapter_probe", "/topic_fuzzer"])
        self.probe = self.cell.probe
        node = self.node = rclpy_node("topic_fuzzer")
        self.js_pub = node.create_publisher(JointState, "joint_states", 10)
        self.ref_pub = node.create_publisher(JointTrajectory, "reference/window", reliable_qos(5))
        self.fb_pub = node.create_publisher(JointState, "feedback", 10)
        self.cmd_pub = node.create_publisher(Float64MultiArray, "driver/position_command", 10)
        self.edge_pub = node.create_publisher(PointStamped, "fuzz/edge", reliable_qos(10))
        self.latest_js: Any = None
        self.bridge_out: list[tuple[list[str], list[float]]] = []
        node.create_subscription(JointState, "sim/joint_states", self._on_js, 10)
        node.create_subscription(JointState, "bridge/feedback", lambda m: self.bridge_out.append(
            (list(m.name), list(m.position))), reliable_qos(100))
        p = lambda k, v: Parameter(k, value=v)  # noqa: E731
        self.bridge = SensorBridge(parameter_overrides=[
            p("inputs", ["edge"]), p("edge.topic", "fuzz/edge"),
            p("edge.type", "geometry_msgs/msg/PointStamped"),
            p("edge.fields", ["point.y", "point.z"]), p("edge.features", list(FEATURES)),
            p("edge.max_age", 0.3), p("edge.qos", "reliable")],
            cli_args=["--ros-args", "-r", "feedback:=bridge/feedback"])
        for n in (node, self.bridge):
            self.cell.cell_ex.add_node(n)
        self.msgs = (JointState, JointTrajectory, Float64MultiArray, PointStamped)

    def _on_js(self, msg: Any) -> None:
        self.latest_js = msg

    def start(self) -> None:
        """Bring the adapter to follow the moving reference with valid feedback flowing."""
        self.probe.feedback = {"edge_offset": 0.0}
        self.cell.start_following()
        self.cell.start_reference()
        self.ah.wait_until(lambda: self.latest_js is not None, "joint states")

    def close(self) -> None:
        """Stop and destroy everything."""
        self.cell.close()
        for n in (self.node, self.bridge):
            n.destroy_node()

    # ------------------------------------------------------------------ helpers
    @property
    def adapter(self) -> Any:
        """The adapter node (its counters and session are read to classify cases)."""
        return self.cell.adapter

    def now(self) -> float:
        """ROS time [s]."""
        return self.cell.now()

    def decisions_after(self, count: int, timeout: float = 2.0) -> None:
        """Wait until ``count`` more decision records arrived."""
        n0 = len(self.probe.decisions)
        self.ah.wait_until(lambda: len(self.probe.decisions) >= n0 + count,
                           f"{count} decisions", timeout)

    def ensure_following(self) -> None:
        """After a stop: wait for rest, reset, resume the reference, follow again."""
        cell = self.cell
        if cell.mode() == "following" and self.adapter.session.watchdog.trip is None:
            return
        self.probe.js_block = self.probe.ref_block = False
        self.probe.feedback = {"edge_offset": 0.0}
        cell.wait_mode("stopped", 20.0)
        self.ah.wait_until(lambda: self.trigger("/adapter/reset").success, "a reset", 30.0,
                           poll=0.2)
        res = self.trigger("/reference_server/resume")
        assert res.success or "not paused" in res.message, res.message
        cell.wait_mode("following", 30.0)

    def trigger(self, name: str, wait: float = 2.0) -> Any:
        """Call a Trigger service; on a loaded machine an answer can be lost, so the
        request is sent again every ``wait`` seconds (the services are idempotent here)."""
        from std_srvs.srv import Trigger
        client = self.probe.client(Trigger, name)
        self.ah.wait_until(client.service_is_ready, f"service {name}")
        for _ in range(5):
            future = client.call_async(Trigger.Request())
            end = time.monotonic() + wait
            while not future.done() and time.monotonic() < end:
                time.sleep(0.01)
            if future.done():
                return future.result()
        raise AssertionError(f"no answer from {name} to 5 requests")

    def _outcome(self, counters0: dict[str, int], events0: int, counter: str | None) -> str:
        events = self.adapter.session.watchdog.events[events0:]
        if counter is not None and self.adapter._counters[counter] > counters0[counter]:
            return "refused"
        if events:
            return f"stopped ({events[0].kind})"
        return "accepted"

    def _adapter_case(self, hold: str, publish: Callable[[], bool], counter: str | None
                      ) -> tuple[str, bool]:
        """Hold back the genuine input, publish (returns 'expected refused'), let two
        decisions read it, restore; returns (outcome, expected refused)."""
        self.ensure_following()
        counters0 = dict(self.adapter._counters)
        events0 = len(self.adapter.session.watchdog.events)
        saved = self.probe.feedback
        if hold == "feedback":
            self.probe.feedback = None
        else:
            setattr(self.probe, hold, True)
        time.sleep(0.03)                      # the relays' last genuine message is in
        try:
            expected = publish()
            self.decisions_after(2)
        finally:
            if hold == "feedback":
                self.probe.feedback = saved
            else:
                setattr(self.probe, hold, False)
        return self._outcome(counters0, events0, counter), expected

    # ------------------------------------------------------------------ cases
    def joint_states_case(self, spec: dict[str, Any]) -> tuple[str, bool]:
        """A mutated copy of the driver's latest joint state."""
        src = self.latest_js

        def publish() -> bool:
            JointState = self.msgs[0]
            names, pos, vel, refused = joint_state_fields(spec, list(src.name),
                                                          list(src.position), list(src.velocity))
            msg = JointState(name=names, position=pos, velocity=vel)
            now = self.now()
            from adaptive_streamer.io.stamps import sec_to_stamp
            t = _stamp(spec["stamp"], now, now)
            msg.header.stamp = sec_to_stamp(max(t, 0.0))
            self.js_pub.publish(msg)
            return refused
        return self._adapter_case("js_block", publish, "bad_joint_states")

    def window_case(self, spec: dict[str, Any]) -> tuple[str, bool]:
        """A mutated copy of the reference server's latest window."""
        from adaptive_streamer.io.stamps import sec_to_stamp, stamp_to_sec
        from trajectory_msgs.msg import JointTrajectoryPoint

        def publish() -> bool:
            src = self.probe.last_window
            names = list(src.joint_names)
            pts = [(list(p.positions), list(p.velocities), list(p.accelerations),
                    p.time_from_start.sec + p.time_from_start.nanosec * 1e-9) for p in src.points]
            j = spec["joint"]
            refused = False
            form = spec["names"]
            cols = list(range(len(names)))
            if form == "reordered":
                cols = cols[::-1]
            elif form in ("missing", "empty"):
                cols = [] if form == "empty" else [c for c in cols if c != j]
                refused = True
            elif form == "renamed":
                names[j] = names[j].upper()
                refused = True
            elif form == "duplicate":
                cols = cols + [j]
            new_names = [names[c] for c in cols] + (["gripper"] if form == "extra" else [])
            extra = [0.0] if form == "extra" else []
            rows = [([p[c] for c in cols] + extra, [v[c] for c in cols] + extra,
                     [a[c] for c in cols] + extra, t) for p, v, a, t in pts]
            kind = spec["points"]
            if kind == "none":
                rows, refused = [], True
            elif kind == "one":
                rows = rows[:1]
            elif kind == "short_values" and rows and rows[0][0]:
                rows[0] = (rows[0][0][:-1],) + rows[0][1:]
                refused = True
            elif kind in ("nan", "inf", "huge") and rows and rows[0][0]:
                value = {"nan": math.nan, "inf": math.inf, "huge": 1e6}[kind]
                for r in rows:
                    r[0][0] = value if kind != "huge" else r[0][0] + value
            elif kind == "not_increasing" and len(rows) > 2:
                rows[2] = rows[2][:3] + (rows[1][3],)
            elif kind == "negative_times":
                rows = [r[:3] + (r[3] - 10.0,) for r in rows]
            if not new_names:
                refused = True
            msg = JointTrajectory(joint_names=new_names)
            for p, v, a, t in rows:
                pt = JointTrajectoryPoint(positions=p, velocities=v, accelerations=a)
                if t >= 0:
                    sec_to_stamp(t, pt.time_from_start)
                else:                           # a Duration with a negative second count
                    pt.time_from_start.sec = int(math.floor(t))
                    pt.time_from_start.nanosec = int(round((t - math.floor(t)) * 1e9)) % 10 ** 9
                msg.points.append(pt)
            now = self.now()
            sec_to_stamp(max(_stamp(spec["stamp"], now, stamp_to_sec(src.header.stamp)), 0.0),
                         msg.header.stamp)
            for _ in range(3):
                self.ref_pub.publish(msg)
                time.sleep(0.01)
            return refused
        JointTrajectory = self.msgs[1]
        return self._adapter_case("ref_block", publish, "bad_windows")

    def feedback_case(self, spec: dict[str, Any]) -> tuple[str, bool]:
        """A malformed or odd feedback vector (the valid one is held back meanwhile)."""
        from adaptive_streamer.io.stamps import sec_to_stamp

        def publish() -> bool:
            form = spec["form"]
            names, values = ["edge_offset"], [0.0]
            if form == "missing":
                names, values = ["edge_angle"], [0.0]
            elif form == "extra":
                names, values = ["edge_offset", "edge_angle", "x"], [0.0, 0.1, 9.0]
            elif form == "duplicate":
                names, values = ["edge_offset", "edge_offset"], [0.0, 1.0]
            elif form == "length":
                names, values = ["edge_offset", "edge_angle"], [0.0]
            elif form in ("nan", "inf", "huge"):
                values = [{"nan": math.nan, "inf": math.inf, "huge": 1e300}[form]]
            elif form == "empty":
                names, values = [], []
            msg = self.msgs[0](name=names, position=values)
            now = self.now()
            sec_to_stamp(max(_stamp(spec["stamp"], now, now), 0.0), msg.header.stamp)
            for _ in range(3):
                self.fb_pub.publish(msg)
                time.sleep(0.01)
            return False
        return self._adapter_case("feedback", publish, None)

    def bridge_case(self, spec: dict[str, Any]) -> tuple[str, bool]:
        """One sensor sample on the bridge's input; its verdict must match the rule (NaN/inf
        dropped, zero/negative or far-ahead stamps dropped, samples older than max_age
        dropped as late, anything else accepted, huge or not)."""
        from adaptive_streamer.io.stamps import sec_to_stamp
        table = self.bridge._table
        before = vars(table.counters(0)).copy()
        now = self.now()
        stamp = {"now": now, "zero": 0.0, "past": now - 1.0, "slightly_ahead": now + 0.01,
                 "far_ahead": now + 10.0, "negative": -1.0}[spec["stamp"]]
        value = {"finite": 0.001, "nan": math.nan, "inf": -math.inf, "huge": 1e300}[spec["values"]]
        msg = self.msgs[3]()
        msg.point.y, msg.point.z = value, 0.01
        if stamp > 0:
            sec_to_stamp(stamp, msg.header.stamp)
        else:
            msg.header.stamp.sec = -1 if stamp < 0 else 0
        self.edge_pub.publish(msg)
        # the bridge counts the arrival first and its verdict a moment later (its own
        # thread): wait for both. 'stale_events' is no verdict on a sample: the input, fed
        # only by these cases, goes stale between them on its own
        not_verdicts = ("received", "stale_events")

        def judged() -> dict[str, int] | None:
            now = dict(vars(table.counters(0)))
            done = now["received"] > before["received"] and any(
                now[k] != before[k] for k in now if k not in not_verdicts)
            return now if done else None
        after = self.ah.wait_until(judged, "the bridge to receive and judge the sample", 5.0)
        changed = [k for k in after if k not in not_verdicts and after[k] != before[k]]
        if spec["values"] in ("nan", "inf"):
            want = "dropped_nan"
        elif spec["stamp"] in ("zero", "negative", "far_ahead"):
            want = "dropped_stamp"
        elif spec["stamp"] == "past":
            want = "dropped_late"
        else:
            want = "accepted"
        assert changed == [want] or (want == "accepted" and changed == ["dropped_stamp"]
                                     and spec["stamp"] == "now"), (spec, changed)
        return ("accepted" if changed == ["accepted"] else "refused"), want != "accepted"

    def command_case(self, spec: dict[str, Any]) -> tuple[str, bool]:
        """A malformed driver command (wrong length, empty, NaN, inf): the driver drops it."""
        def rejected() -> int:
            return int(self.cell.wait_diag(lambda v: "commands_rejected" in v,
                                           "sim_driver diagnostics", name="sim_driver",
                                           timeout=5.0)[3]["commands_rejected"])
        before = rejected()
        src = list(self.latest_js.position)
        form = spec["form"]
        data = {"short": src[:-1], "long": src + [0.0], "empty": []}.get(form, list(src))
        if form in ("nan", "inf"):
            data[spec["joint"]] = math.nan if form == "nan" else math.inf
        # sent again until the driver's diagnostics (about 1 Hz) count it (a sample can be
        # lost while the loaded machine is still matching the publisher); each copy is the
        # same bad command
        count = before
        for _ in range(10):
            self.cmd_pub.publish(self.msgs[2](data=data))
            count = rejected()
            if count > before:
                break
        assert count > before, f"the driver did not drop the command {data}"
        return "refused", True

    def run(self, kind: str, spec: dict[str, Any]) -> tuple[str, bool]:
        """One case of ``kind`` (a key of `TOPIC_CASES`)."""
        return {"joint_states": self.joint_states_case, "reference/window": self.window_case,
                "feedback": self.feedback_case, "sensor_bridge input": self.bridge_case,
                "sim_driver command": self.command_case}[kind](spec)

    def stream(self) -> tuple[np.ndarray, ...]:
        """Every setpoint received so far: stamps [ns], p, v, a."""
        s = list(self.probe.setpoints)
        return (np.array([x.stamp_ns for x in s], np.int64), np.array([x.position for x in s]),
                np.array([x.velocity for x in s]), np.array([x.acceleration for x in s]))


def rclpy_node(name: str, namespace: str | None = None) -> Any:
    """A plain rclpy node (rclpy imported only when the DDS helpers are used)."""
    from rclpy.node import Node
    return Node(name, namespace=namespace)


def fuzz_topics(fuzz: TopicFuzz, kind: str, examples: int, cases: Cases) -> None:
    """Run ``examples`` generated cases of ``kind`` on a started `TopicFuzz`; each case's
    outcome is counted; an input the adapter's rule refuses must be refused, and a valid
    one must not be."""
    @settings(max_examples=examples, deadline=None, database=None, derandomize=True,
              suppress_health_check=list(HealthCheck))
    @given(TOPIC_CASES[kind])
    def run(spec: dict[str, Any]) -> None:
        outcome, refused = fuzz.run(kind, spec)
        cases.add(kind, outcome)
        if kind in ("joint_states", "reference/window"):
            assert (outcome == "refused") == refused, (spec, outcome)
    run()


# ---------------------------------------------------------------------------- sim time
class ClockFuzz:
    """reference_server, sim_driver and the adapter (tracker) on simulated time published
    here on ``/clock`` (advancing with the wall clock from 1000 s, 1 kHz), an observer of
    ``setpoints`` and ``/rosout``, all in the namespace `NAMESPACE` (beside a `TopicFuzz`
    cell); `run_jump` sends the clock back and reports what the stack did."""

    NAMESPACE = "/simclock"


    def __init__(self, folder: Path) -> None:
        import threading

        import adapter_harness as ah
        from rcl_interfaces.msg import Log
        from rclpy.executors import SingleThreadedExecutor
        from rclpy.parameter import Parameter
        from rosgraph_msgs.msg import Clock
        from trajectory_msgs.msg import JointTrajectory

        from adaptive_streamer.nodes.adapter import AdapterNode
        from adaptive_streamer.nodes.threads import make_executor
        from adaptive_streamer.nodes.common import reliable_qos
        from adaptive_streamer.nodes.lifecycle_client import LifecycleClient
        from adaptive_streamer.nodes.reference_server import ReferenceServer
        from adaptive_streamer.nodes.sim_driver import SimDriver

        self.ah = ah
        self.sim_t = 1000.0
        self._lock = threading.Lock()
        self._running = True
        sim = Parameter("use_sim_time", value=True)
        ns = ["--ros-args", "-r", f"__ns:={self.NAMESPACE}"]
        self.node = rclpy_node("clock_fuzzer", self.NAMESPACE)
        self._clock_pub = self.node.create_publisher(Clock, "/clock", 10)
        self._clock_msg = Clock
        self.setpoints: list[tuple[int, list, list, list]] = []
        self.logs: list[tuple[str, str]] = []
        self.node.create_subscription(JointTrajectory, "setpoints", self._on_setpoint,
                                      reliable_qos(1000))
        self.node.create_subscription(Log, "/rosout", lambda m: self.logs.append((m.name, m.msg)),
                                      100)
        card = ah.write_card(folder, "clock_tracker", "tracker")
        self.reference = ReferenceServer(parameter_overrides=[
            sim, Parameter("reference_file", value=str(ah.write_reference(folder))),
            Parameter("limits_file", value=str(ah.LIMITS_FILE)),
            Parameter("end_mode", value="loop"), Parameter("start_mode", value="immediate")],
            cli_args=ns)
        self.driver = SimDriver(parameter_overrides=[
            sim, Parameter("joints", value=ah.JOINTS),
            Parameter("initial_positions", value=ah.P0.tolist())], cli_args=ns)
        self.adapter = AdapterNode(parameter_overrides=[sim] + ah.adapter_overrides(card),
                                   cli_args=ns)
        self._ex = SingleThreadedExecutor()
        for n in (self.node, self.reference, self.driver):
            self._ex.add_node(n)
        self._aex = make_executor()
        self._aex.add_node(self.adapter)
        self._threads = [threading.Thread(target=self._tick_clock, daemon=True)] + [
            threading.Thread(target=ah.spin_executor, args=(e,), daemon=True)
            for e in (self._ex, self._aex)]
        for th in self._threads:
            th.start()
        self.lifecycle = LifecycleClient(self.node, "adapter", spun_elsewhere=True)

    def _tick_clock(self) -> None:
        last = time.monotonic()
        while self._running:
            now = time.monotonic()
            with self._lock:
                self.sim_t += now - last
                t = self.sim_t
            last = now
            msg = self._clock_msg()
            msg.clock.sec, msg.clock.nanosec = int(t), int(round((t % 1.0) * 1e9)) % 10 ** 9
            self._clock_pub.publish(msg)
            time.sleep(0.001)

    def _on_setpoint(self, msg: Any) -> None:
        pt = msg.points[0]
        st_ = msg.header.stamp
        self.setpoints.append((st_.sec * 10 ** 9 + st_.nanosec, list(pt.positions),
                               list(pt.velocities), list(pt.accelerations)))

    def start(self) -> None:
        """configure + activate (retried until joint_states is fresh), then follow."""
        assert self.lifecycle.wait(20.0) and self.lifecycle.configure()
        self.ah.wait_until(self.lifecycle.activate, "activation", 30.0, poll=0.3)
        self.ah.wait_until(lambda: self.adapter.session.mode == "following", "following", 30.0)

    def close(self) -> None:
        """Bring the arm to rest while the clock runs, then stop the clock and destroy the
        nodes."""
        try:
            if self.lifecycle.state() == "active":
                self.lifecycle.deactivate()
        finally:
            self._running = False
            for e in (self._aex, self._ex):
                e.shutdown(timeout_sec=2.0)
            for n in (self.adapter, self.reference, self.driver, self.node):
                n.destroy_node()

    def run_jump(self, seconds: float) -> str:
        """Send the clock back by ``seconds`` while following; wait until it is 1.5 s past
        where it was; return 'continued' or 'stopped (KIND)' (then reset and resume)."""
        session = self.adapter.session
        if session.mode != "following" or session.watchdog.trip is not None:
            self.recover()
        events0 = len(session.watchdog.events)
        with self._lock:
            before = self.sim_t
            self.sim_t -= seconds
        self.ah.wait_until(lambda: self.sim_t > before + 1.5, "the clock to pass the jump",
                           seconds + 20.0, poll=0.05)
        events = session.watchdog.events[events0:]
        return "continued" if not events else f"stopped ({events[0].kind})"

    def recover(self) -> None:
        """Wait for rest, reset (retried while refused), resume the reference, follow."""
        from std_srvs.srv import Trigger
        session = self.adapter.session
        clients: dict[str, Any] = {}

        def call(name: str) -> Any:
            if name not in clients:
                clients[name] = self.node.create_client(Trigger, name)
                assert clients[name].wait_for_service(5.0), name
            future = clients[name].call_async(Trigger.Request())
            self.ah.wait_until(future.done, f"the answer of {name}", 5.0)
            return future.result()
        self.ah.wait_until(lambda: session.mode == "stopped", "rest", 20.0)
        self.ah.wait_until(lambda: call("adapter/reset").success, "a reset", 20.0, poll=0.2)
        call("reference_server/resume")
        self.ah.wait_until(lambda: session.mode == "following", "following again", 30.0)

    def stream(self) -> tuple[np.ndarray, ...]:
        """Every setpoint received so far: stamps [ns], p, v, a."""
        s = list(self.setpoints)
        return (np.array([x[0] for x in s], np.int64), np.array([x[1] for x in s]),
                np.array([x[2] for x in s]), np.array([x[3] for x in s]))


# ---------------------------------------------------------------------------- namespaces
class NetnsError(RuntimeError):
    """Network namespaces cannot be made here (the message says why)."""


def _ip(*args: str) -> None:
    import subprocess
    res = subprocess.run(["ip", *args], capture_output=True, text=True)
    if res.returncode:
        raise NetnsError(f"'ip {' '.join(args)}' failed: {res.stderr.strip()}")


@dataclass
class NetHosts:
    """Two network namespaces joined by one veth pair, nothing else: no default route, no
    other interface, so nothing is routed out. ``addresses`` (A, B) on a /30."""

    names: tuple[str, str]
    links: tuple[str, str]
    addresses: tuple[str, str]

    @classmethod
    def create(cls, tag: str, subnet: int) -> "NetHosts":
        """Make the namespaces (``ip netns add``), the veth pair and the addresses; removes
        what it made if a step fails."""
        import shutil
        if shutil.which("ip") is None:
            raise NetnsError("the 'ip' command (iproute2) is not installed")
        hosts = cls((f"{tag}a", f"{tag}b"), (f"{tag}va", f"{tag}vb"),
                    (f"10.213.{subnet}.1", f"10.213.{subnet}.2"))
        try:
            for ns in hosts.names:
                _ip("netns", "add", ns)
            _ip("link", "add", hosts.links[0], "type", "veth", "peer", "name", hosts.links[1])
            for ns, link, addr in zip(hosts.names, hosts.links, hosts.addresses):
                _ip("link", "set", link, "netns", ns)
                _ip("-n", ns, "addr", "add", f"{addr}/30", "dev", link)
                _ip("-n", ns, "link", "set", "lo", "up")
                _ip("-n", ns, "link", "set", link, "up")
        except NetnsError:
            hosts.remove()
            raise
        return hosts

    def remove(self) -> list[str]:
        """Delete both namespaces (the veth pair goes with them); returns what failed."""
        failed = []
        for ns in self.names:
            try:
                _ip("netns", "del", ns)
            except NetnsError as exc:
                if "No such file" not in str(exc):
                    failed.append(str(exc))
        return failed

    def link(self, up: bool) -> None:
        """Bring host A's end of the link up or down (the cut)."""
        _ip("-n", self.names[0], "link", "set", self.links[0], "up" if up else "down")

    def routes(self, i: int) -> str:
        """The routing table of host ``i``."""
        import subprocess
        return subprocess.run(["ip", "-n", self.names[i], "route"], capture_output=True,
                              text=True).stdout

    def command(self, i: int, argv: list[str]) -> list[str]:
        """``argv`` run inside host ``i``."""
        return ["ip", "netns", "exec", self.names[i], *argv]


def udp_only_profile(path: Path, peers: tuple[str, ...]) -> Path:
    """A Fast DDS XML profile: UDPv4 only (no shared memory, which would carry data across
    namespaces and hide a cut), builtin transports off, discovery by the initial peers
    (participant ids 0-31 on each: the ids are taken machine-wide, so other tests' nodes
    may hold the low ones). The interfaces are the hosts' addresses and loopback: traffic
    inside one host goes over loopback, so it goes on when that host's veth loses its
    carrier at the cut."""
    locators = "".join(f"<locator><udpv4><address>{a}</address></udpv4></locator>"
                       for a in peers)
    whitelist = "".join(f"<address>{a}</address>" for a in ("127.0.0.1", *peers))
    path.write_text(
        '<?xml version="1.0" encoding="UTF-8"?>\n'
        '<profiles xmlns="http://www.eprosima.com/XMLSchemas/fastRTPS_Profiles">\n'
        "  <transport_descriptors><transport_descriptor><transport_id>udp_only</transport_id>"
        "<type>UDPv4</type><maxInitialPeersRange>32</maxInitialPeersRange>"
        f"<interfaceWhiteList>{whitelist}</interfaceWhiteList>"
        "</transport_descriptor></transport_descriptors>\n"
        '  <participant profile_name="test_hosts" is_default_profile="true"><rtps>'
        "<userTransports><transport_id>udp_only</transport_id></userTransports>"
        "<useBuiltinTransports>false</useBuiltinTransports>"
        f"<builtin><initialPeersList>{locators}</initialPeersList></builtin>"
        "</rtps></participant>\n</profiles>\n")
    return path


class NetProbe:
    """A probe process (``python test/fuzz_harness.py probe``) driven over its stdin and
    stdout, one JSON line each way (see `probe_main`)."""

    def __init__(self, argv: list[str], env: dict[str, str], log: Path) -> None:
        import queue
        import subprocess
        import threading
        self.proc = subprocess.Popen(argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                     stderr=log.open("w"), text=True, env=env)
        self._lines: "queue.Queue[str]" = queue.Queue()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self) -> None:
        for line in self.proc.stdout:
            self._lines.put(line)

    def ask(self, cmd: str, timeout: float = 30.0, **args: Any) -> dict[str, Any]:
        """Send a command and wait for its answer."""
        import json
        import queue
        self.proc.stdin.write(json.dumps({"cmd": cmd, **args}) + "\n")
        self.proc.stdin.flush()
        try:
            answer = json.loads(self._lines.get(timeout=timeout + 5.0))
        except queue.Empty:
            raise AssertionError(f"probe: no answer to '{cmd}' within {timeout:g} s") from None
        if "error" in answer:
            raise AssertionError(f"probe: '{cmd}' failed: {answer['error']}")
        return answer

    def close(self) -> None:
        """Ask it to quit; kill it if it does not."""
        import subprocess
        try:
            self.ask("quit", timeout=5.0)
            self.proc.wait(10.0)
        except (AssertionError, OSError, ValueError, subprocess.TimeoutExpired):
            self.proc.kill()
            self.proc.wait()


def probe_main(argv: list[str]) -> int:
    """``probe``: an rclpy node recording ``setpoints``, ``adapter/decisions``,
    ``joint_states``, ``driver/position_command``, ``/rosout`` and ``/diagnostics`` with
    their arrival times (wall clock, shared by the namespaces), answering commands read
    from stdin, one JSON object a line: ``configure``, ``activate`` (retried for
    ``timeout`` s), ``trigger`` (``name``, retried while refused for ``retry`` s),
    ``wait_mode`` (``mode``, ``timeout``), ``stats``, ``dump`` (``path``: an .npz),
    ``quit``. Each answer is one JSON line."""
    import json
    import os
    import sys
    import threading

    import rclpy
    from diagnostic_msgs.msg import DiagnosticArray
    from rcl_interfaces.msg import Log
    from rclpy.executors import SingleThreadedExecutor
    from sensor_msgs.msg import JointState
    from std_msgs.msg import Float64MultiArray
    from std_srvs.srv import Trigger
    from trajectory_msgs.msg import JointTrajectory

    from adaptive_streamer.core import decision_record
    from adaptive_streamer.nodes.common import reliable_qos
    from adaptive_streamer.nodes.lifecycle_client import LifecycleClient

    del argv
    rclpy.init()
    node = rclpy_node("net_probe")
    rec: dict[str, list] = {"setpoints": [], "decisions": [], "joint_states": [],
                            "commands": [], "trips": []}
    diag: dict[str, dict[str, str]] = {}
    big = reliable_qos(1000)

    def on_setpoint(m: Any) -> None:
        pt = m.points[0]
        rec["setpoints"].append((m.header.stamp.sec * 10 ** 9 + m.header.stamp.nanosec,
                                 time.time(), list(pt.positions), list(pt.velocities),
                                 list(pt.accelerations)))

    def on_decision(m: Any) -> None:
        d = decision_record.decode(np.asarray(m.data))
        rec["decisions"].append((d.time, time.time(), d.mode, d.next_mode, d.verdict))

    node.create_subscription(JointTrajectory, "setpoints", on_setpoint, big)
    node.create_subscription(Float64MultiArray, "adapter/decisions", on_decision, big)
    node.create_subscription(JointState, "joint_states", lambda m: rec["joint_states"].append(
        (time.time(), list(m.position), list(m.velocity))), 100)
    node.create_subscription(Float64MultiArray, "driver/position_command",
                             lambda m: rec["commands"].append(time.time()), 100)
    node.create_subscription(Log, "/rosout", lambda m: rec["trips"].append(
        (time.time(), m.msg)) if m.msg.startswith("watchdog: ") else None, 100)
    node.create_subscription(DiagnosticArray, "/diagnostics", lambda m: diag.update(
        {s.name: {kv.key: kv.value for kv in s.values} | {"_message": s.message}
         for s in m.status}), 50)
    ex = SingleThreadedExecutor()
    ex.add_node(node)
    threading.Thread(target=ex.spin, daemon=True).start()
    adapter = LifecycleClient(node, "adapter", spun_elsewhere=True)
    triggers: dict[str, Any] = {}

    def trigger(name: str) -> tuple[bool, str]:
        if name not in triggers:
            triggers[name] = node.create_client(Trigger, name)
        client = triggers[name]
        if not client.wait_for_service(5.0):
            return False, f"service {name} not available"
        future = client.call_async(Trigger.Request())
        end = time.monotonic() + 5.0
        while not future.done() and time.monotonic() < end:
            time.sleep(0.01)
        return (future.result().success, future.result().message) if future.done() else (
            False, f"no answer from {name}")

    def mode() -> str:
        return rec["decisions"][-1][3] if rec["decisions"] else ""

    def handle(req: dict[str, Any]) -> dict[str, Any]:
        cmd = req["cmd"]
        timeout = float(req.get("timeout", 30.0))
        if cmd == "configure":
            return {"ok": adapter.wait(timeout) and adapter.configure(timeout)}
        if cmd == "activate":
            end = time.monotonic() + timeout
            while time.monotonic() < end:
                if adapter.activate():
                    return {"ok": True}
                time.sleep(0.5)
            return {"ok": False}
        if cmd == "trigger":
            end = time.monotonic() + float(req.get("retry", 0.0))
            ok, msg = trigger(req["name"])
            refusals = []
            while not ok and time.monotonic() < end:
                refusals.append(msg)
                time.sleep(0.2)
                ok, msg = trigger(req["name"])
            return {"ok": ok, "message": msg, "refusals": refusals}
        if cmd == "wait_mode":
            end = time.monotonic() + timeout
            while mode() != req["mode"] and time.monotonic() < end:
                time.sleep(0.02)
            return {"ok": mode() == req["mode"], "mode": mode()}
        if cmd == "quit":
            return {"ok": True}
        if cmd == "stats":
            return {"counts": {k: len(v) for k, v in rec.items()}, "mode": mode(),
                    "trips": list(rec["trips"]), "diagnostics": dict(diag),
                    "last": {k: (v[-1][1] if k in ("setpoints", "decisions") else
                                 v[-1][0] if k in ("joint_states", "trips") else v[-1])
                             if v else None for k, v in rec.items()}}
        if cmd == "dump":
            sp, js = list(rec["setpoints"]), list(rec["joint_states"])
            dec = list(rec["decisions"])
            np.savez(req["path"],
                     sp_stamp_ns=np.array([s[0] for s in sp], np.int64),
                     sp_arrival=np.array([s[1] for s in sp]),
                     sp_p=np.array([s[2] for s in sp]), sp_v=np.array([s[3] for s in sp]),
                     sp_a=np.array([s[4] for s in sp]),
                     js_arrival=np.array([s[0] for s in js]),
                     js_p=np.array([s[1] for s in js]), js_v=np.array([s[2] for s in js]),
                     dec_time=np.array([d[0] for d in dec]),
                     dec_arrival=np.array([d[1] for d in dec]),
                     dec_next_mode=np.array([d[3] for d in dec]),
                     commands=np.array(rec["commands"]))
            return {"ok": True}
        raise ValueError(f"unknown command {cmd!r}")

    for line in sys.stdin:
        req = json.loads(line)
        try:
            answer = handle(req)
        except Exception as exc:  # report to the test, keep serving
            answer = {"error": f"{type(exc).__name__}: {exc}"}
        print(json.dumps(answer), flush=True)
        if req["cmd"] == "quit":
            break
    ex.shutdown(timeout_sec=2.0)
    node.destroy_node()
    rclpy.shutdown()
    sys.stdout.flush()
    os._exit(0)   # no interpreter teardown racing the DDS threads ("terminate called ...")


if __name__ == "__main__":
    import sys
    if sys.argv[1:2] != ["probe"]:
        print("usage: python test/fuzz_harness.py probe", file=sys.stderr)
        raise SystemExit(2)
    raise SystemExit(probe_main(sys.argv[2:]))
