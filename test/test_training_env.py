# SPDX-License-Identifier: Apache-2.0
"""The training environment: its step is the deployed decision cycle on the demo cell.

External checks: Gymnasium's own environment checker (`gymnasium.utils.env_checker`), a
real onnxruntime session running the demo's ONNX model as the agent (compared bit for bit
with the offline closed loop that runs the same card as a deployed policy), and the card
format's definition of the action meanings.
"""
from __future__ import annotations

from dataclasses import replace

import gymnasium
import numpy as np
import onnxruntime as ort
import pytest
from gymnasium.utils.env_checker import check_env

import adaptive_streamer.training as training
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.reference_files import load_reference_file
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.sim.closed_loop import demo_file, run_closed_loop
from adaptive_streamer.training import (ENV_ID, DecisionEnv, RewardWeights, demo_card,
                                        plant_cell_factory)


def _model(card) -> tuple[ort.InferenceSession, str, str]:
    sess = ort.InferenceSession(str(card.model), providers=["CPUExecutionProvider"])
    return sess, card.onnx.input, card.onnx.output


def test_gymnasium_env_checker_passes() -> None:
    # external check: Gymnasium's env checker (spaces, reset/step signatures, seeding
    # determinism, observation inside the declared space)
    env = gymnasium.make(ENV_ID, seed=1)
    check_env(env.unwrapped, skip_render_check=True)


def test_onnx_agent_in_the_env_equals_the_deployed_policy_bit_for_bit() -> None:
    card = demo_card()
    sess, inp, out = _model(card)
    env = gymnasium.make(ENV_ID, card=card)
    obs, _ = env.reset(seed=4)
    us, lows, highs, positions = [], [], [], []
    while True:
        action = sess.run([out], {inp: obs.reshape(1, -1)})[0].reshape(-1)
        obs, reward, terminated, truncated, info = env.step(action)
        assert 0.0 <= reward <= 1.0
        us.append(info["u"])
        lows.append(info["admissible_low"])
        highs.append(info["admissible_high"])
        positions.append(info["position"])
        if terminated or truncated:
            break
    assert not terminated, info["trip_message"]
    ran = run_closed_loop(card, 4)  # the same card as the deployed (onnx) policy
    following = [d for d in ran.decisions if d.mode == "following"]
    assert len(following) == len(us)
    np.testing.assert_array_equal(np.array([d.u for d in following]), np.array(us))
    np.testing.assert_array_equal(np.array([d.lo for d in following]), np.array(lows))
    np.testing.assert_array_equal(np.array([d.hi for d in following]), np.array(highs))
    # the commanded state after a step is the planned state the next decision starts from
    np.testing.assert_array_equal(np.array([d.state.position for d in following[1:]]),
                                  np.array(positions[:-1]))


def test_normalised_action_maps_onto_the_admissible_interval() -> None:
    # the card format's definition: -1 -> lo, +1 -> hi, clipped outside [-1, 1]
    card = replace(demo_card(), action="normalised")
    env = DecisionEnv(card, seed=2)
    env.reset()
    _, _, _, _, info = env.step(np.ones(6, np.float32))
    np.testing.assert_array_equal(info["u"], info["admissible_high"])
    env.reset(seed=2)
    _, _, _, _, info = env.step(np.full(6, -3.0, np.float32))
    np.testing.assert_array_equal(info["u"], info["admissible_low"])
    assert np.all(info["admissible_low"] <= info["admissible_high"])


def test_a_watchdog_trip_ends_the_episode_and_is_reported() -> None:
    env = DecisionEnv(seed=3)
    env.reset()
    for _ in range(200):  # zero acceleration: the plan leaves the moving reference
        _, _, terminated, truncated, info = env.step(np.zeros(6, np.float32))
        if terminated or truncated:
            break
    assert terminated and not truncated
    assert info["trip"] == "deviation" and "deviation" in info["trip_message"]
    with pytest.raises(training.EnvError, match="reset"):
        env.step(np.zeros(6, np.float32))


def test_reward_is_the_product_of_its_terms() -> None:
    env = DecisionEnv(reward=RewardWeights(task_scale=0.004, smoothness_weight=2.0), seed=5)
    card = env.card
    sess, inp, out = _model(card)
    obs, _ = env.reset()
    for _ in range(30):
        obs, reward, *_, info = env.step(sess.run([out], {inp: obs.reshape(1, -1)})[0][0])
        terms = (info["reward_task"], info["reward_deviation"], info["reward_smoothness"])
        assert all(0.0 <= x <= 1.0 for x in terms)
        assert reward == pytest.approx(np.prod(terms), rel=1e-12)


class _IdealPlant:
    """A user plant for the plug-in: follows the setpoint exactly; no sensor."""

    def __init__(self, q0: np.ndarray) -> None:
        self.q0 = q0
        self.q = q0.copy()

    def reset(self, seed: int) -> np.ndarray:
        self.q = self.q0.copy()
        return self.q.copy()

    def step(self, t: float, command: MotionState) -> np.ndarray:
        self.q = command.position.copy()
        return self.q.copy()

    def feedback(self, t: float):
        return None


def test_own_plant_plugs_in() -> None:
    limits = JointLimits.from_file(demo_file("limits.yaml"))
    reference = load_reference_file(demo_file("reference.csv"), limits=limits)
    card = demo_card()
    # a card reading no feedback (the ideal plant has no sensor)
    card = replace(card, observation=tuple(b for b in card.observation
                                           if b.kind != "feedback"))
    plant = _IdealPlant(reference.positions[0].copy())
    env = DecisionEnv(card, cell=plant_cell_factory(plant, reference, limits), seed=0)
    obs, _ = env.reset()
    assert obs.shape == env.observation_space.shape
    steps = 0
    while True:  # feed-forward of the reference acceleration tracks the reference
        pin = env.policy_inputs()
        obs, reward, terminated, truncated, info = env.step(pin.ref_accelerations[1])
        steps += 1
        if terminated or truncated:
            break
    assert not terminated, info["trip_message"]
    assert steps > 100
    assert reward == 0.0  # no task feature from this plant: nothing is rewarded blind
