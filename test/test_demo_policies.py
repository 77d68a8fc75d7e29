# SPDX-License-Identifier: Apache-2.0
"""The demo's policy cards and ONNX models (config/demo/, config/demo/faults/): they load
against the demo adapter, the models agree with onnx.reference, the feedback gains move the
nozzle across the edge, and the fault models do what their cards say."""
import importlib.util
import math
import shutil
from pathlib import Path

import numpy as np
import onnx
import pytest
import yaml
from onnx.reference import ReferenceEvaluator

from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.policies import load_card, load_policy
from adaptive_streamer.core.policies.base import PolicyInputs, RunningConfig, neutral_inputs
from adaptive_streamer.core.reference_files import load_reference_file as load_reference
from adaptive_streamer.sim.arm import DEMO_ARM
from adaptive_streamer.sim.closed_loop import EDGE_FEATURES, run_closed_loop
from adaptive_streamer.sim.config import load_scenario
from adaptive_streamer.core.segment import MotionState

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "config" / "demo"
CARDS = ["policy_reference_only.yaml", "policy_feedback.yaml", "policy_edge.yaml",
         "faults/nan_policy.yaml", "faults/slow_policy.yaml"]


@pytest.fixture(scope="module")
def running() -> RunningConfig:
    """The demo adapter's configuration, from config/demo/params.yaml."""
    params = yaml.safe_load((DEMO / "params.yaml").read_text())["adapter"]["ros__parameters"]
    limits = JointLimits.from_file(DEMO / "limits.yaml")
    return RunningConfig(limits.names, params["decision_period"], limits, params["horizon"],
                         EDGE_FEATURES)


@pytest.fixture(scope="module")
def reference():
    return load_reference(DEMO / "reference.csv")


def cruise_inputs(reference, running, t: float, offset: float, angle: float,
                  velocity_scale: float = 1.0) -> PolicyInputs:
    """On the reference at time t (planned state = reference), with edge feedback."""
    T, h = running.decision_period, running.horizon
    p, v, a = reference.sample(t + T * np.arange(h))
    state = MotionState(p[0].copy(), velocity_scale * v[0], a[0].copy())
    fb = FeatureVector(EDGE_FEATURES, np.array([offset, angle]), np.ones(2, bool), t)
    return PolicyInputs(t, state, p, v, a, fb, np.zeros(len(running.joints)))


@pytest.mark.parametrize("name", CARDS)
def test_demo_cards_load_against_the_demo_adapter(running, name):
    policy = load_policy(DEMO / name, running)   # includes the neutral test inference
    assert policy.card.joints == running.joints
    assert set(policy.needs_feedback) <= set(EDGE_FEATURES)


def random_inputs(rng, reference, running) -> PolicyInputs:
    t = rng.uniform(0.0, reference.duration)
    x = cruise_inputs(reference, running, t, rng.uniform(-0.01, 0.01), rng.uniform(-0.03, 0.03))
    p, v, a = x.state
    n = len(p)
    state = MotionState(p + rng.normal(0, 2e-3, n), v + rng.normal(0, 1e-2, n),
                        a + rng.normal(0, 5e-2, n))
    valid = rng.random(2) > 0.2
    fb = FeatureVector(EDGE_FEATURES, np.where(valid, x.feedback.values, np.nan), valid, t)
    return PolicyInputs(t, state, x.ref_positions, x.ref_velocities, x.ref_accelerations, fb,
                        x.previous_action)


@pytest.mark.parametrize("name", ["policy_edge.yaml", "faults/nan_policy.yaml"])
def test_onnx_models_match_the_onnx_reference_evaluator(running, reference, name):
    # onnxruntime (through the policy) vs onnx.reference.ReferenceEvaluator, the ONNX
    # project's own Python implementation of the operator specifications
    policy = load_policy(DEMO / name, running)
    layout = policy.card.observation_layout()
    evaluator = ReferenceEvaluator(str(policy.card.model))
    rng = np.random.default_rng(5)
    for _ in range(40):
        x = random_inputs(rng, reference, running)
        got = policy.act(x)
        want = evaluator.run(None, {"obs": layout.build(x)[None]})[0][0]
        np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-6, equal_nan=True)


def numeric_position_jacobian(q: np.ndarray, h: float = 1e-6) -> np.ndarray:
    """d(nozzle position)/dq (3, n) by central differences of the forward kinematics."""
    cols = []
    for i in range(len(q)):
        dq = np.zeros(len(q))
        dq[i] = h
        cols.append((DEMO_ARM.forward(q + dq)[:3, 3] - DEMO_ARM.forward(q - dq)[:3, 3]) / (2 * h))
    return np.array(cols).T


def test_feedback_gains_move_the_nozzle_across_the_edge_only(reference):
    card = load_card(DEMO / "policy_feedback.yaml")
    g = card.feedback_gain
    assert g.features == EDGE_FEATURES
    q = reference.sample(np.array([reference.duration / 2]))[0][0]
    jac = numeric_position_jacobian(q)
    normal = np.r_[load_scenario(DEMO / "scenario.yaml").nominal_panel.nominal_normal, 0.0]
    for column, sign in ((g.matrix[:, 0], -1.0), (g.matrix[:, 1], 1.0)):
        move = jac @ column            # nozzle acceleration per unit feature [m/s^2]
        lateral = move @ normal
        assert sign * lateral > 0      # offset: back towards the edge; angle: along it
        assert np.linalg.norm(move - lateral * normal) < 1e-4 * abs(lateral)
    # orientation unchanged to first order: rotating joints' angular rates cancel
    w = DEMO_ARM.jacobian(q)[3:] @ g.matrix
    assert np.abs(w).max() < 1e-6 * np.abs(g.matrix).max()


