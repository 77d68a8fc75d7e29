# SPDX-License-Identifier: Apache-2.0
"""Export: numpy MLP weights + the environment's configuration -> ONNX model and card.

External checks: `adaptive-streamer check-policy` (the command users run) passes the
exported card; real onnxruntime runs the model (against a numpy forward pass of the same
weights, float32 rounding tolerance); the environment stepping with the model's actions
equals the deployed session running the card (`run_closed_loop`, the session code the
adapter and replay run), bit for bit.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnxruntime as ort

from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.policies import RunningConfig, load_policy
from adaptive_streamer.sim.closed_loop import EDGE_FEATURES, demo_file, run_closed_loop
from adaptive_streamer.training import DecisionEnv, demo_card
from adaptive_streamer.training.export import export_mlp


def _weights(size: int, n: int, seed: int = 0) -> list[tuple[np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(seed)
    return [(rng.normal(0, 0.05, (size, 16)), rng.normal(0, 0.05, 16)),
            (rng.normal(0, 0.05, (16, n)), np.zeros(n))]


def test_exported_mlp_passes_check_policy_and_runs_as_in_the_env(tmp_path: Path) -> None:
    card = demo_card()
    size, n = card.observation_layout().size, len(card.joints)
    layers = _weights(size, n)
    path = export_mlp(layers, card, tmp_path, "trained_mlp")
    proc = subprocess.run([sys.executable, "-m", "adaptive_streamer.cli", "check-policy",
                           str(path)], capture_output=True, text=True,
                          env=os.environ.copy(), timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr

    limits = JointLimits.from_file(demo_file("limits.yaml"))
    policy = load_policy(path, RunningConfig(limits.names, 0.05, limits, 10, EDGE_FEATURES))
    assert policy.card.observation == card.observation and policy.card.action == card.action

    sess = ort.InferenceSession(str(tmp_path / "trained_mlp.onnx"),
                                providers=["CPUExecutionProvider"])
    env = DecisionEnv(path)
    obs, _ = env.reset(seed=6)
    us = []
    for _ in range(80):
        action = sess.run(["action"], {"obs": obs.reshape(1, -1)})[0][0]
        (w0, b0), (w1, b1) = layers
        expected = np.tanh(obs @ w0 + b0) @ w1 + b1
        np.testing.assert_allclose(action, expected, atol=1e-5)
        obs, _, terminated, truncated, info = env.step(action)
        us.append(info["u"])
        if terminated or truncated:
            break
    ran = run_closed_loop(path, 6)
    first = next(i for i, d in enumerate(ran.decisions) if d.mode == "following")
    # every decision from the first the policy made (a trip's braking one included)
    deployed = [d.u for d in ran.decisions[first:first + len(us)]]
    np.testing.assert_array_equal(np.array(deployed), np.array(us))
