# SPDX-License-Identifier: Apache-2.0
"""The demo's fault policies as ONNX models, for any run's joints, limits and period.

Two wrappers turn a policy model into a fault (both keep its input and output names):

* `with_nan_when_moving`: the model's action, replaced by NaN on every joint while the
  reference moves (any joint's ``reference_velocity`` row 0, ``v_ref / v_max``, above
  `NAN_THRESHOLD`). Finite while the reference stands still, so the card loads (the load
  test inference is at rest); once the pass moves the cycle sees NaN: a ``policy_fault`` stop.
* `with_slow_loop`: the model's action plus, while the reference moves (the same test),
  0 times the sum of a long computation, a Loop of `SLOW_STEPS` products ``X <- tanh(X W)``
  of `SLOW_SIZE` x `SLOW_SIZE` float32 matrices drawn in the graph (RandomNormal with fixed
  seeds, so the file stays small; ``X0`` also depends on the observation so nothing can be
  folded at load): late decisions, then an ``overruns`` stop. At rest it is as fast as the
  model, so loading the card (test inference and warm-up runs at rest) takes no time from
  the other threads.

`tracker_model` is the base when the run's own policy cannot be wrapped: the tracking law
of `adaptive_streamer.core.policies.tracker` (its closed form, linear in the observation
`TRACKER_OBSERVATION`) as one MatMul, for the run's limits, period and gains.
`write_fault_card` writes such a fault model and its card into a folder (the demo's run
folder), for a `RunningConfig`; ``scripts/make_fault_policies.py`` wraps the demo's edge
model the same way for the shipped cards.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import onnx
import yaml
from onnx import TensorProto, helper, numpy_helper

from ..core.limits import JointLimits
from ..core.policies.base import RunningConfig
from ..core.policies.card import TrackerGains, default_natural_frequency

NAN_THRESHOLD = 0.005   # fraction of the velocity limit
SLOW_SIZE = 512         # matrix size of the slow model's products
SLOW_STEPS = 100        # products per inference (about 140 ms on one core of the build machine)
OPSET = 17
TRACKER_OBSERVATION: tuple[Any, ...] = (
    "joint_velocity", "joint_acceleration", {"block": "reference_position", "horizon": 2},
    {"block": "reference_velocity", "horizon": 2},
    {"block": "reference_acceleration", "horizon": 2})
FAULT_TEXT = {
    "nan_policy": ("NaN actions once the reference moves",
                   "Expected: a policy_fault stop as soon as the pass moves."),
    "slow_policy": ("a policy far slower than the decision period once the reference moves",
                    "Expected: late decisions, the stream brakes in their place, then an "
                    "overruns stop."),
}


def _finish(nodes: list, inits: list, name: str, inp: str, size: int, n: int,
            out: str) -> onnx.ModelProto:
    graph = helper.make_graph(
        nodes, name, [helper.make_tensor_value_info(inp, TensorProto.FLOAT, [1, size])],
        [helper.make_tensor_value_info(out, TensorProto.FLOAT, [1, n])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="adaptive_streamer demo fault policies")
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model


def _inner(model: onnx.ModelProto) -> tuple[list, list, str, str]:
    """Nodes and initialisers of ``model`` with its output renamed ``base_action``; the
    input and output names."""
    g = model.graph
    nodes, inits, inp, out = list(g.node), list(g.initializer), g.input[0].name, g.output[0].name
    for node in nodes:
        node.output[:] = ["base_action" if o == out else o for o in node.output]
    return nodes, inits, inp, out


def _moving(inp: str, velocity: slice, keepdims: int) -> tuple[list, list]:
    """Initialisers and nodes computing ``moving`` = max |obs[velocity]| > threshold."""
    inits = [numpy_helper.from_array(np.array([velocity.start], np.int64), "v_start"),
             numpy_helper.from_array(np.array([velocity.stop], np.int64), "v_stop"),
             numpy_helper.from_array(np.array([1], np.int64), "v_axis"),
             numpy_helper.from_array(np.array(NAN_THRESHOLD, np.float32), "v_threshold")]
    nodes = [helper.make_node("Slice", [inp, "v_start", "v_stop", "v_axis"], ["v"]),
             helper.make_node("Abs", ["v"], ["v_abs"]),
             helper.make_node("ReduceMax", ["v_abs"], ["v_max"], axes=[1], keepdims=keepdims),
             helper.make_node("Greater", ["v_max", "v_threshold"], ["moving"])]
    return inits, nodes


def with_nan_when_moving(model: onnx.ModelProto, velocity: slice, size: int,
                         n: int) -> onnx.ModelProto:
    """``model`` with its action replaced by NaN while the reference moves."""
    nodes, inits, inp, out = _inner(model)
    more_inits, more_nodes = _moving(inp, velocity, keepdims=1)
    inits += more_inits + [numpy_helper.from_array(np.array(np.nan, np.float32), "nan")]
    nodes += more_nodes + [helper.make_node("Where", ["moving", "nan", "base_action"], [out])]
    return _finish(nodes, inits, "demo_fault_nan_when_moving", inp, size, n, out)


def with_slow_loop(model: onnx.ModelProto, velocity: slice, size: int,
                   n: int) -> onnx.ModelProto:
    """``model`` plus, while the reference moves, 0 x sum(tanh(X W) iterated SLOW_STEPS
    times) (an If node: at rest, e.g. the load-time test inference, it is the model)."""
    nodes, inits, inp, out = _inner(model)
    k = SLOW_SIZE
    step = helper.make_graph(
        [helper.make_node("Identity", ["cond_in"], ["cond_out"]),
         helper.make_node("MatMul", ["x_in", "w"], ["xw"]),
         helper.make_node("Tanh", ["xw"], ["x_out"])],
        "slow_step",
        [helper.make_tensor_value_info("i", TensorProto.INT64, []),
         helper.make_tensor_value_info("cond_in", TensorProto.BOOL, []),
         helper.make_tensor_value_info("x_in", TensorProto.FLOAT, [k, k])],
        [helper.make_tensor_value_info("cond_out", TensorProto.BOOL, []),
         helper.make_tensor_value_info("x_out", TensorProto.FLOAT, [k, k])])
    slow = helper.make_graph(
        [helper.make_node("RandomNormal", [], ["w"], shape=[k, k], scale=float(1.0 / np.sqrt(k)),
                          seed=1.0, dtype=TensorProto.FLOAT),
         helper.make_node("RandomNormal", [], ["x_draw"], shape=[k, k], seed=2.0,
                          dtype=TensorProto.FLOAT),
         helper.make_node("Add", ["x_draw", "obs_zero"], ["x0"]),
         helper.make_node("Loop", ["steps", "always", "x0"], ["x_last"], body=step),
         helper.make_node("ReduceSum", ["x_last"], ["x_sum_slow"], keepdims=0)],
        "slow_branch", [], [helper.make_tensor_value_info("x_sum_slow", TensorProto.FLOAT, [])])
    fast = helper.make_graph(
        [helper.make_node("Identity", ["zero"], ["x_sum_fast"])], "fast_branch", [],
        [helper.make_tensor_value_info("x_sum_fast", TensorProto.FLOAT, [])])
    more_inits, more_nodes = _moving(inp, velocity, keepdims=0)
    inits += more_inits + [numpy_helper.from_array(np.array(SLOW_STEPS, np.int64), "steps"),
                           numpy_helper.from_array(np.array(True), "always"),
                           numpy_helper.from_array(np.array(0.0, np.float32), "zero")]
    nodes += more_nodes + [
        helper.make_node("ReduceSum", [inp], ["obs_sum"], keepdims=0),
        helper.make_node("Mul", ["obs_sum", "zero"], ["obs_zero"]),
        helper.make_node("If", ["moving"], ["x_sum"], then_branch=slow, else_branch=fast),
        helper.make_node("Mul", ["x_sum", "zero"], ["nothing"]),
        helper.make_node("Add", ["base_action", "nothing"], [out]),
    ]
    return _finish(nodes, inits, "demo_fault_slow_when_moving", inp, size, n, out)


def tracker_weights(limits: JointLimits, period: float, gains: TrackerGains) -> np.ndarray:
    """``W`` (8n, n) with ``u = obs W`` the tracker's closed form on `TRACKER_OBSERVATION`.

    With ``p1, v1`` the state one period on at zero final acceleration (constant jerk:
    ``p + T v + T^2 a / 3``, ``v + T a / 2``, `adaptive_streamer.core.segment.integrate`)::

        u = (ff a_ref[1] + kp (p_ref[1] - p1) + kd (v_ref[1] - v1)) / (1 + kp T^2/6 + kd T/2)

    and the blocks hold ``v / V``, ``a / A``, ``p_ref[i] - p``, ``v_ref[i] / V``,
    ``a_ref[i] / A`` (i = 0, 1).
    """
    n, T = len(limits), float(period)
    V, A = limits.velocity_max, limits.acceleration_max
    kp, kd, ff = gains.kp, gains.kd, gains.feedforward
    inv = 1.0 / (1.0 + kp * T * T / 6.0 + kd * T / 2.0)
    w = np.zeros((8 * n, n))
    rows = {0: -(kp * T + kd) * V,                  # joint_velocity
            1: -(kp * T * T / 3.0 + kd * T / 2.0) * A,  # joint_acceleration
            3: kp,                                  # reference_position row 1
            5: kd * V,                              # reference_velocity row 1
            7: ff * A}                              # reference_acceleration row 1
    for block, coeff in rows.items():
        w[block * n + np.arange(n), np.arange(n)] = coeff * inv
    return w


def tracker_model(limits: JointLimits, period: float, gains: TrackerGains) -> onnx.ModelProto:
    """The tracker as ``action = obs @ W`` (`tracker_weights`), input ``obs`` (1, 8n)."""
    n = len(limits)
    w = numpy_helper.from_array(tracker_weights(limits, period, gains).astype(np.float32), "W")
    return _finish([helper.make_node("MatMul", ["obs", "W"], ["action"])], [w],
                   "demo_fault_base_tracker", "obs", 8 * n, n, "action")


def default_gains(running: RunningConfig) -> TrackerGains:
    """The tracker card's default (critically damped) gains for ``running``."""
    w = default_natural_frequency(running.decision_period)
    n = len(running.joints)
    return TrackerGains(np.full(n, w * w), np.full(n, 2.0 * w), np.ones(n))


