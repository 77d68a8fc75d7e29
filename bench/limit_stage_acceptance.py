# SPDX-License-Identifier: Apache-2.0
"""Acceptance run of the limit stage against external references, at larger counts than the tests.

1. Exactness vs the LP reference (test/oracle_lp.py: scipy.optimize.linprog, HiGHS, with
   cutting planes): per limit set and period, near-edge viable states whose exact interval
   is narrowed by position or velocity limits; prints how many, width ratio stage/exact
   (median, p5, min), the worst excursion of the stage outside the exact interval (relative
   to the jerk box width, net of the reference's certified gap), and the reference's own
   error (final violation of its certifying trajectory, gap, rounds, time per interval).
2. Safety: >= 1e6 adversarial decisions over a fleet of joints (test_limit_stage_safety's
   runner): counts of decisions, violations (analytic segment checker), empty intervals and
   states flagged not viable after admitted decisions.
3. Braking vs ruckig's time-optimal stop (test_limit_stage_braking's helpers): periods
   slower than time-optimal (median, p95, max) per limit set and period.

Run: ``.venv/bin/python bench/limit_stage_acceptance.py [--cases-per-kind 6]
[--fleet-joints 2000] [--fleet-steps 130] [--braking-joints 400]``. Prints only; asserts
nothing (the tests in test/test_limit_stage_*.py hold the pass/fail checks).
"""
from __future__ import annotations

import argparse
import sys
import time
import zlib
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "test"))

import oracle_lp as o  # noqa: E402
from test_limit_stage_braking import brake_to_rest, random_states, ruckig_stop_time  # noqa: E402
from test_limit_stage_safety import run_fleet  # noqa: E402

from adaptive_streamer.core.limit_stage import LimitStage  # noqa: E402


def seed(*parts: object) -> int:
    """Deterministic seed from the run parameters."""
    return zlib.crc32(repr(parts).encode())


def exactness(per_kind: int) -> None:
    """Section 1: stage vs LP reference per (limit set, period)."""
    print("== exactness vs LP reference (scipy HiGHS + cutting planes)")
    print(f"{'limits':<11}{'T[ms]':>6}{'n':>5}{'median':>10}{'p5':>10}{'min':>10}"
          f"{'outside':>10}{'flagged':>8} | {'ref viol':>9}{'ref gap':>9}{'rounds':>7}{'s/int':>7}")
    for name, lim in o.LIMIT_SETS.items():
        for T in o.PERIODS:
            rng = np.random.default_rng(seed("bench exact", name, T))
            t0 = time.perf_counter()
            cases = o.narrowed_cases(rng, T, lim, per_kind if lim.has_position else 2 * per_kind)
            t_ref = (time.perf_counter() - t0) / max(len(cases), 1)
            stage = LimitStage(o.to_joint_limits([lim] * len(cases)), T)
            P, V, A = (np.array([c[i] for c in cases]) for i in range(3))
            r = stage.evaluate(P, V, A)
            ratios, outside, viol, gap, rounds = [], 0.0, 0.0, 0.0, []
            for i, (p, v, a, lo, hi, info) in enumerate(cases):
                b_lo, b_hi = o.jerk_box(a, T, lim)
                w = b_hi - b_lo
                out = max(lo - r.lo[i], r.hi[i] - hi) - info["gap"]
                outside = max(outside, out / w)
                ratios.append((r.hi[i] - r.lo[i]) / max(hi - lo, 1e-9 * w))
                viol, gap = max(viol, info["max_violation"]), max(gap, info["gap"] / w)
                rounds.append(info["iterations"])
            ratios = np.array(ratios)
            tag = "" if stage.exact[0] else "  (stage: inner, not exact)"
            print(f"{name:<11}{T * 1e3:>6.0f}{len(cases):>5}{np.median(ratios):>10.6f}"
                  f"{np.percentile(ratios, 5):>10.6f}{ratios.min():>10.6f}{outside:>10.1e}"
                  f"{int((~r.viable).sum()):>8} | {viol:>9.1e}{gap:>9.1e}"
                  f"{np.mean(rounds):>7.1f}{t_ref:>7.2f}{tag}")


def safety(joints: int, steps: int) -> None:
    """Section 2: adversarial fleet runs, one per period."""
    print("\n== safety: adversarial decision sequences (analytic segment checker)")
    total = {"decisions": 0, "violations": 0, "empty": 0, "not_viable": 0}
    for T in o.PERIODS:
        t0 = time.perf_counter()
        c = run_fleet(n=joints, T=T, steps=steps, rng_seed=seed("bench fleet", T))
        for k in total:
            total[k] += c[k]
        print(f"T={T * 1e3:>4.0f} ms: decisions={c['decisions']:>8} violations={c['violations']} "
              f"empty={c['empty']} flagged not viable={c['not_viable']} "
              f"{c['not_viable_by_policy']} worst normalised={c['worst']:.1e} "
              f"({time.perf_counter() - t0:.0f} s)")
        for ex in c["examples"][:2]:
            print("   example (policy, limits, p, v, a, lo, hi, viable, u, violation):", ex)
    print(f"total: {total}")


def braking(joints: int) -> None:
    """Section 3: braking vs ruckig's time-optimal stop."""
    print("\n== braking vs ruckig time-optimal stop: periods slower (median / p95 / max)")
    for name, lim in o.LIMIT_SETS.items():
        row = []
        for T in o.PERIODS:
            lims = [lim] * joints
            p, v, a = random_states(lims, T, np.random.default_rng(seed("bench brake", name, T)))
            t_opt = np.array([ruckig_stop_time(float(v[i]), float(a[i]), lim)
                              for i in range(joints)])
            try:
                out = brake_to_rest(lims, T, p, v, a, int(np.ceil(t_opt.max() / T)) + 100)
            except AssertionError as err:
                row.append(f"{T * 1e3:.0f} ms: stage flagged a joint not viable ({err})")
                continue
            steps = out["steps"]
            done = steps > 0
            late = steps[done] - t_opt[done] / T
            faster = int(np.sum(steps[done] * T < t_opt[done] - 1e-9))
            row.append(f"{T * 1e3:.0f} ms: {np.median(late):.2f}/{np.percentile(late, 95):.2f}/"
                       f"{late.max():.2f} (not at rest {int((~done).sum())}, faster than "
                       f"ruckig {faster}, worst violation {out['worst']:.0e})")
        print(f"{name:<11}" + "; ".join(row))


def main() -> None:
    """Run the three sections with the given counts."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--cases-per-kind", type=int, default=6,
                        help="near-edge states per kind, limit set and period (LP reference)")
    parser.add_argument("--fleet-joints", type=int, default=2000)
    parser.add_argument("--fleet-steps", type=int, default=130)
    parser.add_argument("--braking-joints", type=int, default=400)
    args = parser.parse_args()
    exactness(args.cases_per_kind)
    safety(args.fleet_joints, args.fleet_steps)
    braking(args.braking_joints)


if __name__ == "__main__":
    main()
