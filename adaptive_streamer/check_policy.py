# SPDX-License-Identifier: Apache-2.0
"""``adaptive-streamer check-policy CARD_OR_MODEL``: validate a policy before it meets a robot.

For a policy card: the card parses, fits its own joints/period/limits and its model (input
and output names, shapes, dtypes), and the policy then meets every check below. For a bare
``.onnx`` model: it loads on the CPU and meets the checks on its raw input.

Checks (one table row each; the exit code is 1 if any fails):

* load: card and model are consistent (expected vs found on failure);
* neutral: the load-time test inference (at rest mid-range) gives finite actions;
* random: actions stay finite (and, for ``normalised`` actions, within [-1, 1]; for
  ``acceleration`` actions, within 10x the acceleration limit) on random states within the
  limits, references near them and random features;
* extreme: finite on states at the limits (positions at the range ends, velocities and
  accelerations at their bounds, features at +-100x their scale);
* nan: finite when every feedback feature is invalid (NaN), as it is during a dropout;
* deterministic: the same input twice gives bit-identical actions;
* latency: p50 / p99 / max of one call [µs] (reported; fails only above one decision period).

With ``--params FILE`` (the cell's params file) or ``--limits FILE`` (a limits file, the
other adapter parameters at their defaults), the load row is the adapter's own configure
step (`adaptive_streamer.core.adapter_setup.build_session`, after the params file's check
against the parameter tables): a card that passes is a card the adapter accepts with those
parameters, and the other rows run on the joints, period and limits the adapter would use.
The target may also be a policy kind (`adaptive_streamer.io.policy_kinds`), as for ``demo``
and ``replay``.
"""
from __future__ import annotations

import argparse
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from .core.adapter_setup import SetupError, build_session
from .core.feedback import FeatureVector
from .core.policies import BUILT_IN_KINDS, Policy, PolicyError, build_policy, load_card
from .core.policies.base import PolicyInputs, RunningConfig
from .core.segment import MotionState
from .io.param_specs import ParamsCheckError, check_params_file
from .io.params_files import load_params_file
from .io.policy_kinds import POLICY_KINDS, kind_card

SAMPLES = 500


@dataclass
class Check:
    """One row of the result table."""

    name: str
    ok: bool
    detail: str


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``check-policy``."""
    parser.add_argument("target", metavar="CARD_OR_MODEL",
                        help="policy card (.yaml), ONNX model (.onnx) or policy kind ("
                             f"{', '.join(POLICY_KINDS)})")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--params", metavar="FILE",
                       help="check the card as the adapter of this params file configures it")
    where.add_argument("--limits", metavar="FILE",
                       help="check the card as an adapter with this limits file (and default "
                            "parameters) configures it")
    parser.add_argument("--samples", type=int, default=SAMPLES, help="random inputs to try")
    parser.add_argument("--seed", type=int, default=0, help="seed of the random inputs")


def run(args: argparse.Namespace) -> int:
    """Run the checks, print the table, return 0 when all pass."""
    target = Path(kind_card(args.target))
    rng = np.random.default_rng(args.seed)
    if target.suffix.lower() == ".onnx":
        checks = check_model(target, rng, args.samples)
    else:
        checks = check_card(target, rng, args.samples, args.params, args.limits)
    width = max(len(c.name) for c in checks)
    print(f"check-policy {target}")
    for c in checks:
        print(f"  {c.name:<{width}}  {'PASS' if c.ok else 'FAIL'}  {c.detail}")
    failed = [c.name for c in checks if not c.ok]
    print("result: " + ("all checks passed" if not failed else f"FAILED: {', '.join(failed)}"))
    return 0 if not failed else 1


def check_card(path: Path, rng: np.random.Generator, samples: int,
               params_file: str | None = None, limits_file: str | None = None) -> list[Check]:
    """All checks for a policy card (or a built-in kind); with ``params_file`` or
    ``limits_file``, loaded by the adapter's configure step (see the module docstring)."""
    try:
        if params_file is None and limits_file is None:
            if str(path) in BUILT_IN_KINDS:
                return [Check("load", False, f"the built-in kind '{path}' is made for the "
                                             "adapter's joints: give --params or --limits")]
            card = load_card(path)
            running = RunningConfig(card.joints, card.decision_period, card.limits,
                                    max(2, card.reference_points), card.feedback_features)
            policy = build_policy(card, running)
            where = ""
        else:
            policy, running, where = _as_configured(str(path), params_file, limits_file)
            card = policy.card
    except (PolicyError, SetupError, ParamsCheckError) as exc:
        return [Check("load", False, str(exc))]
    checks = [Check("load", True, f"{card.kind} policy '{card.name}' for {len(card.joints)} "
                                  f"joints at {card.decision_period * 1e3:g} ms, action "
                                  f"{policy.action_meaning}{where}"),
              Check("neutral", True, "finite action on the load-time test input")]
    bound = _action_bound(policy, running)

    def call(inputs: PolicyInputs) -> np.ndarray:
        return np.asarray(policy.act(inputs), float)

    gen = _InputGenerator(running, rng)
    checks.append(_finite_check("random", call, [gen.random() for _ in range(samples)], bound))
    checks.append(_finite_check("extreme", call, gen.extremes(), None))
    if running.features:
        checks.append(_finite_check("nan", call, [gen.random(nan_features=True)
                                                  for _ in range(50)], None))
    else:
        checks.append(Check("nan", True, "no feedback features (nothing to invalidate)"))
    checks.append(_determinism(call, gen.random()))
    checks.append(_latency(call, [gen.random() for _ in range(200)], card.decision_period))
    return checks


