# SPDX-License-Identifier: Apache-2.0
"""A policy swap requested through a parameter: the card judged before the parameter answer
goes out, the model built after it without holding up the decisions.

Before the answer (in the executor thread, about a millisecond): the card file is read
(size-capped), parsed and checked against the running configuration (joints, decision
period, limits, observation layout, action meaning); a refusal is the answer's reason and
the parameter keeps its value. After the answer, in a thread of its own at the decision
thread's priority (so that while it holds the interpreter it is not preempted by other
processes; the stream thread would wait for it): the policy is built (the ONNX session) and
its test inference run; the built policy takes over at the next decision. A model that
fails there (a file that does not load, a non-finite test output) is reported, counted,
and the parameter is set back: only those failures come after the answer, because waiting
for them in the executor thread would make decisions late while the arm moves.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Callable

from adaptive_streamer.core.policies import (Policy, PolicyCard, RunningConfig, build_policy,
                                             check_card, load_card)

from .threads import set_thread_priority


@dataclass
class CardVerdict:
    """A card read and checked for a swap, or why it was refused."""

    card: PolicyCard | None = None
    refusal: str = ""


class PolicyLoader:
    """Checks cards and builds one policy at a time (a swap requested while the previous
    one is still being built is refused)."""

    def __init__(self, priority: int) -> None:
        self._priority = priority
        self._busy = threading.Lock()

    def check(self, path: str, running: RunningConfig) -> CardVerdict:
        """Read ``path`` and check it against ``running`` (fast: no model is loaded)."""
        if self._busy.locked():
            return CardVerdict(refusal="the previous swap's policy is still being built; "
                                       "try again")
        try:
            card = load_card(path)
            check_card(card, running)
        except Exception as exc:   # card errors of every kind: the refusal says which
            return CardVerdict(refusal=str(exc) or type(exc).__name__)
        return CardVerdict(card)

    def build(self, card: PolicyCard, running: RunningConfig,
              done: Callable[[Policy], None], failed: Callable[[str], None]) -> None:
        """Build the policy of a checked ``card`` in a thread; then ``done(policy)`` or
        ``failed(reason)`` (called from that thread)."""
        self._busy.acquire()

        def work() -> None:
            set_thread_priority(self._priority)
            try:
                policy = build_policy(card, running)
            except Exception as exc:   # model errors: reported, never raised in a thread
                self._busy.release()
                failed(str(exc) or type(exc).__name__)
                return
            self._busy.release()
            done(policy)

        threading.Thread(target=work, name="policy-build", daemon=True).start()
