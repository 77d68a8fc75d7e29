# SPDX-License-Identifier: Apache-2.0
"""The decision cycle (ROS-free): determinism, approach -> following, stop -> stopped at
rest, late decisions, policy faults, deviation, swaps, limit transitions, decision records,
and the braking property.

External references: every committed segment is checked with the analytic segment checker
of test/oracle_lp.py (exact extrema of the constant-jerk segment, validated against scipy
HiGHS in test_oracle_lp.py); stopping times against ruckig's time-optimal jerk-limited stop
(PyPI; a lower bound on any stop); decision records are compared field by field.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import onnx
import pytest
import yaml
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper
from ruckig import ControlInterface, InputParameter, Result, Ruckig, Trajectory

import oracle_lp as o
from adaptive_streamer.core import decision_record
from adaptive_streamer.core.cycle import MODES, CycleConfig, CycleError, DecisionCycle
from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limit_stage import LimitStage
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.playback import Playback
from adaptive_streamer.core.policies import RunningConfig, load_policy, policy_for_kind
from adaptive_streamer.core.reference import ReferenceTrajectory
from adaptive_streamer.core.segment import MotionState, integrate
from adaptive_streamer.core.session import make_stages
from adaptive_streamer.core.watchdog import Watchdog, WatchdogConfig

REPO = Path(__file__).resolve().parents[1]
LIMITS_FILE = REPO / "config" / "demo" / "limits.yaml"
LIMITS = JointLimits.from_file(LIMITS_FILE)
NAMES = LIMITS.names
N = len(NAMES)
T = 0.05  # decision period, common practice
P0 = np.array([-0.312, 0.725, 0.340, 0.0, 0.506, -1.883])
AMP = np.array([0.30, -0.20, 0.25, 0.40, -0.30, 0.50])
T0 = 1_796_000_000.0
FEATURES = ("edge_offset", "edge_angle")
TOL = 1e-9
MAX_LATE_PERIODS = 4   # as test_limit_stage_braking.py


def reference(lap: float = 3.0) -> ReferenceTrajectory:
    t = np.arange(0.0, lap + 1e-9, 0.01)
    p = P0 + np.outer(0.5 * (1.0 - np.cos(2 * np.pi * t / lap)), AMP)
    return ReferenceTrajectory(NAMES, t, p, ends="periodic")


def running() -> RunningConfig:
    return RunningConfig(NAMES, T, LIMITS, 10, FEATURES)


def approach_policy(run: RunningConfig):
    w = 8.0  # as the adapter: w = 2 approach_bandwidth (4 rad/s)
    return policy_for_kind("tracker", run, kp=(w / 2) ** 2, kd=w)


def make_cycle(policy, wd: WatchdogConfig | None = None) -> DecisionCycle:
    run = running()
    stage, approach_stage = make_stages(LIMITS, T, 1.0, 0.3)
    return DecisionCycle(stage, approach_stage, policy, approach_policy(run),
                         Watchdog(wd or WatchdogConfig(), NAMES), CycleConfig())


def write_mlp(folder: Path) -> Path:
    """A 2x64 tanh MLP card (normalised actions) with seeded weights, via onnx.helper."""
    obs = ["joint_position", "joint_velocity", "joint_acceleration",
           {"block": "reference_position", "horizon": 5, "scale": 0.1},
           {"block": "reference_velocity", "horizon": 5},
           {"block": "feedback", "features": list(FEATURES), "scale": [0.005, 0.02]},
           "previous_action"]
    size = 3 * N + 10 * N + 4 + N
    rng = np.random.default_rng(0)
    sizes, nodes, inits, x = [size, 64, 64, N], [], [], "obs"
    for k, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
        inits += [numpy_helper.from_array((0.3 * rng.standard_normal((a, b)) / math.sqrt(a))
                                          .astype(np.float32), f"W{k}")]
        nodes += [helper.make_node("MatMul", [x, f"W{k}"], [f"m{k}"]),
                  helper.make_node("Tanh", [f"m{k}"], ["action" if k == 2 else f"h{k}"])]
        x = f"h{k}"
    graph = helper.make_graph(nodes, "mlp",
                              [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, size])],
                              [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, N])],
                              inits)
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]),
              str(folder / "mlp.onnx"))
    card = {"policy_card": 1, "name": "mlp", "kind": "onnx", "joints": list(NAMES),
            "decision_period": T, "limits": str(LIMITS_FILE), "model": "mlp.onnx",
            "observation": obs, "action": "normalised"}
    path = folder / "mlp.card.yaml"
    path.write_text(yaml.safe_dump(card))
    return path


def edge_card(folder: Path) -> Path:
    matrix = [[0.0, 0.0] for _ in NAMES]
    matrix[1] = [300.0, 0.0]
    card = {"policy_card": 1, "name": "edge", "kind": "linear_feedback", "joints": list(NAMES),
            "decision_period": T, "limits": str(LIMITS_FILE),
            "feedback_gain": {"features": list(FEATURES), "matrix": matrix}}
    path = folder / "edge.card.yaml"
    path.write_text(yaml.safe_dump(card))
    return path


def check_segment(d, limits: JointLimits = LIMITS, scale: float = 1.0) -> float:
    """Worst normalised violation of the committed segment (oracle_lp, <= 0 is fine)."""
    p, v, a = d.state
    return o.segment_violation(p, v, a, d.u, T, limits.position_min, limits.position_max,
                               limits.velocity_max * scale, limits.acceleration_max * scale,
                               limits.jerk_max * scale)


class Run:
    """Drives a cycle from a playback of the reference (offline, as replay does)."""

    def __init__(self, cycle: DecisionCycle, start: np.ndarray = P0, seed: int = 3,
                 playing: bool = True) -> None:
        self.cycle = cycle
        self.playback = Playback(reference(), T, 10, end_mode="loop")
        self.rng = np.random.default_rng(seed)
        cycle.begin(T0, MotionState(start.copy(), np.zeros(N), np.zeros(N)))
        cycle.commit_braking()  # the holding first segment, as the session does
        cycle.stats.overruns = 0
        if playing:
            self.playback.start(T0)
        self.offset = 0.0

    def step(self):
        c = self.cycle
        w = self.playback.window(c.t)
        if self.offset:
            w = w._replace(positions=w.positions + self.offset)
        fb = FeatureVector(FEATURES, self.rng.normal(0.0, 0.002, 2), np.ones(2, bool), c.t)
        return c.step(w, fb)


def ruckig_stop_time(v: float, a: float, V: float, A: float, J: float) -> float:
    """ruckig (PyPI): time-optimal stop to v = a = 0 (velocity interface)."""
    inp = InputParameter(1)
    inp.control_interface = ControlInterface.Velocity
    inp.current_position, inp.current_velocity, inp.current_acceleration = [0.0], [v], [a]
    inp.target_velocity, inp.target_acceleration = [0.0], [0.0]
    inp.max_velocity, inp.max_acceleration, inp.max_jerk = [V], [A], [J]
    traj = Trajectory(1)
    assert Ruckig(1).calculate(inp, traj) in (Result.Working, Result.Finished)
    return traj.duration


# ---------------------------------------------------------------------------- tests
@pytest.mark.parametrize("kind", ["onnx", "linear_feedback"])
def test_same_inputs_give_bit_identical_decisions(tmp_path, kind):
    card = write_mlp(tmp_path) if kind == "onnx" else edge_card(tmp_path)
    runs = [Run(make_cycle(load_policy(card, running()))) for _ in range(2)]
    records = [[], []]
    for _ in range(120):
        for k, r in enumerate(runs):
            d = r.step()
            vec = decision_record.encode(d).copy()
            vec[9] = 0.0  # policy compute time: a measurement, not a decision
            records[k].append(vec.tobytes())
    assert records[0] == records[1]
    modes = {decision_record.decode(np.frombuffer(b)).mode for b in records[0]}
    assert "following" in modes


def test_approach_hands_over_to_following_within_the_approach_limits():
    cycle = make_cycle(policy_for_kind("tracker", running()))
    start = P0 + np.array([0.2, -0.15, 0.1, 0.3, -0.2, 0.25])
    run = Run(cycle, start=start, playing=False)
    decisions = []
    while cycle.mode == "approaching" and len(decisions) < 400:
        decisions.append(run.step())
    assert cycle.mode == "following", f"no hand-over in {len(decisions)} decisions"
    worst = max(check_segment(d, scale=0.3) for d in decisions)
    assert worst <= TOL, worst   # the approach runs at approach_scale 0.3 (oracle_lp)
    last = decisions[-1]
    assert last.next_mode == "following" and last.mode == "approaching"
    end = integrate(*last.state, last.u, T)
    ref = run.playback.window(last.time).positions[0]
    assert np.all(np.abs(end.position - ref) <= CycleConfig().approach_tolerance)
    d = run.step()
    assert d.mode == "following" and np.all(np.isfinite(d.action))


def test_stop_reaches_rest_no_faster_than_time_optimal_and_stays_stopped():
    cycle = make_cycle(policy_for_kind("tracker", running()))
    run = Run(cycle)
    for _ in range(30):  # 1.5 s into the lap: moving
        d = run.step()
    v0, a0 = cycle.state.velocity.copy(), cycle.state.acceleration.copy()
    assert np.abs(v0).max() > 0.2
    cycle.request_stop()
    stop = []
    while cycle.mode != "stopped" and len(stop) < 100:
        stop.append(run.step())
    assert cycle.mode == "stopped" and cycle.at_rest
    assert max(check_segment(d) for d in stop) <= TOL
    assert all(d.mode == "stopping" for d in stop)
    t_opt = max(ruckig_stop_time(float(v0[i]), float(a0[i]), LIMITS.velocity_max[i],
                                 LIMITS.acceleration_max[i], LIMITS.jerk_max[i])
                for i in range(N))
    assert len(stop) * T >= t_opt - 1e-9                      # ruckig: a lower bound
    assert len(stop) * T <= t_opt + MAX_LATE_PERIODS * T
    rest = cycle.state.position.copy()
    for _ in range(10):
        d = run.step()
        assert d.mode == "stopped"
    np.testing.assert_array_equal(cycle.state.position, rest)
    cycle.reset()
    assert cycle.mode == "approaching"


def test_a_late_decision_is_replaced_by_braking():
    cycle = make_cycle(policy_for_kind("tracker", running()))
    run = Run(cycle)
    for _ in range(25):
        run.step()
    t, state = cycle.t, cycle.state
    w = run.playback.window(t)
    late = cycle.decide(w, None)
    braking = cycle.commit_braking()          # the stream could not wait
    assert braking.time == t and braking.message == "overrun"
    np.testing.assert_array_equal(braking.u, cycle.stage.braking(state))
    assert cycle.stats.overruns == 1 and cycle.t == t + T
    assert not cycle.commit(late)             # too late: refused, nothing changes
    assert cycle.t == t + T
    assert check_segment(braking) <= TOL
    d = run.step()                             # the next decision starts from the braking
    assert d.time == t + T
    np.testing.assert_array_equal(d.state.position, integrate(*state, braking.u, T).position)


class _NaN:
    action_meaning, needs_feedback = "acceleration", ()

    def __init__(self, card):
        self.card = card

    def reset(self):
        pass

    def act(self, inputs):
        return np.full(N, np.nan)


class _Inf(_NaN):
    def act(self, inputs):
        return np.full(N, np.inf)


class _WrongSize(_NaN):
    def act(self, inputs):
        return np.zeros(N + 1)


class _Raises(_NaN):
    def act(self, inputs):
        raise ZeroDivisionError("model blew up")


@pytest.mark.parametrize("cls, words", [(_NaN, "NaN or infinite"), (_Inf, "NaN or infinite"),
                                        (_WrongSize, "shape (7,), expected (6,)"),
                                        (_Raises, "ZeroDivisionError: model blew up")])
def test_policy_faults_become_a_controlled_stop(cls, words):
    good = policy_for_kind("tracker", running())
    cycle = make_cycle(good)
    run = Run(cycle)
    for _ in range(20):
        run.step()
    cycle.swap_policy(cls(good.card))
    d = run.step()
    assert d.verdict == "policy_fault" and words in d.message and d.next_mode == "stopping"
    assert cycle.watchdog.trip.kind == "policy_fault"
    stop = [d]
    while cycle.mode != "stopped" and len(stop) < 100:
        stop.append(run.step())
    assert cycle.at_rest and max(check_segment(x) for x in stop) <= TOL


def test_deviation_verdict_stops():
    cycle = make_cycle(policy_for_kind("tracker", running()))
    run = Run(cycle)
    for _ in range(20):
        run.step()
    run.offset = 0.1  # the reference jumps 0.1 rad
    d = run.step()
    assert d.verdict == "deviation" and "deviation_joint" in d.message
    assert d.deviation_max > 0.05 and cycle.mode == "stopping"


def test_swap_takes_effect_at_the_next_decision(tmp_path):
    cycle = make_cycle(policy_for_kind("tracker", running()))
    run = Run(cycle)
    for _ in range(20):
        run.step()
    edge = load_policy(edge_card(tmp_path), running())
    cycle.swap_policy(edge)
    assert cycle.policy is not edge     # not before the decision boundary
    run.step()
    assert cycle.policy is edge and cycle.stats.policy_swaps == 1


def test_limit_transition_brakes_until_the_plan_fits_then_switches():
    cycle = make_cycle(policy_for_kind("tracker", running()))
    run = Run(cycle)
    for _ in range(30):
        run.step()
    scale = 0.1
    stage, approach_stage = make_stages(LIMITS, T, scale, 0.3)
    assert not stage.evaluate(*cycle.state).viable.all()  # moving too fast for the new limits
    cycle.set_stages(stage, approach_stage)
    ds = [run.step() for _ in range(40)]
    assert cycle.stage is stage and cycle.stats.limit_transitions >= 1
    switched = next(i for i, d in enumerate(ds) if d.message != "limit transition")
    assert all(d.message == "limit transition" for d in ds[:switched])
    assert max(check_segment(d) for d in ds) <= TOL                  # old limits throughout
    assert max(check_segment(d, scale=scale) for d in ds[switched:]) <= TOL  # new ones after


def test_decide_before_begin_and_bad_horizon():
    cycle = make_cycle(policy_for_kind("tracker", running()))
    with pytest.raises(CycleError, match="before begin"):
        cycle.decide(None, None)
    with pytest.raises(CycleError, match="horizon"):
        DecisionCycle(cycle.stage, cycle.approach_stage, cycle.policy, cycle.approach,
                      cycle.watchdog, CycleConfig(horizon=1))


def test_decision_record_round_trip(tmp_path):
    cycle = make_cycle(load_policy(write_mlp(tmp_path), running()))
    run = Run(cycle)
    ds = [run.step() for _ in range(60)]
    cycle.request_stop()
    ds += [run.step() for _ in range(20)]
    ds.append(cycle.commit_braking())
    assert {d.mode for d in ds} >= {"following", "stopping"}
    for d in ds:
        back = decision_record.decode(decision_record.encode(d))
        for name in ("time", "mode", "window_stamp", "feedback_stamp", "viable", "verdict",
                     "policy_time", "deviation_max", "deviation_norm"):
            a, b = getattr(d, name), getattr(back, name)
            assert a == b or (isinstance(a, float) and math.isnan(a) and math.isnan(b)), name
        assert back.next_mode == (d.next_mode or d.mode)
        for name in ("action", "lo", "hi", "u"):
            np.testing.assert_array_equal(getattr(back, name), getattr(d, name))
        for x, y in zip(back.state, d.state):
            np.testing.assert_array_equal(x, y)
        assert back.message == ""


def test_decision_record_refusals():
    d = make_cycle(policy_for_kind("tracker", running()))
    d.begin(T0, MotionState(P0.copy(), np.zeros(N), np.zeros(N)))
    vec = decision_record.encode(d.commit_braking())
    with pytest.raises(decision_record.DecisionRecordError, match="too short"):
        decision_record.decode(vec[:5])
    bad = vec.copy()
    bad[0] = 2
    with pytest.raises(decision_record.DecisionRecordError, match="version"):
        decision_record.decode(bad)
    with pytest.raises(decision_record.DecisionRecordError, match="must hold"):
        decision_record.decode(vec[:-1])
    bad = vec.copy()
    bad[5] = len(MODES)
    with pytest.raises(decision_record.DecisionRecordError, match="unknown mode"):
        decision_record.decode(bad)


# ---------------------------------------------------------------------------- property
@st.composite
def limits_and_state(draw):
    V = draw(st.floats(0.5, 4.0))
    J = draw(st.floats(20.0, 400.0))
    Tp = draw(st.sampled_from([0.008, 0.02, 0.05]))
    A = draw(st.floats(2.0, 20.0))
    fv = draw(st.floats(-1.0, 1.0))
    fa = draw(st.floats(-1.0, 1.0))
    return V, A, J, Tp, fv, fa


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(limits_and_state())
def test_braking_property_reaches_rest_within_time_optimal_plus_a_few_periods(case):
    # Property over random limits and states (hypothesis): repeated LimitStage.braking +
    # integrate reaches rest with no violation (oracle_lp's exact segment checker), never
    # faster than ruckig's continuous time-optimal stop and at most a few periods slower.
    V, A, J, Tp, fv, fa = case
    lim = JointLimits(["q"], [-math.inf], [math.inf], [V], [A], [J], [False])
    stage = LimitStage(lim, Tp)
    p, v, a = np.zeros(1), np.array([fv * V]), np.array([fa * stage.acceleration_limit[0]])
    assume(stage.evaluate(p, v, a).viable.all())   # the property is about viable states
    t_opt = ruckig_stop_time(float(v[0]), float(a[0]), V, A, J)
    steps, k = None, 0
    limit_steps = int(math.ceil(t_opt / Tp)) + 40 * MAX_LATE_PERIODS
    while k < limit_steps:
        k += 1
        u = stage.braking((p, v, a))
        assert o.segment_violation(p[0], v[0], a[0], u[0], Tp, -math.inf, math.inf,
                                   V, A, J) <= TOL
        p, v, a = integrate(p, v, a, u, Tp)
        if abs(v[0]) <= 1e-9 * V and abs(a[0]) <= 1e-9 * A:
            steps = k
            break
    assert steps is not None, "did not reach rest"
    assert steps * Tp >= t_opt - 1e-9
    assert steps * Tp <= t_opt + MAX_LATE_PERIODS * Tp, (steps * Tp, t_opt)