def _as_configured(card: str, params_file: str | None, limits_file: str | None
                   ) -> tuple[Policy, RunningConfig, str]:
    """The policy as the adapter's configure step builds it from ``params_file`` (its
    adapter section) or ``limits_file``; raises `SetupError`/`ParamsCheckError`."""
    if params_file is not None:
        check_params_file(params_file)
        params = load_params_file(params_file)
        where = f"; accepted by the adapter of {params_file}"
    else:
        params = {"limits_file": limits_file}
        where = f"; accepted by an adapter with limits {limits_file}"
    setup = build_session(params, policy=card)
    policy = setup.session.cycle.policy
    return policy, setup.running, where


def check_model(path: Path, rng: np.random.Generator, samples: int) -> list[Check]:
    """Checks for a bare ONNX model on its raw float32 input."""
    import onnxruntime as ort

    from .core.policies.onnx_policy import describe_model
    try:
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = 1
        sess = ort.InferenceSession(str(path), opts, providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises several types for a bad file
        return [Check("load", False, f"onnxruntime cannot load '{path}': {exc}")]
    ins, outs = sess.get_inputs(), sess.get_outputs()
    if len(ins) != 1 or len(outs) != 1 or ins[0].type != "tensor(float)":
        return [Check("load", False, "a policy model needs one float32 input and one output; "
                                     f"found {describe_model(sess)}")]
    shape = [d if isinstance(d, int) else 1 for d in ins[0].shape]
    name = ins[0].name
    checks = [Check("load", True, describe_model(sess))]

    def call(x: np.ndarray) -> np.ndarray:
        return np.asarray(sess.run(None, {name: x.reshape(shape).astype(np.float32)})[0], float)

    size = int(np.prod(shape))
    checks.append(_finite_check("random", call,
                                [rng.uniform(-1, 1, size) for _ in range(samples)], None))
    checks.append(_finite_check("extreme", call, [np.full(size, s) for s in (-100.0, 0.0, 100.0)],
                                None))
    checks.append(_determinism(call, rng.uniform(-1, 1, size)))
    checks.append(_latency(call, [rng.uniform(-1, 1, size) for _ in range(200)], None))
    return checks


def _action_bound(policy: Policy, running: RunningConfig) -> np.ndarray | None:
    if policy.action_meaning == "normalised":
        return np.ones(len(running.joints))
    if policy.action_meaning == "acceleration":
        return 10.0 * running.limits.acceleration_max
    return None


def _finite_check(name: str, call: Callable, inputs: list, bound: np.ndarray | None) -> Check:
    bad = out_of_range = 0
    first = ""
    for x in inputs:
        try:
            y = call(x)
        except Exception as exc:  # a user model may raise anything
            return Check(name, False, f"raised {type(exc).__name__}: {exc}")
        if not np.all(np.isfinite(y)):
            bad += 1
            first = first or f"non-finite output {np.round(y, 4).tolist()}"
        elif bound is not None and np.any(np.abs(y) > bound * (1 + 1e-6)):
            out_of_range += 1
            first = first or f"out of range {np.round(y, 4).tolist()}"
    ok = bad == 0 and out_of_range == 0
    detail = f"{len(inputs)} inputs: {bad} non-finite, {out_of_range} out of range"
    return Check(name, ok, detail + ("" if ok else f" (first: {first})"))


def _determinism(call: Callable, x: object) -> Check:
    a, b = call(x), call(x)
    same = np.array_equal(a, b, equal_nan=True)
    return Check("deterministic", same, "identical outputs for the same input" if same
                 else f"outputs differ by up to {np.nanmax(np.abs(a - b)):.3g}")


def _latency(call: Callable, inputs: list, period: float | None) -> Check:
    times = []
    for x in inputs:
        t0 = time.perf_counter()
        call(x)
        times.append(time.perf_counter() - t0)
    t = np.array(times) * 1e6
    p50, p99, worst = np.percentile(t, 50), np.percentile(t, 99), t.max()
    ok = period is None or p99 < period * 1e6
    detail = f"p50 {p50:.1f} us, p99 {p99:.1f} us, max {worst:.1f} us"
    if period is not None:
        detail += f" (decision period {period * 1e6:.0f} us)"
    return Check("latency", ok, detail)


class _InputGenerator:
    """Random and extreme `PolicyInputs` for a running configuration."""

    def __init__(self, running: RunningConfig, rng: np.random.Generator) -> None:
        self.r, self.rng = running, rng
        lim = running.limits
        self.lo = np.where(lim.has_position_limits, lim.position_min, -np.pi)
        self.hi = np.where(lim.has_position_limits, lim.position_max, np.pi)

    def _inputs(self, p, v, a, ref_offset, features) -> PolicyInputs:
        r = self.r
        h, T = r.horizon, r.decision_period
        steps = (np.arange(h) * T)[:, None]
        ref_p = p + ref_offset + v * steps
        fb = None
        if r.features:
            valid = np.isfinite(features)
            fb = FeatureVector(r.features, features, valid, 1.0)
        return PolicyInputs(1.0, MotionState(p, v, a), ref_p, np.tile(v, (h, 1)),
                            np.zeros((h, len(p))), fb, np.zeros(len(p)))

    def random(self, nan_features: bool = False) -> PolicyInputs:
        """Random state within the limits, a reference near it, random features."""
        lim, rng, n = self.r.limits, self.rng, len(self.r.joints)
        p = rng.uniform(self.lo, self.hi)
        v = rng.uniform(-1, 1, n) * lim.velocity_max * 0.5
        a = rng.uniform(-1, 1, n) * lim.acceleration_max * 0.5
        k = len(self.r.features)
        f = np.full(k, np.nan) if nan_features else rng.normal(0.0, 0.01, k)
        return self._inputs(p, v, a, rng.normal(0.0, 0.01, n), f)

    def extremes(self) -> list[PolicyInputs]:
        """States at the range ends and at the velocity/acceleration bounds."""
        lim, n, k = self.r.limits, len(self.r.joints), len(self.r.features)
        out = []
        for p in (self.lo, self.hi):
            for s in (-1.0, 1.0):
                out.append(self._inputs(p.copy(), s * lim.velocity_max, -s * lim.acceleration_max,
                                        np.zeros(n), np.full(k, 100.0 * s)))
        return out
