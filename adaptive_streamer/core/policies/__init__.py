# SPDX-License-Identifier: Apache-2.0
"""Policies: one small protocol (`Policy`), one module per kind, and loading from cards.

=================  ==========================  =============  ==============================
kind               class                       action         reads
=================  ==========================  =============  ==============================
onnx               `OnnxPolicy`                from the card  observation blocks (card)
tracker            `TrackerPolicy`             acceleration   state, reference rows 0..1
linear_feedback    `LinearFeedbackPolicy`      acceleration   as tracker + named features
hold               `HoldPolicy`                brake          nothing
=================  ==========================  =============  ==============================

`load_policy` reads a card (format: `adaptive_streamer.core.policies.card`), checks it
against the adapter's `RunningConfig`, builds the policy (an ONNX model is loaded and
warmed up) and runs one test inference on `neutral_inputs`: the action must have one finite
value per joint. `policy_for_kind` builds a default card in memory for ``tracker`` or
``hold``. Every error is a `PolicyError`.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Callable

import numpy as np

from .base import (ACTION_MEANINGS, Policy, PolicyError, PolicyInputs, RunningConfig,
                   neutral_inputs)
from .card import (KINDS, CardError, FeedbackGain, OnnxOptions, PolicyCard, TrackerGains,
                   check_card, default_natural_frequency, load_card, parse_card)
from .hold import HoldPolicy
from .linear_feedback import LinearFeedbackPolicy
from .onnx_policy import OnnxPolicy
from .tracker import TrackerPolicy

POLICY_KINDS: dict[str, Callable[[PolicyCard], Policy]] = {
    "onnx": OnnxPolicy,
    "tracker": TrackerPolicy,
    "linear_feedback": LinearFeedbackPolicy,
    "hold": HoldPolicy,
}
BUILT_IN_KINDS = ("tracker", "hold")

__all__ = [
    "ACTION_MEANINGS", "BUILT_IN_KINDS", "KINDS", "POLICY_KINDS", "CardError", "FeedbackGain",
    "HoldPolicy", "LinearFeedbackPolicy", "OnnxOptions", "OnnxPolicy", "Policy", "PolicyCard",
    "PolicyError", "PolicyInputs", "RunningConfig", "TrackerGains", "TrackerPolicy",
    "build_policy", "check_card", "default_natural_frequency", "load_card", "load_policy",
    "neutral_inputs", "parse_card", "policy_for_kind",
]


def build_policy(card: PolicyCard, running: RunningConfig) -> Policy:
    """Check ``card`` against ``running``, build its policy and run the test inference."""
    check_card(card, running)
    policy = POLICY_KINDS[card.kind](card)
    inputs = neutral_inputs(running)
    try:
        action = np.asarray(policy.act(inputs), dtype=float)
    except PolicyError:
        raise
    except Exception as exc:  # any failure of a user model or card on a benign input
        raise PolicyError(f"{card.source}: the test inference on a neutral input failed: "
                          f"{type(exc).__name__}: {exc}") from None
    n = len(running.joints)
    if action.shape != (n,):
        raise PolicyError(f"{card.source}: the test inference returned shape {action.shape}, "
                          f"expected ({n},) (one action per joint {list(running.joints)})")
    if not np.all(np.isfinite(action)):
        raise PolicyError(f"{card.source}: the test inference on a neutral input (at rest at "
                          f"the centre of the ranges) returned non-finite actions "
                          f"{action.tolist()}")
    policy.reset()
    return policy


def load_policy(card_path: str | Path, running: RunningConfig) -> Policy:
    """Load the policy card at ``card_path`` and build its policy for ``running``."""
    return build_policy(load_card(card_path), running)


def policy_for_kind(kind: str, running: RunningConfig, **gains: Any) -> Policy:
    """A built-in ``tracker`` or ``hold`` policy for ``running`` (no card file).

    ``gains`` (tracker only): ``kp``, ``kd``, ``feedforward``, each a number or one per
    joint; missing ones take the card defaults.
    """
    if kind not in BUILT_IN_KINDS:
        raise PolicyError(f"policy kind '{kind}' needs a policy card; the built-in kinds are "
                          f"{', '.join(BUILT_IN_KINDS)}")
    data: dict[str, Any] = {
        "policy_card": 1, "name": f"built-in {kind}", "kind": kind,
        "joints": list(running.joints), "decision_period": float(running.decision_period),
        "limits": running.limits.to_dict(),
    }
    if gains:
        if kind != "tracker":
            raise PolicyError(f"the built-in '{kind}' policy takes no gains, got "
                              f"{sorted(gains)}")
        data["gains"] = {k: np.asarray(v).tolist() for k, v in gains.items()}
    return build_policy(parse_card(data, f"built-in '{kind}' policy", Path.cwd()), running)
