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
