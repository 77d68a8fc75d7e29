#!/usr/bin/env python3
# SPDX-License-Identifier: Apache-2.0
"""Build the soak run's files in ``config/soak/`` (invented data, for the reliability bench).

* ``reference.csv``: the demo pass (``config/demo/reference.csv``) there and back, so the
  last row equals the first and the reference server can play it in a loop
  (``end_mode: loop``) for as long as a soak runs.
* ``scenario.yaml``: the demo cell with a longer edge and a wider line-sensor range, so the
  sensor keeps seeing the edge while the random policy throws the nozzle about (the demo's
  15 mm range would turn every random excursion into a feedback dropout).
* ``random_policy.onnx`` + ``random_policy.yaml``: a policy that proposes pseudo-random
  actions. Its action is *normalised* (each output in [-1, 1] is mapped onto the admissible
  interval of the next acceleration, -1 onto its low end, +1 onto its high end), so the
  limit stage decides every value the arm gets and is driven to its bounds all the time::

      x     = obs W_track                              (tracking term, see below)
      h     = frac(43758.5453 sin(obs R + c))          (per joint, in [0, 1))
      action = clip(x + NOISE (2 h - 1), -1, 1)

  ``h`` is a deterministic pseudo-random function of the observation (the classic
  ``fract(sin(x) * 43758.5453)`` hash; the observation holds the previous action, so the
  sequence keeps changing while the arm stands still). ``x`` is the tracker's acceleration
  law (`adaptive_streamer.core.policies.tracker`, default critically damped gains) written
  as a normalised action around the current acceleration: ``(u_track - a) / (J T)``, the
  centre and half-width of the jerk box ``[a - J T, a + J T]`` that usually bounds the
  admissible interval. Without it the random walk would leave the reference within a
  fraction of a second and every soak segment would end in a deviation stop; with it the
  arm stays near the pass while the noise drives the acceleration from one edge of the
  admissible interval to the other.

The observation is ``joint_velocity, joint_acceleration, reference_position (2 points),
reference_velocity (2), reference_acceleration (2), feedback [edge_offset, edge_angle],
previous_action``, so the card fits the demo adapter (the same features as the demo's
fault-injection cards, which a soak swaps in and out).

Checks printed (never asserted beyond the model's contract): onnxruntime against a numpy
re-implementation on random observations (the tracking term and the action range), the
action's statistics (mean, share at the bounds), and an offline closed loop of the soak cell
with the live stack's core code (`adaptive_streamer.sim.closed_loop`): peak limit
use, largest planned deviation and following error, and the watchdog trips (none expected).

    python scripts/make_soak_policy.py [--out DIR] [--noise X] [--seconds S]
"""
from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import yaml
from onnx import TensorProto, helper, numpy_helper

from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.observation import ObservationBlock, ObservationLayout
from adaptive_streamer.core.policies import load_card, load_policy
from adaptive_streamer.core.policies.base import PolicyInputs, RunningConfig
from adaptive_streamer.core.policies.card import default_natural_frequency
from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.segment import MotionState

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "config" / "demo"
SOAK = ROOT / "config" / "soak"
OPSET = 17
NOISE = 0.9            # amplitude of the pseudo-random term (normalised action units)
HASH_GAIN = 37.0       # std of the hash weights R (observation units -> radians of sin)
HASH_SCALE = 43758.5453
EDGE_FEATURES = ["edge_offset", "edge_angle"]
HORIZON = 2
EDGE_HALF_LENGTH = 0.60      # m, soak panel edge from y = -0.6 to 0.6 (demo: 0.3)
SENSOR_RANGE_MM = 300.0      # soak line-sensor range (demo: 15 mm)
PERIOD = 0.05
OBSERVATION = [
    "joint_velocity", "joint_acceleration",
    {"block": "reference_position", "horizon": HORIZON},
    {"block": "reference_velocity", "horizon": HORIZON},
    {"block": "reference_acceleration", "horizon": HORIZON},
    {"block": "feedback", "features": EDGE_FEATURES, "scale": [0.005, 0.02]},
    "previous_action",
]
OBSERVATION_BLOCKS = [
    ObservationBlock("joint_velocity"), ObservationBlock("joint_acceleration"),
    ObservationBlock("reference_position", horizon=HORIZON),
    ObservationBlock("reference_velocity", horizon=HORIZON),
    ObservationBlock("reference_acceleration", horizon=HORIZON),
    ObservationBlock("feedback", scale=(0.005, 0.02), features=tuple(EDGE_FEATURES)),
    ObservationBlock("previous_action"),
]


