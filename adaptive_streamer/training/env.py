# SPDX-License-Identifier: Apache-2.0
"""A Gymnasium environment whose step is one decision of the deployed decision cycle.

Each `DecisionEnv.step` hands the agent's action to the core `StreamingSession` (the code
the live adapter and the replay run: input checks, watchdog, limit stage, deviation
check, commit), then runs the cell (the demo's closed loop, or your `PlantModel`, see
`adaptive_streamer.training.cell`) up to the next decision instant:

* **observation**: the policy card's layout (`PolicyCard.observation_layout`) built from
  exactly the inputs the cycle will hand the policy at the next decision
  (`DecisionCycle.policy_inputs`), float32;
* **action**: the card's meaning, applied by the cycle: ``normalised`` in [-1, 1] mapped
  onto the admissible interval of the next acceleration, or ``acceleration`` [rad/s^2]
  clipped into it (action space: [-A, A] per joint);
* **period**: the card's decision period (the cell runs at the card's period);
* **reward**: `adaptive_streamer.training.reward` (task x deviation x smoothness);
* **episode**: `reset` runs the approach (the cycle's own tracker) until the session
  follows, so the first observation is the first decision the policy makes; an episode
  ends (``terminated``) on a watchdog trip (``info["trip"]``, ``info["trip_message"]``)
  and is truncated when the cell's run is over.

``info`` of each step: ``position``, ``velocity``, ``acceleration`` (the commanded joint
state after the step: the planned state at the next decision instant), ``admissible_low``,
``admissible_high`` (the interval applied), ``u`` (the committed acceleration), ``time``,
``mode``, ``verdict``, ``deviation_norm``, the reward terms ``reward_task``,
``reward_deviation``, ``reward_smoothness``, and ``trip`` (None or the trigger kind).
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np

from ..core.alignment import AlignmentError
from ..core.feedback import FeedbackParser
from ..core.limits import JointLimits
from ..core.policies.card import PolicyCard, load_card
from ..core.policy_inputs import PolicyInputs
from ..core.session import SessionInputs
from ..sim.closed_loop import CellSettings, demo_file
from .action_policy import ActionPolicy
from .cell import CellFactory, DecisionCell, demo_cell_factory
from .reward import RewardTerms, RewardWeights, reward_terms


class EnvError(RuntimeError):
    """The environment cannot start an episode or was stepped out of order."""


def demo_card() -> PolicyCard:
    """The demo's learned policy card (``config/demo/policy_edge.yaml``)."""
    return load_card(demo_file("policy_edge.yaml"))


