# SPDX-License-Identifier: Apache-2.0
"""Speed of the policy layer for a 7-joint arm at a 50 ms decision period.

Prints the median and p90 time per call in microseconds (``CALLS`` calls per round, every
call timed on its own; of ``ROUNDS`` rounds, the one with the lowest median) of: building
the observation of a card with every block kind (H = 5, two feedback features, 116
entries) into a reused buffer; one onnxruntime run of a 2x64 tanh MLP on it (a session
with the settings `OnnxPolicy` uses, input and output bound to buffers); the whole
`OnnxPolicy.act` (build + run + float64 copy); and the tracker, linear-feedback and hold
policies' `act`. The MLP has seeded random weights and is written with onnx.helper to a
temporary folder. Run: ``.venv/bin/python bench/policy_speed.py``.
"""
from __future__ import annotations

import math
import tempfile
import time
from pathlib import Path
from typing import Callable

import numpy as np
import onnx
import onnxruntime as ort
import yaml
from onnx import TensorProto, helper, numpy_helper

from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.policies import (PolicyInputs, RunningConfig, load_policy,
                                             policy_for_kind)
from adaptive_streamer.core.segment import MotionState

N = 7
PERIOD = 0.05  # decision period, common practice
HORIZON = 5
CALLS = 2000
ROUNDS = 3  # the round with the lowest median is printed (less disturbed by other load)
FEATURES = ("edge_offset", "edge_angle")


def arm_limits() -> JointLimits:
    """Invented 7-joint limits (made-up irregular values; the last joint wraps)."""
    return JointLimits([f"j{i + 1}" for i in range(N)],
                       [-2.71, -1.54, -2.48, -2.64, -2.93, -0.58, -math.inf],
                       [2.63, 1.92, 2.86, 0.29, 2.51, 3.21, math.inf],
                       [1.37, 1.61, 1.83, 2.06, 2.44, 2.71, 2.9],
                       [6.3, 4.7, 7.9, 5.8, 9.2, 11.4, 10.6],
                       [71.0, 43.0, 66.0, 58.0, 87.0, 104.0, 113.0],
                       continuous=[False] * 6 + [True])


def write_mlp(path: Path, n_in: int, n_out: int, hidden: int = 64) -> None:
    """A 2-hidden-layer tanh MLP with seeded random weights, input [1, n_in]."""
    rng = np.random.default_rng(0)
    sizes, nodes, inits, x = [n_in, hidden, hidden, n_out], [], [], "obs"
    for k, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
        inits += [numpy_helper.from_array((rng.standard_normal((a, b)) / math.sqrt(a))
                                          .astype(np.float32), f"W{k}"),
                  numpy_helper.from_array(np.zeros(b, np.float32), f"b{k}")]
        y = "action" if k == 2 else f"h{k}"
        nodes += [helper.make_node("MatMul", [x, f"W{k}"], [f"m{k}"]),
                  helper.make_node("Add", [f"m{k}", f"b{k}"], [f"z{k}"]),
                  helper.make_node("Tanh", [f"z{k}"], [y])]
        x = y
    graph = helper.make_graph(nodes, "mlp",
                              [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, n_in])],
                              [helper.make_tensor_value_info("action", TensorProto.FLOAT,
                                                             [1, n_out])], inits)
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), str(path))


def write_cards(folder: Path, limits: JointLimits) -> tuple[Path, Path]:
    """The onnx card (every block kind) and a linear-feedback card; returns their paths."""
    common = {"policy_card": 1, "joints": list(limits.names), "decision_period": PERIOD,
              "limits": limits.to_dict()}
    onnx_card = dict(common, name="bench_mlp", kind="onnx", model="mlp.onnx",
                     action="normalised", observation=[
                         "joint_position", "joint_velocity", "joint_acceleration",
                         {"block": "reference_position", "horizon": HORIZON, "scale": 0.1},
                         {"block": "reference_velocity", "horizon": HORIZON},
                         {"block": "reference_acceleration", "horizon": 2},
                         {"block": "feedback", "features": list(FEATURES),
                          "scale": [0.005, 0.02]},
                         "previous_action"])
    fb_card = dict(common, name="bench_fb", kind="linear_feedback",
                   feedback_gain={"features": list(FEATURES),
                                  "matrix": [[0.0, 0.0], [12.0, 0.0]] + [[0.0, 0.5]] * (N - 2)})
    paths = folder / "mlp.card.yaml", folder / "fb.card.yaml"
    for path, card in zip(paths, (onnx_card, fb_card)):
        path.write_text(yaml.safe_dump(card, sort_keys=False))
    return paths


