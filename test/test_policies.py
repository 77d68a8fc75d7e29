# SPDX-License-Identifier: Apache-2.0
"""The four policy kinds on real onnxruntime sessions over real .onnx files (built here with
onnx.helper from numpy weights), checked against onnx.reference and closed-form results."""
import math
import shutil
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.policies import (LinearFeedbackPolicy, OnnxPolicy, PolicyError,
                                             PolicyInputs, RunningConfig, TrackerPolicy,
                                             load_card, load_policy, neutral_inputs,
                                             policy_for_kind)
from adaptive_streamer.core.segment import MotionState, integrate

DATA = Path(__file__).parent / "data" / "policies"
JOINTS7 = tuple(f"j{i}" for i in range(1, 8))
LIMITS7 = JointLimits.from_file(DATA / "limits7.yaml")
OBS7 = 7 * 3 + 35 + 35 + 14 + 4 + 7  # = 116, size of the mlp7 card's observation


# ---------------------------------------------------------------------------- model builders
def _tensor_type(dtype) -> int:
    return TensorProto.DOUBLE if np.dtype(dtype) == np.float64 else TensorProto.FLOAT


def make_mlp(path: Path, n_in: int, n_out: int, hidden=(64, 64), seed: int = 0,
             in_shape=None, out_shape=None, dtype=np.float32, input_name="obs",
             output_name="action", final="Tanh") -> Path:
    """A tanh MLP (``hidden`` layer widths) from seeded numpy weights, saved at ``path``.

    ``in_shape``/``out_shape`` default to ``[1, n_in]`` / ``[1, n_out]`` (a string is a
    dynamic dimension); ``final`` is the output activation (None for linear)."""
    rng = np.random.default_rng(seed)
    sizes = [n_in, *hidden, n_out]
    inits, nodes, x = [], [], input_name
    for k, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
        w = (rng.standard_normal((a, b)) / math.sqrt(a)).astype(dtype)
        bias = (0.1 * rng.standard_normal(b)).astype(dtype)
        inits += [numpy_helper.from_array(w, f"W{k}"), numpy_helper.from_array(bias, f"b{k}")]
        last = k == len(sizes) - 2
        nodes += [helper.make_node("MatMul", [x, f"W{k}"], [f"m{k}"]),
                  helper.make_node("Add", [f"m{k}", f"b{k}"], [f"z{k}"])]
        x = f"z{k}"
        act = final if last else "Tanh"
        if act:
            out = output_name if last else f"h{k}"
            nodes.append(helper.make_node(act, [x], [out]))
            x = out
    if x != output_name:
        nodes.append(helper.make_node("Identity", [x], [output_name]))
    in_shape = in_shape or [1, n_in]
    out_shape = out_shape or [1, n_out]
    graph = helper.make_graph(
        nodes, "mlp", [helper.make_tensor_value_info(input_name, _tensor_type(dtype), in_shape)],
        [helper.make_tensor_value_info(output_name, _tensor_type(dtype), out_shape)], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)
    onnx.save(model, str(path))
    return path


def make_sqrt_linear(path: Path, n_in: int, n_out: int, bias: float) -> Path:
    """``action = sqrt(obs[:, :n_out] + bias)``: NaN wherever ``obs + bias < 0``."""
    w = np.zeros((n_in, n_out), np.float32)
    w[:n_out, :n_out] = np.eye(n_out)
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["obs", "W"], ["m"]),
         helper.make_node("Add", ["m", "b"], ["z"]), helper.make_node("Sqrt", ["z"], ["action"])],
        "sqrt", [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, n_in])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, n_out])],
        [numpy_helper.from_array(w, "W"),
         numpy_helper.from_array(np.full(n_out, bias, np.float32), "b")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.save(model, str(path))
    return path


def make_data_dependent(path: Path, n_in: int, n_out: int) -> Path:
    """``action = Compress(obs @ W, all true, axis 1)``: an output shape that is only known
    when run (shape inference cannot size a Compress)."""
    w = np.ones((n_in, n_out), np.float32) / n_in
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["obs", "W"], ["m"]),
         helper.make_node("Compress", ["m", "keep"], ["action"], axis=1)],
        "compress", [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, n_in])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, ["b", "n"])],
        [numpy_helper.from_array(w, "W"), numpy_helper.from_array(np.ones(n_out, bool), "keep")])
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), str(path))
    return path


