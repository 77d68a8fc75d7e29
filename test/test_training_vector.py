# SPDX-License-Identifier: Apache-2.0
"""The batched training cell: N cells in one step, the same decision math as one cell.

External checks: a real onnxruntime session runs the demo's ONNX model as the agent; the
batched limit stage and observation are compared bit for bit with the single-cell code
(`LimitStage` over the card's own joints, `ObservationLayout.build`); Gymnasium's
space-membership check (`Space.contains`) for the batched observations.
"""
from __future__ import annotations

import numpy as np
import onnxruntime as ort

from adaptive_streamer.core.feedback import FeatureVector
from adaptive_streamer.core.limit_stage import LimitStage
from adaptive_streamer.core.policy_inputs import PolicyInputs
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.training import demo_card
from adaptive_streamer.training.vector import VectorDemoCell


def test_batched_observation_equals_one_by_one() -> None:
    card = demo_card()
    layout = card.observation_layout()
    rng = np.random.default_rng(0)
    b, n, h = 9, 6, layout.horizon
    p, v, a, prev = (rng.normal(size=(b, n)) for _ in range(4))
    rp, rv, ra = (rng.normal(size=(b, h, n)) for _ in range(3))
    valid = rng.random((b, 2)) > 0.3
    values = np.where(valid, rng.normal(size=(b, 2)) * 1e-3, np.nan)
    names = ("edge_offset", "edge_angle")
    batch = layout.build_batch(PolicyInputs(0.0, MotionState(p, v, a), rp, rv, ra,
                                            FeatureVector(names, values, valid, None), prev))
    for i in range(b):
        one = layout.build(PolicyInputs(0.0, MotionState(p[i], v[i], a[i]), rp[i], rv[i], ra[i],
                                        FeatureVector(names, values[i], valid[i], 1.0), prev[i]))
        np.testing.assert_array_equal(batch[i], one)


def test_one_stage_call_over_all_cells_equals_each_cell_alone() -> None:
    env = VectorDemoCell(8)
    env.reset(seed=10)
    single = LimitStage(env.card.limits, env.period)
    rng = np.random.default_rng(1)
    for _ in range(40):
        p, v, a = env._p.copy(), env._v.copy(), env._a.copy()
        action = env.reference_acceleration_ahead() + rng.normal(0, 0.5, (8, 6))
        _, _, _, _, info = env.step(action.astype(np.float32))
        for i in range(8):
            r = single.evaluate(p[i], v[i], a[i])
            np.testing.assert_array_equal(info["admissible_low"][i], r.lo)
            np.testing.assert_array_equal(info["admissible_high"][i], r.hi)
            np.testing.assert_array_equal(
                info["u"][i], np.clip(action[i].astype(np.float32), r.lo, r.hi))


def test_onnx_agent_runs_the_batch_without_trips_and_ended_cells_restart() -> None:
    card = demo_card()
    sess = ort.InferenceSession(str(card.model), providers=["CPUExecutionProvider"])
    env = VectorDemoCell(4)
    obs, _ = env.reset(seed=0)
    rewards = []
    for _ in range(60):
        assert env.observation_space.contains(obs)
        action = np.stack([sess.run(["action"], {"obs": o.reshape(1, -1)})[0][0] for o in obs])
        obs, reward, terminated, truncated, info = env.step(action)
        assert not terminated.any()
        rewards.append(reward)
    assert np.mean(rewards) > 0.5  # on the edge within a few mm, smooth, near the reference
    obs, _ = env.reset(seed=0)
    for _ in range(100):  # zero acceleration leaves the moving reference: a trip
        obs, reward, terminated, truncated, info = env.step(np.zeros((4, 6), np.float32))
        if terminated.any():
            break
    assert terminated.any() and "final_obs" in info
    assert set(info["trip"][terminated]) == {"deviation"}
    assert np.all(env._k[terminated] == 0)  # restarted in the same step