def test_learned_model_agrees_with_the_feedback_card_at_cruise(running, reference):
    # the edge model's teacher is the feedback card with the angle feed-forward scheduled by
    # the nominal speed; at cruise speed both laws are the same
    edge = load_policy(DEMO / "policy_edge.yaml", running)
    feedback = load_policy(DEMO / "policy_feedback.yaml", running)
    sc = load_scenario(DEMO / "scenario.yaml")
    mid = reference.duration / 2
    for offset, angle in ((0.004, 0.02), (-0.006, -0.01), (0.0, 0.0)):
        x = cruise_inputs(reference, running, mid, offset, angle)
        speed = np.linalg.norm((DEMO_ARM.jacobian(x.ref_positions[1]) @ x.ref_velocities[1])[:3])
        assert speed == pytest.approx(sc.nominal_pass.cruise_speed, rel=1e-3)
        np.testing.assert_allclose(edge.act(x), feedback.act(x), atol=2e-3)


def test_nan_fault_is_finite_at_rest_and_nan_when_moving(running, reference):
    nan_policy = load_policy(DEMO / "faults/nan_policy.yaml", running)
    edge = load_policy(DEMO / "policy_edge.yaml", running)
    rest = neutral_inputs(running)
    np.testing.assert_array_equal(nan_policy.act(rest), edge.act(rest))
    moving = cruise_inputs(reference, running, reference.duration / 2, 0.001, 0.0)
    assert np.all(np.isnan(nan_policy.act(moving)))
    assert np.all(np.isfinite(edge.act(moving)))
    # the reference standing still at the pass start: finite, even while the arm corrects
    # sideways faster than the pass will move
    still = cruise_inputs(reference, running, 0.0, 0.004, 0.0)
    sideways = PolicyInputs(still.time, still.state._replace(velocity=0.1 * np.ones(6)),
                            still.ref_positions, still.ref_velocities, still.ref_accelerations,
                            still.feedback, still.previous_action)
    assert np.all(np.isfinite(nan_policy.act(sideways)))


def test_nan_fault_stops_the_closed_loop_smoothly():
    r = run_closed_loop(DEMO / "faults/nan_policy.yaml", 3)
    assert r.summary.trips[0] == "policy_fault"
    assert r.trips[0].time > r.pass_start
    assert r.summary.limit_usage.violations == 0
    assert r.decisions[-1].mode == "stopped"
    np.testing.assert_allclose(r.commanded.velocity[-1], 0.0, atol=1e-9)


def all_nodes(graph: onnx.GraphProto):
    """Every node of ``graph`` and of the subgraphs its nodes hold (If branches, Loop
    bodies)."""
    for nd in graph.node:
        yield nd
        for attr in nd.attribute:
            if attr.type == onnx.AttributeProto.GRAPH:
                yield from all_nodes(attr.g)


def test_slow_fault_computes_the_edge_action_through_a_long_loop(running, reference):
    card = load_card(DEMO / "faults/slow_policy.yaml")
    model = onnx.load(str(card.model))
    # the long loop sits in the branch an If node takes while the reference moves
    nodes = list(all_nodes(model.graph))
    loops = [nd for nd in nodes if nd.op_type == "Loop"]
    assert len(loops) == 1
    assert any(nd.op_type == "If" for nd in model.graph.node)
    steps = next(onnx.numpy_helper.to_array(t) for t in model.graph.initializer
                 if t.name == loops[0].input[0])
    draws = [nd for nd in nodes if nd.op_type == "RandomNormal"]
    size = next(a.ints for a in draws[0].attribute if a.name == "shape")
    flops = 2 * size[0] * size[1] * size[1] * int(steps)
    assert flops > 1e10       # work per inference, not a timing (timings: the build script)
    assert (DEMO / "faults/slow_policy.onnx").stat().st_size < 20_000
    slow = load_policy(DEMO / "faults/slow_policy.yaml", running)
    edge = load_policy(DEMO / "policy_edge.yaml", running)
    for x in (neutral_inputs(running),
              cruise_inputs(reference, running, reference.duration / 2, 0.002, 0.01)):
        np.testing.assert_array_equal(slow.act(x), edge.act(x))


def _script(name: str):
    spec = importlib.util.spec_from_file_location(name, ROOT / "scripts" / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_the_edge_model_is_rebuilt_reproducibly(tmp_path, running, reference):
    shutil.copy(DEMO / "limits.yaml", tmp_path / "limits.yaml")   # the cards name it
    build = _script("make_demo_policy")
    assert build.main(["--out", str(tmp_path), "--skip-check"]) == 0
    shipped = load_policy(DEMO / "policy_edge.yaml", running)
    rebuilt = load_policy(tmp_path / "policy_edge.yaml", running)
    rng = np.random.default_rng(11)
    for _ in range(20):
        x = random_inputs(rng, reference, running)
        # within the fit error (card: max 6e-4 rad/s^2); the bits may differ, since BLAS
        # thread counts change the summation order the L-BFGS fit sees
        np.testing.assert_allclose(rebuilt.act(x), shipped.act(x), atol=1e-3)
    for name in ("policy_feedback.yaml", "policy_reference_only.yaml"):
        assert (tmp_path / name).read_text() == (DEMO / name).read_text()
    assert math.isfinite(shipped.act(neutral_inputs(running)).sum())