def make_two_inputs(path: Path, n: int) -> Path:
    """``action = a + b`` with two float inputs."""
    graph = helper.make_graph(
        [helper.make_node("Add", ["a", "b"], ["action"])], "two",
        [helper.make_tensor_value_info(x, TensorProto.FLOAT, [1, n]) for x in "ab"],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, n])])
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), str(path))
    return path


# ---------------------------------------------------------------------------- fixtures
@pytest.fixture
def cards(tmp_path) -> Path:
    """The committed test cards copied to a fresh folder, with mlp7.onnx (2x64) written."""
    folder = tmp_path / "policies"
    shutil.copytree(DATA, folder)
    make_mlp(folder / "mlp7.onnx", OBS7, 7)
    return folder


def running7(horizon=5, features=("edge_offset", "edge_angle"), period=0.05) -> RunningConfig:
    return RunningConfig(JOINTS7, period, LIMITS7, horizon, features)


def random_inputs(rng, horizon=5, features=("edge_angle", "edge_offset")) -> PolicyInputs:
    """Random but plausible 7-joint inputs (feedback in a different order from the card)."""
    p = rng.uniform(-1.0, 1.0, 7) + np.array([0, 0, 0, -1.2, 0, 1.3, 0])
    ref = p + np.cumsum(rng.uniform(-0.02, 0.02, (horizon, 7)), axis=0)
    valid = rng.random(len(features)) > 0.3
    values = np.where(valid, rng.uniform(-0.01, 0.01, len(features)), np.nan)
    return PolicyInputs(float(rng.uniform(0, 10)),
                        MotionState(p, rng.uniform(-1, 1, 7), rng.uniform(-3, 3, 7)),
                        ref, rng.uniform(-1, 1, (horizon, 7)), rng.uniform(-3, 3, (horizon, 7)),
                        FeatureVector(tuple(features), values, valid, 1.0),
                        rng.uniform(-1, 1, 7))


def with_model_card(folder: Path, model: Path, **onnx_options) -> Path:
    """A copy of the mlp7 card pointing at ``model`` (and with ``onnx`` options)."""
    text = (folder / "mlp7.card.yaml").read_text().replace("model: mlp7.onnx",
                                                            f"model: {model.name}")
    opts = ", ".join(f"{k}: {v}" for k, v in onnx_options.items())
    text = text.replace("onnx: {input: obs, output: action, intra_op_threads: 1}",
                        f"onnx: {{{opts}}}")
    card = folder / f"{model.stem}.card.yaml"
    card.write_text(text)
    return card


