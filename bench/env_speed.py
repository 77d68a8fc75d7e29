# SPDX-License-Identifier: Apache-2.0
"""Speed of the training environments: environment steps per second.

Prints, for the batched kinematic cell (`VectorDemoCell`) at N = 1 and N = 64, the
environment steps per second (N x batch steps / wall time; best of ``ROUNDS`` rounds of
``STEPS`` batch steps, the agent commanding the reference acceleration one period ahead so
episodes run to their end) and the ratio N=64 / N=1; and for the full simulated demo cell
(`DecisionEnv`: driver, sensor, bridge and the whole `StreamingSession` per step) the
steps per second of one environment. Goal (issue): N = 64 at >= 50,000 steps/s.
Run: ``.venv/bin/python bench/env_speed.py``.
"""
from __future__ import annotations

import time

import numpy as np

from adaptive_streamer.training import DecisionEnv
from adaptive_streamer.training.vector import VectorDemoCell

STEPS = 300
ROUNDS = 3


def vector_rate(n: int) -> float:
    """Best environment steps per second of a `VectorDemoCell` of ``n`` cells."""
    env = VectorDemoCell(n)
    env.reset(seed=0)
    best = 0.0
    for _ in range(ROUNDS):
        t0 = time.perf_counter()
        for _ in range(STEPS):
            env.step(env.reference_acceleration_ahead().astype(np.float32))
        best = max(best, n * STEPS / (time.perf_counter() - t0))
    return best


def full_rate(steps: int = 60) -> float:
    """Steps per second of one `DecisionEnv` on the full simulated demo cell."""
    env = DecisionEnv(seed=0)
    env.reset()
    t0 = time.perf_counter()
    done = 0
    for _ in range(steps):
        pin = env.policy_inputs()
        *_, terminated, truncated, _ = env.step(pin.ref_accelerations[1].astype(np.float32))
        done += 1
        if terminated or truncated:
            env.reset()
    return done / (time.perf_counter() - t0)


def main() -> None:
    """Print the figures."""
    one, many = vector_rate(1), vector_rate(64)
    print(f"VectorDemoCell N=1 : {one:10.0f} env steps/s")
    print(f"VectorDemoCell N=64: {many:10.0f} env steps/s  (x{many / one:.1f} of N=1; "
          f"goal >= 50000)")
    print(f"DecisionEnv (full simulated cell, one env): {full_rate():.0f} steps/s")


if __name__ == "__main__":
    main()
