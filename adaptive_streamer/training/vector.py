# SPDX-License-Identifier: Apache-2.0
"""N demo cells stepped as one batch: the decision math over N x joints in one call.

`VectorDemoCell` is a `gymnasium.vector.VectorEnv` of ``num_envs`` copies of the demo
pass. Per batch step, for all N cells at once:

* the observation is the card's layout (`ObservationLayout.build_batch`: the recipe of
  `ObservationLayout.build`, row for row the same values);
* the admissible intervals come from one core `LimitStage` over the N x n joints (the
  card's limits repeated N times: the stage is vectorised over joints, so one
  ``evaluate`` call serves the whole batch);
* the action becomes the next acceleration with the cycle's own `map_action`, the segment
  is integrated with `core.segment.integrate`, and the planned deviation from the
  reference one period ahead is checked against the watchdog's ``deviation_joint`` and
  ``deviation_norm`` (a trip ends that cell's episode, ``infos["trip"]``);
* the reward is `reward_terms` on arrays.

The plant is *kinematic*: the arm is where the plan is at each decision instant, and the
line sensor reads the true edge offset and angle there (no noise, latency or lag; out of
the sensor's range or off the panel the reading is invalid). Panels are drawn per cell
from its seed as in the demo. This is the fast form for collecting experience; the
single `DecisionEnv` runs the full simulated cell (driver lag, sensor noise and latency,
the whole `StreamingSession`) and is the one to evaluate on.

Episodes start at rest on the reference's first point and run for the reference's
duration; cells that end are reset in the same step (``autoreset_mode`` SAME_STEP; the
last observation is ``infos["final_obs"]``).
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium.vector import AutoresetMode, VectorEnv

from ..core.cycle import map_action
from ..core.feasibility import ensure_feasible
from ..core.feedback import FeatureVector
from ..core.limit_stage import LimitStage
from ..core.limits import JointLimits
from ..core.policies.card import PolicyCard, load_card
from ..core.policy_inputs import PolicyInputs
from ..core.reference_files import load_reference_file
from ..core.segment import MotionState, integrate
from ..core.watchdog import WatchdogConfig
from ..sim.arm import DEMO_ARM
from ..sim.closed_loop import EDGE_FEATURES, demo_file
from ..sim.config import Scenario, load_scenario
from .env import demo_card
from .reward import RewardWeights, reward_terms


class VectorEnvError(ValueError):
    """The batch cannot be built (card limits differ from the reference's joints...)."""


def repeated_limits(limits: JointLimits, copies: int) -> JointLimits:
    """``limits`` for ``copies`` cells side by side (joint ``j`` of cell ``i``: ``j#i``)."""
    names = [f"{name}#{i}" for i in range(copies) for name in limits.names]
    tile = lambda x: np.tile(x, copies)  # noqa: E731
    return JointLimits(names, tile(limits.position_min), tile(limits.position_max),
                       tile(limits.velocity_max), tile(limits.acceleration_max),
                       tile(limits.jerk_max), tile(limits.continuous))


class VectorDemoCell(VectorEnv):
    """``num_envs`` kinematic demo cells in one batch (see the module docstring)."""

    metadata: dict[str, Any] = {"render_modes": [], "autoreset_mode": AutoresetMode.SAME_STEP}

    def __init__(self, num_envs: int, card: PolicyCard | str | Path | None = None,
                 reward: RewardWeights | None = None,
                 watchdog: WatchdogConfig | None = None,
                 scenario: Scenario | None = None, limit_fraction: float = 0.8) -> None:
        if isinstance(num_envs, bool) or not isinstance(num_envs, int) or num_envs < 1:
            raise VectorEnvError(f"num_envs must be an integer >= 1, got {num_envs!r}")
        card = demo_card() if card is None else card
        self.card = card if isinstance(card, PolicyCard) else load_card(card)
        if self.card.action not in ("normalised", "acceleration"):
            raise VectorEnvError(f"{self.card.source}: action '{self.card.action}' takes no "
                                 f"values to learn")
        self.num_envs = N = num_envs
        lim = self.limits = self.card.limits
        n = self._n = len(lim)
        self.period = T = self.card.decision_period
        self.weights = reward or RewardWeights()
        self.watchdog = watchdog or WatchdogConfig()
        self.scenario = scenario or load_scenario()
        reference = load_reference_file(demo_file("reference.csv"), limits=lim)
        reference, _, _ = ensure_feasible(reference, lim, fraction=limit_fraction)
        if reference.names != lim.names:
            raise VectorEnvError(f"reference joints {list(reference.names)} differ from the "
                                 f"card's {list(lim.names)}")
        self.layout = self.card.observation_layout()
        self._h = max(2, self.layout.horizon)
        self._steps = int(math.floor(reference.duration / T + 1e-9))
        grid = np.minimum(np.arange(self._steps + self._h + 1) * T, reference.duration)
        self._ref = tuple(np.asarray(x) for x in reference.sample(grid))
        self.stage = LimitStage(repeated_limits(lim, N), T)
        self._jt = lim.jerk_max * T
        self.single_observation_space = gym.spaces.Box(-np.inf, np.inf, (self.layout.size,),
                                                       np.float32)
        if self.card.action == "normalised":
            self.single_action_space = gym.spaces.Box(-1.0, 1.0, (n,), np.float32)
        else:
            amax = lim.acceleration_max.astype(np.float32)
            self.single_action_space = gym.spaces.Box(-amax, amax, (n,), np.float32)
        self.observation_space = gym.vector.utils.batch_space(self.single_observation_space, N)
        self.action_space = gym.vector.utils.batch_space(self.single_action_space, N)
        z = np.zeros((N, n))
        self._p, self._v, self._a, self._prev = z.copy(), z.copy(), z.copy(), z.copy()
        self._k = np.zeros(N, np.intp)
        self._start = np.zeros((N, 2))
        self._normal = np.zeros((N, 2))
        self._direction = np.zeros((N, 2))
        self._length = np.zeros(N)
        self.seeds = np.zeros(N, np.int64)
        self._obs = np.zeros((N, self.layout.size), np.float32)
        self._rows = np.arange(self._h)
        self._reading = (np.zeros(N), np.zeros(N), np.zeros(N, bool))

    # ------------------------------------------------------------------ gymnasium API
    def reset(self, *, seed: int | list[int] | None = None,
              options: dict[str, Any] | None = None) -> tuple[np.ndarray, dict[str, Any]]:
        """Start every cell (cell i: seed ``seed + i``, or the i-th of a list, or drawn)."""
        if seed is not None:
            self._np_random, _ = gym.utils.seeding.np_random(
                seed if isinstance(seed, int) else int(seed[0]))
        N = self.num_envs
        if seed is None:
            seeds = self.np_random.integers(0, 2 ** 31 - 1, N)
        elif isinstance(seed, int):
            seeds = seed + np.arange(N)
        else:
            seeds = np.asarray(seed, np.int64)
        self._start_cells(np.arange(N), seeds)
        self._reading = self._edge(self._p)
        self._obs = self._observe()
        return self._obs.copy(), {"seed": self.seeds.copy()}

    def step(self, actions: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                 np.ndarray, dict[str, Any]]:
        """One decision in every cell; ended cells restart in the same step."""
        N, n, T = self.num_envs, self._n, self.period
        act = np.asarray(actions, np.float64)
        if act.shape != (N, n):
            raise VectorEnvError(f"actions: expected shape ({N}, {n}), got {act.shape}")
        p, v, a = self._p, self._v, self._a
        r = self.stage.evaluate(p.reshape(-1), v.reshape(-1), a.reshape(-1))
        lo, hi = r.lo.reshape(N, n), r.hi.reshape(N, n)
        u = map_action(self.card.action, act, lo, hi)
        end = integrate(p, v, a, u, T)
        ahead = self._ref[0][self._k + 1]
        dev = np.abs(end.position - ahead)
        dev_norm = np.linalg.norm(end.position - ahead, axis=1)
        wd = self.watchdog
        tripped = (dev.max(axis=1) > wd.deviation_joint) | (dev_norm > wd.deviation_norm)
        self._reading = self._edge(end.position)
        offset, _, valid = self._reading
        terms = reward_terms(self.weights, np.where(valid, offset, np.nan), dev_norm,
                             wd.deviation_norm, u, a, self._jt)
        self._p, self._v, self._a = end
        self._prev = act
        self._k = self._k + 1
        truncated = ~tripped & (self._k >= self._steps)
        infos: dict[str, Any] = {
            "position": end.position.copy(), "velocity": end.velocity.copy(),
            "acceleration": end.acceleration.copy(), "admissible_low": lo,
            "admissible_high": hi, "u": u, "deviation_norm": dev_norm,
            "reward_task": terms.task, "reward_deviation": terms.deviation,
            "reward_smoothness": terms.smoothness,
            "trip": np.where(tripped, "deviation", ""),
        }
        done = tripped | truncated
        obs = self._observe()
        if done.any():
            infos["final_obs"] = obs.copy()
            infos["_final_obs"] = done.copy()
            idx = np.flatnonzero(done)
            self._start_cells(idx, self.np_random.integers(0, 2 ** 31 - 1, idx.size))
            self._reading = self._edge(self._p)
            obs = self._observe()
        self._obs = obs
        return obs.copy(), np.asarray(terms.reward, float), tripped, truncated, infos

    def reference_acceleration_ahead(self) -> np.ndarray:
        """The reference acceleration one period ahead of each cell (N, n): the
        feed-forward action of the ``acceleration`` meaning (a baseline agent)."""
        return self._ref[2][self._k + 1]

    # ------------------------------------------------------------------ internals
    def _start_cells(self, idx: np.ndarray, seeds: np.ndarray) -> None:
        for i, s in zip(idx, seeds):
            panel = self.scenario.panel(int(s))
            start, _ = panel.real_edge
            self._start[i], self._normal[i] = start, panel.real_normal
            self._direction[i], self._length[i] = panel.real_direction, panel.length
            self.seeds[i] = s
        self._p[idx] = self._ref[0][0]
        self._v[idx] = 0.0
        self._a[idx] = 0.0
        self._prev[idx] = 0.0
        self._k[idx] = 0

    def _edge(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """True (offset, angle, valid) of the nozzle over each cell's panel (N,)."""
        pose = DEMO_ARM.forward(q)
        xy = pose[:, :2, 3] - self._start
        offset = np.sum(xy * self._normal, axis=1)
        along = np.sum(xy * self._direction, axis=1)
        tr = pose[:, :2, 0]
        e = self._direction
        angle = np.arctan2(tr[:, 0] * e[:, 1] - tr[:, 1] * e[:, 0], np.sum(tr * e, axis=1))
        valid = (np.abs(offset) <= self.scenario.sensor.range) & (along >= 0.0) \
            & (along <= self._length)
        return offset, angle, valid

    def _observe(self) -> np.ndarray:
        rows = self._k[:, None] + self._rows
        P, V, A = (x[rows] for x in self._ref)
        offset, angle, valid = self._reading  # the edge reading at the planned state
        values = np.stack([np.where(valid, offset, np.nan), np.where(valid, angle, np.nan)],
                          axis=1)
        flags = np.stack([valid, valid], axis=1)
        fb = FeatureVector(EDGE_FEATURES, values, flags, None)
        pin = PolicyInputs(0.0, MotionState(self._p, self._v, self._a), P, V, A, fb,
                           self._prev)
        return self.layout.build_batch(pin)