# ---------------------------------------------------------------------------- onnx
def test_onnx_mlp_matches_the_onnx_reference_evaluator(cards):
    policy = load_policy(cards / "mlp7.card.yaml", running7())
    assert isinstance(policy, OnnxPolicy)
    assert policy.action_meaning == "normalised"
    assert policy.needs_feedback == ("edge_offset", "edge_angle")
    # Reference: onnx.reference.ReferenceEvaluator (the ONNX project's pure-numpy
    # implementation of the operator specification) on the same model and observation.
    reference = ReferenceEvaluator(str(cards / "mlp7.onnx"))
    layout = load_card(cards / "mlp7.card.yaml").observation_layout()
    rng = np.random.default_rng(1)
    for _ in range(20):
        inp = random_inputs(rng)
        action = policy.act(inp)
        expected = reference.run(None, {"obs": layout.build(inp)[None, :]})[0]
        assert action.dtype == np.float64 and action.shape == (7,)
        np.testing.assert_allclose(action, expected[0], rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("in_shape, out_shape", [
    ([OBS7], [7]), (["batch", OBS7], ["batch", 7]), ([1, OBS7], [1, "n"])])
def test_onnx_accepts_flat_and_batched_shapes(cards, in_shape, out_shape):
    model = make_mlp(cards / "shaped.onnx", OBS7, 7, hidden=(16,), seed=3,
                     in_shape=in_shape, out_shape=out_shape, final=None)
    policy = load_policy(with_model_card(cards, model), running7())
    reference = ReferenceEvaluator(str(model))  # onnx.reference, as above
    inp = random_inputs(np.random.default_rng(2))
    obs = policy.card.observation_layout().build(inp)
    feed = obs if len(in_shape) == 1 else obs[None, :]
    np.testing.assert_allclose(policy.act(inp), reference.run(None, {"obs": feed})[0].reshape(-1),
                               rtol=1e-5, atol=1e-6)


def test_onnx_is_deterministic_across_calls_and_sessions(cards):
    a = load_policy(cards / "mlp7.card.yaml", running7())
    b = load_policy(cards / "mlp7.card.yaml", running7())
    inp = random_inputs(np.random.default_rng(5))
    first = a.act(inp)
    a.act(random_inputs(np.random.default_rng(6)))
    np.testing.assert_array_equal(a.act(inp), first)
    np.testing.assert_array_equal(b.act(inp), first)


def test_onnx_action_meaning_comes_from_the_card(cards):
    card = cards / "mlp7.card.yaml"
    card.write_text(card.read_text().replace("action: normalised", "action: acceleration"))
    assert load_policy(card, running7()).action_meaning == "acceleration"


def test_observation_size_mismatch_shows_expected_and_found(cards):
    model = make_mlp(cards / "small.onnx", OBS7 - 2, 7, hidden=(8,))
    with pytest.raises(PolicyError) as err:
        load_policy(with_model_card(cards, model), running7())
    text = str(err.value)
    assert f"input 'obs': expected float32 of shape [{OBS7}] or [1, {OBS7}]" in text
    assert f"found float32 [1, {OBS7 - 2}]" in text
    assert "joint_position [0:7]" in text and "previous_action [109:116]" in text


def test_float64_model_input_is_refused(cards):
    model = make_mlp(cards / "double.onnx", OBS7, 7, hidden=(8,), dtype=np.float64)
    with pytest.raises(PolicyError, match=rf"input 'obs': expected float32 .* found float64 "
                                          rf"\[1, {OBS7}\]"):
        load_policy(with_model_card(cards, model), running7())


def test_wrong_static_output_shape_is_refused(cards):
    model = make_mlp(cards / "five.onnx", OBS7, 5, hidden=(8,))
    with pytest.raises(PolicyError, match=r"output 'action': expected float32 of shape \[7\] or "
                                          r"\[1, 7\] .* found float32 \[1, 5\]"):
        load_policy(with_model_card(cards, model), running7())


def test_wrong_output_shape_found_when_run_is_refused(cards):
    model = make_data_dependent(cards / "dyn.onnx", OBS7, 6)
    with pytest.raises(PolicyError, match=r"found float32 \[1, 6\] when run"):
        load_policy(with_model_card(cards, model), running7())


def test_models_with_two_inputs_or_unknown_names_are_refused(cards):
    two = make_two_inputs(cards / "two.onnx", OBS7)
    with pytest.raises(PolicyError, match=r"has 2 inputs; name the one to use .*onnx.input.*"
                                          r"found inputs: a float32 \[1, 116\], b float32"):
        load_policy(with_model_card(cards, two), running7())
    with pytest.raises(PolicyError, match="must have exactly one input"):
        load_policy(with_model_card(cards, two, input="a"), running7())
    mlp = make_mlp(cards / "named.onnx", OBS7, 7, hidden=(8,))
    with pytest.raises(PolicyError, match="no output named 'act' .*outputs: action float32"):
        load_policy(with_model_card(cards, mlp, output="act"), running7())


def test_a_file_that_is_not_onnx_is_refused(cards):
    (cards / "junk.onnx").write_bytes(b"this is not a protobuf")
    with pytest.raises(PolicyError, match="junk.onnx'?: onnxruntime cannot load it"):
        load_policy(with_model_card(cards, cards / "junk.onnx"), running7())


def test_nan_output_passes_through_to_the_cycle(cards):
    model = make_sqrt_linear(cards / "sqrt.onnx", OBS7, 7, bias=1.0)
    policy = load_policy(with_model_card(cards, model), running7())
    inp = neutral_inputs(running7())
    # j1 1 rad below its lower limit (-2.71): joint_position obs[0] < -1, so sqrt(obs + 1) is NaN
    low = inp.state.position.copy()
    low[0] = -2.71 - 1.0
    action = policy.act(PolicyInputs(inp.time, MotionState(low, inp.state.velocity,
                                                           inp.state.acceleration),
                                     inp.ref_positions, inp.ref_velocities,
                                     inp.ref_accelerations, inp.feedback, inp.previous_action))
    assert math.isnan(action[0]) and np.all(np.isfinite(action[1:]))


def test_non_finite_test_inference_is_refused_at_load(cards):
    model = make_sqrt_linear(cards / "bad.onnx", OBS7, 7, bias=-1.0)
    with pytest.raises(PolicyError, match="test inference on a neutral input .* non-finite"):
        load_policy(with_model_card(cards, model), running7())


def test_mlp_without_feedback_received(cards):
    policy = load_policy(cards / "mlp7.card.yaml", running7())
    inp = random_inputs(np.random.default_rng(9))
    no_fb = PolicyInputs(inp.time, inp.state, inp.ref_positions, inp.ref_velocities,
                         inp.ref_accelerations, None, inp.previous_action)
    assert np.all(np.isfinite(policy.act(no_fb)))


# ---------------------------------------------------------------------------- tracker
def tracker_gains(period=0.05):
    card = policy_for_kind("tracker", running7(period=period)).card
    return card.gains.kp[0], card.gains.kd[0]


def test_tracker_closed_form_satisfies_the_implicit_tracking_law(cards):
    policy = load_policy(cards / "edge7.card.yaml", running7())
    tracker = TrackerPolicy(policy.card)
    T, g = policy.card.decision_period, policy.card.gains
    rng = np.random.default_rng(4)
    for _ in range(20):
        inp = random_inputs(rng)
        u = tracker.act(inp)
        # the predicted state one period ahead, from the constant-jerk segment
        nxt = integrate(*inp.state, u, T)
        rhs = (g.feedforward * inp.ref_accelerations[1]
               + g.kp * (inp.ref_positions[1] - nxt.position)
               + g.kd * (inp.ref_velocities[1] - nxt.velocity))
        np.testing.assert_allclose(u, rhs, rtol=1e-12, atol=1e-9)


def closed_loop_matrix(kp: float, kd: float, T: float) -> np.ndarray:
    """Error dynamics of the tracker on the discretised joint (state p, v, a; decision a').

    Plant from the constant-jerk segment: p' = p + T v + T^2 (2a + u)/6, v' = v + T (a + u)/2,
    a' = u (Biagiotti & Melchiorri 2008, ch. 3, from memory). For a reference generated by
    the same model the error obeys e' = A e + B d, and the law gives d = -K (A e + B d)."""
    A = np.array([[1.0, T, T * T / 3.0], [0.0, 1.0, T / 2.0], [0.0, 0.0, 0.0]])
    B = np.array([T * T / 6.0, T / 2.0, 1.0])
    K = np.array([kp, kd, 0.0])
    return (np.eye(3) - np.outer(B, K) / (1.0 + K @ B)) @ A


@pytest.mark.parametrize("period", [0.01, 0.05, 0.1])
def test_default_tracker_gains_give_a_stable_discrete_loop(period):
    kp, kd = tracker_gains(period)
    w = 2 * math.pi * 1.5 * 0.05 / period
    assert kp == pytest.approx(w * w) and kd == pytest.approx(2 * w)  # critically damped pair
    roots = np.roots(np.poly(closed_loop_matrix(kp, kd, period)))
    # discrete-time stability, common practice: every root of the closed-loop characteristic
    # polynomial strictly inside the unit circle
    assert np.all(np.abs(roots) < 1.0)
    assert np.max(np.abs(roots)) < 0.8  # and well inside: no slow creeping mode


def test_tracker_converges_on_a_constant_velocity_reference():
    running = running7(horizon=3, features=())
    policy = policy_for_kind("tracker", running)
    T, n, V = 0.05, 7, np.linspace(-0.3, 0.3, 7)
    p0 = neutral_inputs(running).state.position
    state = MotionState(p0 + 0.05, np.zeros(n), np.zeros(n))
    errors = []
    for k in range(160):
        t = k * T + T * np.arange(3)[:, None]
        inp = PolicyInputs(k * T, state, p0 + V * t, np.tile(V, (3, 1)), np.zeros((3, n)), None,
                           np.zeros(n))
        u = policy.act(inp)
        state = integrate(*state, u, T)  # the double integrator driven by a' = u
        errors.append(state.position - (p0 + V * (k + 1) * T))
    e = np.array(errors)  # signed position error per step and joint
    assert np.max(np.abs(e[-1])) < 1e-9 and np.max(np.abs(e[0])) > 0.04
    # the sampled error obeys the recurrence of the closed-loop characteristic polynomial
    # (Cayley-Hamilton), the polynomial whose roots (numpy.roots) the stability test checks
    kp, kd = tracker_gains()
    c = np.poly(closed_loop_matrix(kp, kd, T))
    residual = c[0] * e[3:20] + c[1] * e[2:19] + c[2] * e[1:18] + c[3] * e[0:17]
    assert np.max(np.abs(residual)) < 1e-12


def test_tracker_on_the_reference_stays_on_it():
    running = running7(horizon=2, features=())
    policy = policy_for_kind("tracker", running, kp=50.0, kd=[10.0] * 7)
    p = neutral_inputs(running).state.position
    a_ref = np.full(7, 0.8)
    state = MotionState(p, np.full(7, 0.2), a_ref)  # reference: constant acceleration
    ref = integrate(*state, a_ref, 0.05)
    inp = PolicyInputs(0.0, state, np.stack([p, ref.position]),
                       np.stack([state.velocity, ref.velocity]), np.stack([a_ref, a_ref]),
                       None, np.zeros(7))
    np.testing.assert_allclose(policy.act(inp), a_ref, rtol=1e-12)


# ---------------------------------------------------------------------------- linear feedback
def test_linear_feedback_adds_the_gain_matrix_times_valid_features(cards):
    policy = load_policy(cards / "edge7.card.yaml", running7())
    assert isinstance(policy, LinearFeedbackPolicy)
    assert policy.needs_feedback == ("edge_offset", "edge_angle")
    tracker = TrackerPolicy(policy.card)
    inp = random_inputs(np.random.default_rng(8))
    G = policy.card.feedback_gain.matrix
    for values, valid, expected in [
            ([0.02, 0.004], [True, True], G @ [0.004, 0.02]),   # angle, offset by name
            ([np.nan, 0.004], [False, True], G @ [0.004, 0.0]),  # invalid angle -> 0
    ]:
        fb = FeatureVector(("edge_angle", "edge_offset"), np.array(values), np.array(valid), 1.0)
        with_fb = PolicyInputs(inp.time, inp.state, inp.ref_positions, inp.ref_velocities,
                               inp.ref_accelerations, fb, inp.previous_action)
        np.testing.assert_allclose(policy.act(with_fb) - tracker.act(with_fb), expected,
                                   rtol=1e-12, atol=1e-12)
    none = PolicyInputs(inp.time, inp.state, inp.ref_positions, inp.ref_velocities,
                        inp.ref_accelerations, None, inp.previous_action)
    np.testing.assert_array_equal(policy.act(none), tracker.act(none))


# ---------------------------------------------------------------------------- hold, built-ins
def test_hold_asks_for_braking(cards):
    limits3 = LIMITS7.subset(["j1", "j2", "j3"])
    policy = load_policy(cards / "hold3.card.yaml", RunningConfig(("j1", "j2", "j3"), 0.05,
                                                                  limits3, 1))
    assert policy.action_meaning == "brake" and policy.needs_feedback == ()
    assert policy.act(neutral_inputs(RunningConfig(("j1", "j2", "j3"), 0.05, limits3, 1))
                      ).tolist() == [0.0, 0.0, 0.0]


def test_built_in_kinds(cards):
    tracker = policy_for_kind("tracker", running7())
    assert tracker.action_meaning == "acceleration" and tracker.card.source.startswith("built-in")
    assert policy_for_kind("hold", running7()).action_meaning == "brake"
    with pytest.raises(PolicyError, match="kind 'onnx' needs a policy card; the built-in kinds "
                                          "are tracker, hold"):
        policy_for_kind("onnx", running7())
    with pytest.raises(PolicyError, match="built-in 'hold' policy takes no gains"):
        policy_for_kind("hold", running7(), kp=1.0)
    with pytest.raises(PolicyError, match=r"gains.kd: expected one number or 7"):
        policy_for_kind("tracker", running7(), kd=[1.0, 2.0])


def test_tracker_needs_two_reference_points(cards):
    with pytest.raises(PolicyError, match="reads 2 reference points per decision, the adapter "
                                          r"provides 1 \(horizon\)"):
        policy_for_kind("tracker", running7(horizon=1))