class DecisionEnv(gym.Env):
    """One decision of the deployed cycle per step (see the module docstring).

    Args:
        card: the policy card to train for (path or `PolicyCard`; default the demo's
            learned card). Its observation, action meaning, joints, period and limits are
            used; its model is not.
        cell: a `CellFactory` (default: the demo cell with ``settings`` and ``limits``).
        limits: joint limits for the demo cell (object or file; default the demo's).
        reward: `RewardWeights`.
        settings: the demo cell's `CellSettings` (the decision period must be the card's).
        seed: cell seed of the first episode when `reset` gets none (later ones are drawn
            from ``np_random``).
    """

    metadata: dict[str, Any] = {"render_modes": []}

    def __init__(self, card: PolicyCard | str | Path | None = None,
                 cell: CellFactory | None = None,
                 limits: JointLimits | str | Path | None = None,
                 reward: RewardWeights | None = None,
                 settings: CellSettings | None = None, seed: int | None = None) -> None:
        super().__init__()
        card = demo_card() if card is None else card
        self.card = card if isinstance(card, PolicyCard) else load_card(card)
        settings = settings or CellSettings(decision_period=self.card.decision_period)
        if settings.decision_period != self.card.decision_period:
            raise EnvError(f"cell decision_period {settings.decision_period} s differs from "
                           f"the card's {self.card.decision_period} s ({self.card.source})")
        if isinstance(limits, Path):
            limits = str(limits)
        self.cell_factory = cell or demo_cell_factory(settings, limits)
        self.weights = reward or RewardWeights()
        self.layout = self.card.observation_layout()
        n = len(self.card.joints)
        self.observation_space = gym.spaces.Box(-np.inf, np.inf, (self.layout.size,),
                                                np.float32)
        if self.card.action == "normalised":
            self.action_space = gym.spaces.Box(-1.0, 1.0, (n,), np.float32)
        else:
            amax = self.card.limits.acceleration_max.astype(np.float32)
            self.action_space = gym.spaces.Box(-amax, amax, (n,), np.float32)
        self._first_seed = seed
        self._task = FeedbackParser((self.weights.task_feature,))
        self._cell: DecisionCell | None = None
        self._policy: ActionPolicy | None = None
        self._inputs: SessionInputs | None = None
        self._obs = np.zeros(self.layout.size, np.float32)
        self.cell_seed: int | None = None

    # ------------------------------------------------------------------ gymnasium API
    def reset(self, *, seed: int | None = None, options: dict[str, Any] | None = None
              ) -> tuple[np.ndarray, dict[str, Any]]:
        """Start an episode: a fresh cell (seed: ``seed``, else the constructor's for the
        first episode, else drawn), approached until the session follows."""
        super().reset(seed=seed)
        if seed is None and self._first_seed is not None:
            seed, self._first_seed = self._first_seed, None
        if seed is None:
            seed = int(self.np_random.integers(0, 2 ** 31 - 1))
        self.cell_seed = int(seed)
        self._policy = ActionPolicy(self.card)
        cell = self._cell = self.cell_factory(self._policy, self.cell_seed)
        session = cell.session
        while True:
            inputs = cell.advance()
            if inputs is None or session.watchdog.tripped:
                why = ("the run ended" if inputs is None else
                       f"the watchdog tripped ({session.watchdog.events[-1].kind})")
                raise EnvError(f"seed {seed}: the session never reached 'following' "
                               f"({why} during the approach)")
            if session.cycle.mode == "following":
                break
            cell.decide(inputs)
        self._inputs = inputs
        self._obs = self._observe(inputs)
        return self._obs.copy(), {"time": float(session.cycle.t), "seed": self.cell_seed}

    def step(self, action: np.ndarray) -> tuple[np.ndarray, float, bool, bool, dict[str, Any]]:
        """One decision with ``action`` (the card's meaning), then run to the next one."""
        if self._cell is None or self._inputs is None or self._policy is None:
            raise EnvError("step() before reset(), or after the episode ended")
        n = len(self.card.joints)
        a = np.asarray(action, dtype=np.float64)
        if a.shape != (n,):
            raise EnvError(f"action: expected shape ({n},) (one value per joint "
                           f"{list(self.card.joints)}), got {a.shape}")
        cell, session = self._cell, self._cell.session
        cycle = session.cycle
        self._policy.action = a
        before = cycle.state
        d = cell.decide(self._inputs)
        if d is None:
            raise EnvError(f"the session did not commit the decision at t = {cycle.t}")
        after = cycle.state
        info: dict[str, Any] = {
            "position": after.position.copy(), "velocity": after.velocity.copy(),
            "acceleration": after.acceleration.copy(),
            "admissible_low": d.lo.copy(), "admissible_high": d.hi.copy(), "u": d.u.copy(),
            "time": d.time, "mode": d.mode, "verdict": d.verdict,
            "deviation_norm": d.deviation_norm,
        }
        nxt = cell.advance()
        terms = self._terms(d.deviation_norm, d.u, before.acceleration)
        info.update(reward_task=terms.task, reward_deviation=terms.deviation,
                    reward_smoothness=terms.smoothness)
        terminated = bool(session.watchdog.tripped)
        trip = session.watchdog.events[-1] if terminated else None
        info["trip"] = None if trip is None else trip.kind
        info["trip_message"] = "" if trip is None else trip.message
        truncated = not terminated and (nxt is None or cycle.mode != "following")
        if nxt is not None and not terminated:
            self._obs = self._observe(nxt)
        self._inputs = None if terminated or truncated else nxt
        return self._obs.copy(), float(terms.reward), terminated, truncated, info

    def policy_inputs(self) -> PolicyInputs:
        """What the policy sees at the coming decision (the observation's source)."""
        if self._cell is None or self._inputs is None or self._inputs.window is None:
            raise EnvError("policy_inputs(): no decision is coming (reset first)")
        return self._cell.session.cycle.policy_inputs(self._inputs.window, self._inputs.feedback)

    # ------------------------------------------------------------------ internals
    def _observe(self, inputs: SessionInputs) -> np.ndarray:
        """The observation of the decision ``inputs`` are for (zeros without a window)."""
        cycle = self._cell.session.cycle
        if inputs.window is None:
            return np.zeros(self.layout.size, np.float32)
        try:
            pin = cycle.policy_inputs(inputs.window, inputs.feedback)
        except AlignmentError:
            return np.zeros(self.layout.size, np.float32)
        return self.layout.build(pin)

    def _terms(self, deviation_norm: float, u: np.ndarray, a0: np.ndarray) -> RewardTerms:
        msg = self._cell.feedback_message
        value = None
        if msg is not None:
            fv = self._task.parse(*msg)
            value = float(fv.values[0]) if fv.valid[0] else None
        lim = self.card.limits
        jt = lim.jerk_max * self.card.decision_period
        limit = self._cell.session.watchdog.config.deviation_norm
        return reward_terms(self.weights, value, deviation_norm, limit, u, a0, jt)


__all__ = ["DecisionEnv", "EnvError", "demo_card"]
