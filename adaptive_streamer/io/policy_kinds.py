# SPDX-License-Identifier: Apache-2.0
"""Policy kinds the command line takes instead of a card (``demo``, ``replay`` and
``check-policy``): the same names everywhere.

``onnx`` and ``linear_feedback`` are the demo's cards (`adaptive_streamer.share.KIND_CARDS`);
``tracker`` and ``hold`` are built in (made for whatever joints are configured; the demo
runs its own reference-only tracker card for ``tracker``).
"""
from __future__ import annotations

from ..core.policies import BUILT_IN_KINDS
from ..share import KIND_CARDS, demo_file

POLICY_KINDS: tuple[str, ...] = tuple(sorted({*KIND_CARDS, *BUILT_IN_KINDS}))


def kind_card(policy: str) -> str:
    """``policy`` (a card path or one of `POLICY_KINDS`) as the adapter's setup takes it:
    the demo's card path for a card kind, a built-in kind's name, a card path unchanged."""
    if policy in KIND_CARDS and policy not in BUILT_IN_KINDS:
        return str(demo_file(KIND_CARDS[policy]))
    return policy