def bound_session(path: Path, size: int) -> tuple[ort.InferenceSession, ort.IOBinding,
                                                  np.ndarray]:
    """A session with the settings `OnnxPolicy` uses, input and output bound to buffers."""
    so = ort.SessionOptions()
    so.intra_op_num_threads = so.inter_op_num_threads = 1
    so.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    session = ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])
    obs, out = np.zeros((1, size), np.float32), np.zeros((1, N), np.float32)
    binding = session.io_binding()
    binding.bind_ortvalue_input("obs", ort.OrtValue.ortvalue_from_numpy(obs))
    binding.bind_ortvalue_output("action", ort.OrtValue.ortvalue_from_numpy(out))
    return session, binding, obs


def example_inputs(rng: np.random.Generator) -> PolicyInputs:
    """Plausible random inputs (feedback in the adapter's order, one feature stale)."""
    p = rng.uniform(-1.0, 1.0, N)
    return PolicyInputs(1.0, MotionState(p, rng.uniform(-1, 1, N), rng.uniform(-3, 3, N)),
                        p + np.cumsum(rng.uniform(-0.02, 0.02, (HORIZON, N)), axis=0),
                        rng.uniform(-1, 1, (HORIZON, N)), rng.uniform(-3, 3, (HORIZON, N)),
                        FeatureVector(FEATURES, np.array([0.002, np.nan]),
                                      np.array([True, False]), 1.0),
                        rng.uniform(-1, 1, N))


def timed(fn: Callable[[], object]) -> np.ndarray:
    """Per-call microseconds over CALLS calls (after 200 warm-up calls)."""
    for _ in range(200):
        fn()
    out = np.empty(CALLS)
    clock = time.perf_counter_ns
    for i in range(CALLS):
        t0 = clock()
        fn()
        out[i] = clock() - t0
    return out / 1e3


def main() -> None:
    """Print the figures."""
    limits = arm_limits()
    running = RunningConfig(limits.names, PERIOD, limits, HORIZON, FEATURES)
    inputs = example_inputs(np.random.default_rng(1))
    with tempfile.TemporaryDirectory() as tmp:
        onnx_path, fb_path = write_cards(Path(tmp), limits)
        size = N * (3 + 2 * HORIZON + 2 + 1) + 2 * len(FEATURES)  # the card's blocks
        write_mlp(Path(tmp) / "mlp.onnx", size, N)
        mlp = load_policy(onnx_path, running)
        layout = mlp.card.observation_layout()
        session, binding, buf = bound_session(Path(tmp) / "mlp.onnx", size)
        fb = load_policy(fb_path, running)
    tracker = policy_for_kind("tracker", running)
    hold = policy_for_kind("hold", running)
    rows = {
        f"observation build ({layout.size} entries)": lambda: layout.build(inputs, out=buf),
        "onnx 2x64 MLP, one bound run": lambda: session.run_with_iobinding(binding),
        "onnx policy act (build + run + copy)": lambda: mlp.act(inputs),
        "tracker act": lambda: tracker.act(inputs),
        "linear_feedback act": lambda: fb.act(inputs),
        "hold act": lambda: hold.act(inputs),
    }
    print(f"policy layer speed: {N} joints, H = {HORIZON}, period {PERIOD * 1e3:.0f} ms, "
          f"{CALLS} calls per round, best of {ROUNDS} rounds, us per call")
    for label, fn in rows.items():
        t = min((timed(fn) for _ in range(ROUNDS)), key=np.median)
        print(f"  {label:40s} median {np.median(t):6.1f}  p90 {np.percentile(t, 90):6.1f}")


if __name__ == "__main__":
    main()