# ---------------------------------------------------------------------------- reference
def loop_reference(src: Path, out: Path) -> Path:
    """``src`` (a CSV that starts and ends at rest) followed by itself reversed in time."""
    lines = src.read_text().strip().splitlines()
    header, rows = lines[0], [r.split(",") for r in lines[1:]]
    t = np.array([float(r[0]) for r in rows])
    q = np.array([[float(x) for x in r[1:]] for r in rows])
    end = t[-1]
    back_t = 2.0 * end - t[-2::-1]
    back_q = q[-2::-1]
    all_t, all_q = np.concatenate([t, back_t]), np.vstack([q, back_q])
    text = [header] + [f"{ti:.4f}," + ",".join(f"{x:.10f}" for x in row)
                       for ti, row in zip(all_t, all_q)]
    out.write_text("\n".join(text) + "\n")
    return out


def soak_scenario(src: Path, out: Path) -> Path:
    """The demo scenario with a longer edge and a wider sensor range (see the docstring)."""
    data = yaml.safe_load(src.read_text())
    x = data["panel"]["edge"]["start"][0]
    data["panel"]["edge"] = {"start": [x, -EDGE_HALF_LENGTH], "end": [x, EDGE_HALF_LENGTH]}
    data["sensor"]["range_mm"] = SENSOR_RANGE_MM
    head = ("# Soak cell: the demo cell (config/demo/scenario.yaml) with a longer edge and a "
            "wider\n# line-sensor range, so random excursions stay in view. Written by "
            "scripts/make_soak_policy.py\n# (invented data). Format: "
            "adaptive_streamer/sim/config.py.\n")
    out.write_text(head + yaml.safe_dump(data, sort_keys=False))
    return out


# ---------------------------------------------------------------------------- model
def tracking_weights(layout: ObservationLayout, limits: JointLimits, period: float
                     ) -> np.ndarray:
    """W (size, n): the tracker law as a normalised action ``(u_track - a) / (J T)``.

    Tracker law (core/policies/tracker.py, default gains kp = w^2, kd = 2 w):
    u = (a_ref1 + kp (p_ref1 - p - T v - T^2 a / 3) + kd (v_ref1 - v - T a / 2))
        / (1 + kp T^2 / 6 + kd T / 2), on the normalised blocks (v / V, a / A,
    p_ref - p, v_ref / V, a_ref / A).
    """
    n, T = len(limits), period
    w = default_natural_frequency(T)
    kp, kd = w * w, 2.0 * w
    inv = 1.0 / (1.0 + kp * T * T / 6.0 + kd * T / 2.0)
    V, A, J = limits.velocity_max, limits.acceleration_max, limits.jerk_max
    start = {b.kind: s.start for b, s in zip(layout.blocks, layout.slices)}
    W = np.zeros((layout.size, n))
    for i in range(n):
        W[start["joint_velocity"] + i, i] = inv * (-kp * T - kd) * V[i]
        W[start["joint_acceleration"] + i, i] = inv * (-kp * T * T / 3.0 - kd * T / 2.0) * A[i]
        W[start["reference_position"] + n + i, i] = inv * kp
        W[start["reference_velocity"] + n + i, i] = inv * kd * V[i]
        W[start["reference_acceleration"] + n + i, i] = inv * A[i]
        W[start["joint_acceleration"] + i, i] -= A[i]       # minus the current a
    return W / (J * T)[None, :]