def write_fault_card(fault: str, running: RunningConfig, gains: TrackerGains,
                     folder: Path) -> Path:
    """Write ``<fault>.onnx`` and ``<fault>.yaml`` (a tracker made into ``fault``, for the
    joints, limits and period of ``running``) into ``folder``; the card's path."""
    title, expected = FAULT_TEXT[fault]
    card: dict[str, Any] = {
        "policy_card": 1, "name": f"demo_fault_{fault}",
        "description": f"Fault injection: {title}, built for this run's limits and period "
                       f"around a tracker (kp {np.round(gains.kp, 3).tolist()}, kd "
                       f"{np.round(gains.kd, 3).tolist()}). {expected}",
        "kind": "onnx", "model": f"{fault}.onnx", "joints": list(running.joints),
        "decision_period": float(running.decision_period), "limits": running.limits.to_dict(),
        "observation": [dict(b) if isinstance(b, dict) else b for b in TRACKER_OBSERVATION],
        "action": "acceleration", "onnx": {"input": "obs", "output": "action",
                                           "intra_op_threads": 1}}
    n = len(running.joints)
    base = tracker_model(running.limits, running.decision_period, gains)
    velocity = slice(4 * n, 5 * n)   # reference_velocity row 0: after v, a, 2 position rows
    model = (with_nan_when_moving(base, velocity, 8 * n, n) if fault == "nan_policy"
             else with_slow_loop(base, velocity, 8 * n, n))
    folder.mkdir(parents=True, exist_ok=True)
    onnx.save(model, str(folder / f"{fault}.onnx"))
    path = folder / f"{fault}.yaml"
    path.write_text(yaml.safe_dump(card, sort_keys=False))
    return path
