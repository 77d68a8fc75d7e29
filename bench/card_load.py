# SPDX-License-Identifier: Apache-2.0
"""Policy-card load time: what a policy swap costs before and after its parameter answer.

For the demo's cards, as the adapter does for a swap: the card check before the answer
(read, parse, checks against the running configuration: `load_card` + `check_card`, in
the executor thread that also decides) and the whole load (also the model session and
the test inference: `load_policy`, built in a thread of its own after the answer). The
check with the YAML loader the package uses (libyaml's for short texts,
`adaptive_streamer.core.text_files`) and, in the same run, with the pure-Python loader for
comparison: median and worst of ``ROUNDS`` each, and their ratio. Also how long libyaml's part
of parsing a text of the largest size the C loader takes holds the interpreter in one
piece (the stream thread may wait that long). Run: ``.venv/bin/python bench/card_load.py``.
"""
from __future__ import annotations

import os
import statistics
import time
from unittest import mock

import yaml

from adaptive_streamer.core import text_files
from adaptive_streamer.core.adapter_setup import DEFAULTS, build_session
from adaptive_streamer.core.policies import check_card, load_card, load_policy
from adaptive_streamer.share import demo_file

ROUNDS = 30
CARDS = ("policy_edge.yaml", "policy_feedback.yaml")


def times(step, card: str, running: object) -> list[float]:
    """Seconds per ``step(card, running)``, ``ROUNDS`` runs after one warm-up."""
    step(demo_file(card), running)
    out = []
    for _ in range(ROUNDS):
        t0 = time.perf_counter()
        step(demo_file(card), running)
        out.append(time.perf_counter() - t0)
    return out


def check(path, running) -> None:
    """What the adapter does before the answer."""
    check_card(load_card(path), running)


def main() -> None:
    """Print the figures."""
    params = dict(DEFAULTS, limits_file=str(demo_file("limits.yaml")),
                  policy=str(demo_file("policy_edge.yaml")))
    running = build_session(params).running
    print(f"policy card loads ({ROUNDS} each, median / worst), load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    for card in CARDS:
        fast = times(check, card, running)
        with mock.patch.object(text_files, "_C_LOADER", None):   # the Python loader only
            slow = times(check, card, running)
        whole = times(load_policy, card, running)
        print(f"  {card}: check before the answer {statistics.median(fast) * 1e3:5.2f} / "
              f"{max(fast) * 1e3:5.2f} ms (Python YAML loader: "
              f"{statistics.median(slow) * 1e3:5.2f} / {max(slow) * 1e3:5.2f} ms; "
              f"{statistics.median(slow) / statistics.median(fast):.1f}x); whole load "
              f"{statistics.median(whole) * 1e3:5.2f} / {max(whole) * 1e3:5.2f} ms")
    text = "items:\n" + "".join(f"  - [{i}.5, {i}.25]\n"
                                for i in range(text_files.C_LOADER_MAX // 20))
    text = text[:text_files.C_LOADER_MAX - 1].rsplit("\n", 1)[0] + "\n"
    held = []
    for _ in range(ROUNDS):   # the C part: scanning, parsing, composing (the constructor
        t0 = time.perf_counter()   # that follows is Python code, which lets threads in)
        yaml.compose(text, Loader=yaml.CSafeLoader)
        held.append(time.perf_counter() - t0)
    print(f"  libyaml's part of parsing {len(text):,} bytes (the most the C loader takes) "
          f"holds the interpreter {statistics.median(held) * 1e3:.2f} ms (median; worst "
          f"{max(held) * 1e3:.2f} ms)")


if __name__ == "__main__":
    main()