def random_model(W: np.ndarray, noise: float, seed: int = 11) -> onnx.ModelProto:
    """The ONNX graph of the module docstring (float32 obs [1, size] -> action [1, n])."""
    size, n = W.shape
    rng = np.random.default_rng(seed)
    R = (HASH_GAIN * rng.standard_normal((size, n))).astype(np.float32)
    c = rng.uniform(0.0, 2.0 * np.pi, (1, n)).astype(np.float32)
    inits = [numpy_helper.from_array(W.astype(np.float32), "W_track"),
             numpy_helper.from_array(R, "R_hash"),
             numpy_helper.from_array(c, "c_hash"),
             numpy_helper.from_array(np.array(HASH_SCALE, np.float32), "hash_scale"),
             numpy_helper.from_array(np.array(2.0 * noise, np.float32), "two_noise"),
             numpy_helper.from_array(np.array(noise, np.float32), "noise"),
             numpy_helper.from_array(np.array(-1.0, np.float32), "minus_one"),
             numpy_helper.from_array(np.array(1.0, np.float32), "one")]
    nodes = [
        helper.make_node("MatMul", ["obs", "W_track"], ["x"]),
        helper.make_node("MatMul", ["obs", "R_hash"], ["r0"]),
        helper.make_node("Add", ["r0", "c_hash"], ["r1"]),
        helper.make_node("Sin", ["r1"], ["s0"]),
        helper.make_node("Mul", ["s0", "hash_scale"], ["s1"]),
        helper.make_node("Floor", ["s1"], ["s_floor"]),
        helper.make_node("Sub", ["s1", "s_floor"], ["h"]),            # in [0, 1)
        helper.make_node("Mul", ["h", "two_noise"], ["h2"]),
        helper.make_node("Sub", ["h2", "noise"], ["e"]),               # in [-noise, noise)
        helper.make_node("Add", ["x", "e"], ["y"]),
        helper.make_node("Clip", ["y", "minus_one", "one"], ["action"]),
    ]
    graph = helper.make_graph(
        nodes, "soak_random_policy",
        [helper.make_tensor_value_info("obs", TensorProto.FLOAT, [1, size])],
        [helper.make_tensor_value_info("action", TensorProto.FLOAT, [1, n])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="adaptive_streamer scripts/make_soak_policy.py")
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model


def numpy_action(model: onnx.ModelProto, obs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(tracking term, action) of ``model`` by numpy in float32 (the graph's arithmetic)."""
    w = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    x = obs @ w["W_track"]
    s = np.sin(obs @ w["R_hash"] + w["c_hash"]) * w["hash_scale"]
    e = (s - np.floor(s)) * w["two_noise"] - w["noise"]
    return x, np.clip(x + e, -1.0, 1.0)


def card_text(noise: float, limits: str) -> str:
    """The policy card (YAML) for ``random_policy.onnx`` (``limits``: path from the card)."""
    card = {
        "policy_card": 1, "name": "soak_random_policy",
        "description": (f"Pseudo-random actions for the soak bench: the tracker law as a "
                        f"normalised action plus a hash of the observation of amplitude "
                        f"{noise:g}, clipped to [-1, 1] (scripts/make_soak_policy.py)."),
        "kind": "onnx", "model": "random_policy.onnx",
        "joints": ["j1", "j2", "j3", "j4", "j5", "j6"], "decision_period": PERIOD,
        "limits": limits, "observation": OBSERVATION, "action": "normalised",
        "onnx": {"input": "obs", "output": "action", "intra_op_threads": 1},
    }
    return ("# Soak bench: pseudo-random normalised actions. Written by "
            "scripts/make_soak_policy.py\n# (invented, for the reliability bench); format: "
            "adaptive_streamer/core/policies/card.py.\n" + yaml.safe_dump(card, sort_keys=False))


# ---------------------------------------------------------------------------- checks
def random_inputs(rng: np.random.Generator, limits: JointLimits, count: int
                  ) -> list[PolicyInputs]:
    """Random but plausible policy inputs (inside the limits, edge readings near zero)."""
    n = len(limits)
    out = []
    for _ in range(count):
        p = rng.uniform(limits.position_min, limits.position_max)
        v = rng.uniform(-1, 1, n) * limits.velocity_max * 0.5
        a = rng.uniform(-1, 1, n) * limits.acceleration_max * 0.5
        ref = p + rng.normal(0, 0.02, (HORIZON, n))
        fb = FeatureVector(tuple(EDGE_FEATURES), rng.normal(0, 0.005, 2), np.ones(2, bool), 1.0)
        out.append(PolicyInputs(1.0, MotionState(p, v, a), ref,
                                rng.normal(0, 0.2, (HORIZON, n)), rng.normal(0, 1, (HORIZON, n)),
                                fb, rng.uniform(-1, 1, n)))
    return out


def check_model(model_path: Path, model: onnx.ModelProto, layout: ObservationLayout,
                limits: JointLimits) -> bool:
    """onnxruntime vs the numpy arithmetic on random observations; prints the figures."""
    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    sess = ort.InferenceSession(str(model_path), so, providers=["CPUExecutionProvider"])
    rng = np.random.default_rng(3)
    obs = np.stack([layout.build(x).copy() for x in random_inputs(rng, limits, 2000)])
    got = np.concatenate([sess.run(None, {"obs": o[None]})[0] for o in obs])
    x, want = numpy_action(model, obs)
    # The hash amplifies float32 rounding of sin (about 43758 * 6e-8 = 3e-3 per ulp), and a
    # value next to an integer can wrap from ~0 to ~1: compare with that allowance.
    close = np.abs(got - want) <= 2.0 * NOISE * 1e-2
    in_range = bool(np.all((got >= -1.0) & (got <= 1.0)))
    at_bound = float(np.mean(np.abs(got) >= 1.0 - 1e-6))
    print(f"model check on {obs.shape[0]} random observations: onnxruntime vs numpy float32 "
          f"within 1e-2 x 2 noise for {100 * close.mean():.2f}% of the values; action in "
          f"[-1, 1]: {in_range}; mean {got.mean():+.3f}, std {got.std():.3f}, at +/-1: "
          f"{100 * at_bound:.1f}%")
    return in_range and close.mean() > 0.99


def closed_loop(card: Path, reference: Path, scenario: Path, seconds: float) -> bool:
    """Offline closed loop of the soak cell (500 Hz stream); prints the figures."""
    from adaptive_streamer.sim.closed_loop import CellSettings, run_closed_loop
    from adaptive_streamer.sim.config import load_scenario
    from adaptive_streamer.core.watchdog import WatchdogConfig
    params = yaml.safe_load((SOAK / "params.yaml").read_text())["adapter"]["ros__parameters"]
    wd = WatchdogConfig(**params["watchdog"])
    settings = CellSettings(stream_rate=500.0, watchdog=wd)
    res = run_closed_loop(card, seed=7, duration=seconds, reference=reference,
                          scenario=load_scenario(scenario), settings=settings)
    s = res.summary
    u = s.limit_usage
    print(f"offline closed loop, {seconds:g} s at 500 Hz: peak velocity/limit "
          f"{u.velocity.max():.2f}, acceleration {u.acceleration.max():.2f}, jerk "
          f"{u.jerk.max():.2f}; planned deviation max {s.deviation_joint_max:.4f} rad "
          f"(deviation_joint {wd.deviation_joint:g}), norm {s.deviation_norm_max:.4f} "
          f"({wd.deviation_norm:g}); following error max {s.following_error_max:.4f} rad "
          f"({wd.following_error:g}); sensor out of range {s.sensor_out_of_range}/"
          f"{s.sensor_samples}; trips {list(s.trips) or 'none'}; limit violations "
          f"{u.violations}")
    return not s.trips and u.violations == 0


def main(argv: list[str] | None = None) -> int:
    """Entry point; see the module docstring."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=SOAK)
    ap.add_argument("--noise", type=float, default=NOISE)
    ap.add_argument("--seconds", type=float, default=60.0,
                    help="simulated seconds of the offline closed-loop check")
    args = ap.parse_args(argv)
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)
    ref = loop_reference(DEMO / "reference.csv", out / "reference.csv")
    scen = soak_scenario(DEMO / "scenario.yaml", out / "scenario.yaml")
    limits = JointLimits.from_file(DEMO / "limits.yaml")
    layout = ObservationLayout(OBSERVATION_BLOCKS, limits)
    model = random_model(tracking_weights(layout, limits, PERIOD), args.noise)
    model_path = out / "random_policy.onnx"
    onnx.save(model, str(model_path))
    card_path = out / "random_policy.yaml"
    card_path.write_text(card_text(args.noise, os.path.relpath(DEMO / "limits.yaml", out)))
    card = load_card(card_path)
    if card.observation_layout().describe() != layout.describe():
        raise SystemExit("error: the card's observation differs from the model's layout")
    running = RunningConfig(card.limits.names, card.decision_period, card.limits, 10,
                            tuple(EDGE_FEATURES))
    load_policy(card_path, running)       # loads and passes the test inference
    print(f"wrote {ref}, {scen}, {card_path} and {model_path} ({model_path.stat().st_size} "
          f"bytes; observation {layout.describe()})")
    ok = check_model(model_path, model, layout, card.limits)
    ok &= closed_loop(card_path, ref, scen, args.seconds)
    if not ok:
        print("error: the soak policy does not behave as described", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
