# SPDX-License-Identifier: Apache-2.0
"""The demo's fault policies built for a run (adaptive_streamer.demo.fault_policies), run
with real onnxruntime: the tracker base reproduces the tracker's closed form, the NaN
fault is NaN exactly while the reference moves, the slow fault is slow only then, and a
card built for other limits loads against them."""
import numpy as np
import onnx
import pytest

from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.policies import load_policy, policy_for_kind
from adaptive_streamer.core.policies.base import PolicyInputs, RunningConfig, neutral_inputs
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.demo.fault_policies import (NAN_THRESHOLD, default_gains,
                                                   write_fault_card)
from adaptive_streamer.share import demo_file

# invented 3-joint limits, deliberately unlike the demo's
LIMITS = JointLimits(["a", "b", "c"], [-1.9, -0.7, -2.6], [1.3, 2.2, 0.4], [0.83, 1.47, 0.61],
                     [3.1, 6.2, 2.3], [29.0, 71.0, 17.0])
PERIOD = 0.04


def running(limits=LIMITS, period=PERIOD) -> RunningConfig:
    return RunningConfig(limits.names, period, limits, 6, ())


def inputs(rng, run: RunningConfig, ref_speed: float) -> PolicyInputs:
    """Random state near the centre; the reference moving at ``ref_speed`` x v_max."""
    base = neutral_inputs(run)
    n, h = len(run.joints), run.horizon
    V = run.limits.velocity_max
    state = MotionState(base.state.position + rng.uniform(-0.2, 0.2, n),
                        rng.uniform(-0.5, 0.5, n) * V,
                        rng.uniform(-0.5, 0.5, n) * run.limits.acceleration_max)
    ref_v = np.tile(ref_speed * V, (h, 1))
    ref_p = base.ref_positions + rng.uniform(-0.05, 0.05, (h, n))
    ref_a = rng.uniform(-0.3, 0.3, (h, n)) * run.limits.acceleration_max
    return PolicyInputs(1.0, state, ref_p, ref_v, ref_a, None, np.zeros(n))


def test_fault_base_reproduces_the_tracker_closed_form(tmp_path):
    run = running()
    # the reference the ONNX tracker must match: the tracker policy (the closed form
    # in adaptive_streamer/core/policies/tracker.py, solved per joint)
    tracker = policy_for_kind("tracker", run)
    card = write_fault_card("nan_policy", run, default_gains(run), tmp_path)
    policy = load_policy(card, run)
    rng = np.random.default_rng(3)
    for _ in range(50):
        x = inputs(rng, run, 0.0)      # at rest: the NaN fault is its tracker base
        np.testing.assert_allclose(policy.act(x), tracker.act(x), rtol=2e-5, atol=2e-5)


def test_nan_fault_is_nan_exactly_while_the_reference_moves(tmp_path):
    run = running()
    policy = load_policy(write_fault_card("nan_policy", run, default_gains(run), tmp_path), run)
    rng = np.random.default_rng(4)
    assert np.all(np.isfinite(policy.act(inputs(rng, run, 0.5 * NAN_THRESHOLD))))
    assert np.all(np.isnan(policy.act(inputs(rng, run, 2.0 * NAN_THRESHOLD))))


def test_slow_fault_loops_only_while_the_reference_moves(tmp_path):
    run = running()
    card = write_fault_card("slow_policy", run, default_gains(run), tmp_path)
    policy = load_policy(card, run)
    tracker = policy_for_kind("tracker", run)
    rng = np.random.default_rng(5)
    for speed in (0.0, 0.2):    # the action is the tracker's either way
        x = inputs(rng, run, speed)
        np.testing.assert_allclose(policy.act(x), tracker.act(x), rtol=2e-5, atol=2e-5)
    # the long computation sits in the branch taken while moving (no timing asserted)
    graph = onnx.load(str(tmp_path / "slow_policy.onnx")).graph
    (branch,) = [n for n in graph.node if n.op_type == "If"]
    bodies = {a.name: a.g for a in branch.attribute}
    assert [n.op_type for n in bodies["then_branch"].node].count("Loop") == 1
    assert all(n.op_type != "Loop" for n in bodies["else_branch"].node)
    assert all(n.op_type != "Loop" for n in graph.node)


@pytest.mark.parametrize("fault", ["nan_policy", "slow_policy"])
def test_shipped_fault_cards_do_not_fit_other_limits_but_built_ones_do(tmp_path, fault):
    demo = JointLimits.from_file(demo_file("limits.yaml"))
    tight = JointLimits(demo.names, demo.position_min, demo.position_max,
                        0.6 * demo.velocity_max, 0.6 * demo.acceleration_max,
                        0.6 * demo.jerk_max)
    run = running(tight, 0.05)
    with pytest.raises(ValueError, match="limits differ"):
        load_policy(demo_file(f"faults/{fault}.yaml"), run)
    load_policy(write_fault_card(fault, run, default_gains(run), tmp_path), run)
