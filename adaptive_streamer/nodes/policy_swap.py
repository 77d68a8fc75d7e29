# SPDX-License-Identifier: Apache-2.0
"""Loading a policy card for a swap requested through a parameter, judged before the
parameter answer goes out (its refusal is the answer's reason).

The load (parse, checks against the running configuration, building the ONNX session)
runs in a thread of its own at the decision thread's priority, so that while it holds the
interpreter it is not preempted by other processes (the stream thread would wait for it).
The executor thread waits for it at most ``budget`` seconds: while the arm moves, the
decision cycle runs in that same executor thread, so a card that takes longer to load than
the cycle can wait is refused (with its load time) instead of making decisions late; the
late load finishes in the background and is thrown away.
"""
from __future__ import annotations

import threading
import time
from dataclasses import dataclass

from adaptive_streamer.core.policies import Policy, RunningConfig, load_policy

from .threads import set_thread_priority


@dataclass
class SwapVerdict:
    """The outcome of one load: the policy, or why it was refused."""

    policy: Policy | None = None
    refusal: str = ""
    seconds: float = 0.0

    @property
    def accepted(self) -> bool:
        """True when the card loaded and fits the running configuration."""
        return not self.refusal


class PolicyLoader:
    """Loads one card at a time (a second request while one is loading is refused)."""

    def __init__(self, priority: int) -> None:
        self._priority = priority
        self._busy = threading.Lock()

    def load(self, path: str, running: RunningConfig, budget: float | None) -> SwapVerdict:
        """Load ``path`` for ``running``; wait at most ``budget`` seconds (None: until done)."""
        if not self._busy.acquire(blocking=False):
            return SwapVerdict(refusal="another policy card is still loading; try again")
        verdict = SwapVerdict()
        done = threading.Event()

        def work() -> None:
            set_thread_priority(self._priority)
            start = time.perf_counter()
            try:
                verdict.policy = load_policy(path, running)
            except Exception as exc:   # card, model or check errors: the refusal says which
                verdict.refusal = str(exc) or type(exc).__name__
            finally:
                verdict.seconds = time.perf_counter() - start
                done.set()
                self._busy.release()

        threading.Thread(target=work, name="policy-load", daemon=True).start()
        if done.wait(budget):
            return verdict
        return SwapVerdict(refusal=(
            f"loading it takes longer than the {budget * 1e3:.0f} ms the decision cycle can "
            f"wait while the arm moves; deactivate first (while inactive there is no limit)"))
