# SPDX-License-Identifier: Apache-2.0
"""Exactness of the limit stage against the external LP reference (test/oracle_lp.py).

Reference: scipy.optimize.linprog (HiGHS) with cutting planes, validated on its own in
test_oracle_lp.py. Counted are viable states near the edge of the viable set where position
or velocity limits make the exact interval narrower than the plain jerk/acceleration box.
Per limit set and period the stage interval must lie inside the exact one (to 1e-9 of the
box width plus the reference's own certified gap) and admit at least 99 % of its width
(median) and 95 % (5th percentile).
"""
from __future__ import annotations

import zlib

import numpy as np
import pytest

import oracle_lp as o
from adaptive_streamer.core.limit_stage import LimitStage

COMBOS = [(name, T) for name in o.LIMIT_SETS for T in o.PERIODS]
REL_TOL = 1e-9


def seed(*parts: object) -> int:
    """Deterministic seed from the test parameters."""
    return zlib.crc32(repr(parts).encode())


def compare(stage: LimitStage, cases: list, lims: list[o.ScalarLimits], T: float) -> dict:
    """Stage vs reference on ``cases`` (one joint each); raises on any unsafe admission."""
    P, V, A = (np.array([c[i] for c in cases]) for i in range(3))
    r = stage.evaluate(P, V, A)
    ratios = []
    for i, (p, v, a, lo, hi, info) in enumerate(cases):
        b_lo, b_hi = o.jerk_box(a, T, lims[i])
        width = b_hi - b_lo
        tol = REL_TOL * width + info["gap"]
        where = (f"state p={p!r} v={v!r} a={a!r} T={T} {lims[i]}: exact [{lo!r}, {hi!r}] "
                 f"stage [{r.lo[i]!r}, {r.hi[i]!r}]")
        assert r.viable[i], "viable state flagged not viable: " + where
        assert r.lo[i] <= r.hi[i], "empty interval: " + where
        # stage inside the exact interval (safety), source: LP reference
        assert r.lo[i] >= lo - tol and r.hi[i] <= hi + tol, "admits too much: " + where
        ratios.append((r.hi[i] - r.lo[i]) / max(hi - lo, REL_TOL * width))
    ratios = np.array(ratios)
    return {"n": len(cases), "median": float(np.median(ratios)),
            "p5": float(np.percentile(ratios, 5)), "min": float(ratios.min())}


@pytest.mark.parametrize("name,T", COMBOS)
def test_stage_interval_matches_reference(name, T):
    lim = o.LIMIT_SETS[name]
    per_kind = 2 if lim.has_position else 4
    cases = o.narrowed_cases(np.random.default_rng(seed("exact", name, T)), T, lim, per_kind)
    assert len(cases) >= 3, "too few narrowed states drawn"
    stage = LimitStage(o.to_joint_limits([lim] * len(cases)), T)
    stats = compare(stage, cases, [lim] * len(cases), T)
    print(f"{name} T={T}: n={stats['n']} width ratio median={stats['median']:.6f} "
          f"p5={stats['p5']:.6f} min={stats['min']:.6f} exact-claimed={bool(stage.exact[0])}")
    if stage.exact[0]:
        assert stats["median"] >= 0.99
        assert stats["p5"] >= 0.95


def test_mixed_arm_in_one_stage():
    # one stage over a 7-joint arm mixing limit sets: each joint judged as on its own
    names = ["shoulder", "shoulder", "wrist", "asymmetric", "unlimited", "stiff", "wrist"]
    T = 0.008
    rng = np.random.default_rng(seed("mixed"))
    cases, lims = [], []
    for name in names:
        lim = o.LIMIT_SETS[name]
        cases.append(o.narrowed_cases(rng, T, lim, per_kind=1)[0])
        lims.append(lim)
    stage = LimitStage(o.to_joint_limits(lims), T)
    stats = compare(stage, cases, lims, T)
    assert stats["median"] >= 0.99


@pytest.mark.parametrize("name", ["shoulder", "asymmetric", "stiff"])
@pytest.mark.parametrize("T", [0.004, 0.05])
def test_states_past_the_viability_edge_are_flagged(name, T):
    # just past the position-viability edge (reference LP: infeasible) the stage must flag
    # the joint and return one recovery decision: the strongest braking towards pmin
    lim = o.LIMIT_SETS[name]
    rng = np.random.default_rng(seed("edge", name, T))
    states = []
    for _ in range(3):
        v = float(rng.uniform(0.2, 0.9) * lim.vmax)
        a = float(rng.uniform(-0.5, 0.5) * lim.amax)
        edge = o.position_boundary(v, a, T, lim, +1)
        p = edge + 1e-6 * (lim.pmax - lim.pmin)
        if p < lim.pmax:
            assert o.admissible_interval(p, v, a, T, lim) is None
            states.append((p, v, a))
    states.append((lim.pmax + 1e-3, 0.0, 0.0))              # outside the range
    states.append((0.5 * (lim.pmin + lim.pmax), 1.01 * lim.vmax, 0.0))  # above V
    P, V, A = (np.array([s[i] for s in states]) for i in range(3))
    stage = LimitStage(o.to_joint_limits([lim] * len(states)), T)
    r = stage.evaluate(P, V, A)
    where = f"{name} T={T} states={states} lo={r.lo} hi={r.hi} viable={r.viable}"
    assert not r.viable.any(), where
    assert np.array_equal(r.lo, r.hi) and np.array_equal(r.lo, r.recovery), where
    strongest_down = np.array([o.jerk_box(a, T, lim)[0] for _, _, a in states])
    assert np.allclose(r.recovery, strongest_down, rtol=0, atol=1e-12), where
