#!/usr/bin/env python3
# SPDX-License-Identifier: Apache-2.0
"""Build the demo's fault-injection policies (``config/demo/faults/``) from the edge model.

Both wrap the learned edge follower (``config/demo/policy_edge.onnx``, built by
``scripts/make_demo_policy.py``) and use its card's observation, so they load against the
demo's adapter like the real policy and pass the load-time test inference (at rest at the
centre of the ranges, features 0; `adaptive_streamer.core.policies.neutral_inputs`):

* ``nan_policy.yaml`` / ``.onnx`` (``--inject nan_policy@S``): the edge model's action,
  replaced by NaN on every joint while the reference moves: any joint's reference velocity
  at the decision instant above `NAN_THRESHOLD` of its limit (row 0 of the
  ``reference_velocity`` block, which is ``v_ref / v_max``). While the reference stands
  still it is the edge model, so it loads (and a reset's probe with the reference paused
  passes); once the pass moves the cycle sees NaN and stops with a ``policy_fault``.
  (The arm's own velocity would not do: the edge corrections at rest move the joints as
  fast as the pass does.)
* ``slow_policy.yaml`` / ``.onnx`` (``--inject slow_policy@S``): the edge model's action
  plus, while the reference moves (the same test), 0 times the sum of a long computation
  (at rest it is as fast as the edge model, so loading it takes no time): a Loop of
  `SLOW_STEPS` products
  ``X <- tanh(X W)`` of `SLOW_SIZE` x `SLOW_SIZE` float32 matrices drawn in the graph
  (RandomNormal with fixed seeds, so the file stays small; ``X0`` also depends on the
  observation so nothing can be folded at load). About 2 ``SLOW_SIZE^3`` x `SLOW_STEPS`
  flops per inference: late decisions, then an ``overruns`` stop.

The wrappers are `adaptive_streamer.demo.fault_policies` (the demo builds the same faults
around a tracker at run time when these cards do not fit its run). The script checks both
with onnxruntime (1 thread): outputs vs the edge model, NaN
behaviour on a still and a moving observation, and prints the slow model's inference time
(a timing is printed, never asserted).

    python scripts/make_fault_policies.py [--out DIR]
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort

from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.policies import load_card, load_policy
from adaptive_streamer.core.policies.base import RunningConfig, neutral_inputs
from adaptive_streamer.sim.closed_loop import EDGE_FEATURES
from adaptive_streamer.demo.fault_policies import (NAN_THRESHOLD, SLOW_SIZE, SLOW_STEPS,
                                                   with_nan_when_moving, with_slow_loop)

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "config" / "demo"
TIMED_RUNS = 5


def fault_card(name: str, title: str, text: str, edge_card_text: str) -> str:
    """A card for a fault model: the edge card's fields, its own name, description, model."""
    keep = []
    skip = False
    for line in edge_card_text.splitlines():
        if line.startswith(("#", "policy_card:", "name:", "model:", "limits:", "description:")):
            skip = line.startswith("description:")
            continue
        if skip and line.startswith("  "):
            continue
        skip = False
        keep.append(line)
    return (f"# {title}\n# Written by scripts/make_fault_policies.py (demo fault injection); "
            "format: adaptive_streamer/core/policies/card.py.\n"
            f"policy_card: 1\nname: demo_fault_{name}\ndescription: |\n"
            + "\n".join(f"  {x}" for x in text.splitlines()) + "\n"
            + f"model: {name}.onnx\nlimits: ../limits.yaml\n" + "\n".join(keep) + "\n")


def session(path: Path) -> ort.InferenceSession:
    """An onnxruntime session on 1 thread."""
    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    so.inter_op_num_threads = 1
    return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])


def main(argv: list[str] | None = None) -> int:
    """Entry point; see the module docstring."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=DEMO / "faults")
    args = ap.parse_args(argv)
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)
    edge_card_path = DEMO / "policy_edge.yaml"
    card = load_card(edge_card_path)
    edge = onnx.load(str(card.model))
    layout = card.observation_layout()
    n = len(card.joints)
    block = next(s for b, s in zip(layout.blocks, layout.slices)
                 if b.kind == "reference_velocity")
    velocity = slice(block.start, block.start + n)      # row 0: at the decision instant
    text = edge_card_path.read_text()
    models = {
        "nan_policy": (with_nan_when_moving(edge, velocity, layout.size, n),
                       "Fault injection: NaN actions once the arm moves.",
                       f"The demo edge model, but every action is NaN while the reference moves "
                       f"(a joint's\nreference velocity above {100 * NAN_THRESHOLD:g}% of its "
                       "limit). Finite while the reference stands\nstill, so it loads and a reset "
                       "probe with the reference paused passes.\nExpected: a policy_fault stop "
                       "as soon as the pass moves."),
        "slow_policy": (with_slow_loop(edge, velocity, layout.size, n),
                        "Fault injection: a policy far slower than the decision period.",
                        "The demo edge model plus, while the reference moves, 0 x a Loop of\n"
                        f"{SLOW_STEPS} products of {SLOW_SIZE}x{SLOW_SIZE} matrices (about "
                        f"{2 * SLOW_SIZE ** 3 * SLOW_STEPS / 1e9:.0f} GFLOP per inference).\n"
                        "Expected: late decisions, the stream brakes in their place, then an "
                        "overruns stop."),
    }
    limits = JointLimits.from_file(DEMO / "limits.yaml")
    running = RunningConfig(limits.names, card.decision_period, limits, 10, EDGE_FEATURES)
    still = layout.build(neutral_inputs(running))[None]
    moving = still.copy()
    moving[0, velocity.start] = 2 * NAN_THRESHOLD
    edge_sess = session(card.model)
    ok = True
    for name, (model, title, desc) in models.items():
        path = out / f"{name}.onnx"
        onnx.save(model, str(path))
        card_path = out / f"{name}.yaml"
        card_path.write_text(fault_card(name, title, desc, text))
        load_policy(card_path, running)          # loads and passes the test inference
        sess = session(path)
        want = edge_sess.run(None, {"obs": still})[0]
        got = sess.run(None, {"obs": still})[0]
        runs = []
        for _ in range(TIMED_RUNS):
            t0 = time.perf_counter()
            got_moving = sess.run(None, {"obs": moving})[0]
            runs.append(time.perf_counter() - t0)
        elapsed = float(np.median(runs))
        same = bool(np.array_equal(got, want))
        print(f"wrote {card_path} and {path} ({path.stat().st_size} bytes): at rest "
              f"{'equal to' if same else 'DIFFERENT from'} the edge model; moving: "
              f"{'NaN' if np.isnan(got_moving).all() else 'finite'}; one inference "
              f"{1e3 * elapsed:.1f} ms (median of {TIMED_RUNS}, 1 thread)")
        ok &= same
        ok &= bool(np.isnan(got_moving).all()) == (name == "nan_policy")
    if not ok:
        print("error: a fault model does not behave as described", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
