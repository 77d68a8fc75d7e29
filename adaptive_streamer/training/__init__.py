# SPDX-License-Identifier: Apache-2.0
"""Training where the policy is deployed: environments on the core decision cycle.

Importing this package registers the demo cell as ``adaptive_streamer/DemoCell-v0``::

    import gymnasium, adaptive_streamer.training
    env = gymnasium.make("adaptive_streamer/DemoCell-v0", card="policy.yaml", seed=3)

Modules: `env` (`DecisionEnv`), `cell` (the plug-in: `DecisionCell`, `PlantModel`),
`reward` (task x deviation x smoothness), `action_policy` (the agent's action into the
cycle). This layer imports only ``core``, ``sim`` and ``io``.
"""
from __future__ import annotations

import gymnasium

from .cell import CellFactory, DecisionCell, PlantCell, PlantModel, demo_cell_factory, \
    plant_cell_factory
from .env import DecisionEnv, EnvError, demo_card
from .reward import RewardTerms, RewardWeights, reward_terms

ENV_ID = "adaptive_streamer/DemoCell-v0"
"""Gymnasium id of the demo cell (kwargs: ``card``, ``seed``, ``limits``, ``reward``,
``settings``, ``cell``)."""

if ENV_ID not in gymnasium.registry:
    gymnasium.register(id=ENV_ID, entry_point="adaptive_streamer.training.env:DecisionEnv")

__all__ = ["ENV_ID", "CellFactory", "DecisionCell", "DecisionEnv", "EnvError", "PlantCell",
           "PlantModel", "RewardTerms", "RewardWeights", "demo_card", "demo_cell_factory",
           "plant_cell_factory", "reward_terms"]
