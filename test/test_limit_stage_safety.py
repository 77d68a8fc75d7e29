# SPDX-License-Identifier: Apache-2.0
"""Safety of the limit stage under adversarial decision sequences.

Every committed segment is checked with the reference's analytic segment checker
(test/oracle_lp.py `segment_violations`: exact extrema of the constant-jerk segment,
Biagiotti & Melchiorri 2008, ch. 3, from memory; written independently of the package) and
states are integrated with the reference's own closed forms. Zero violations beyond 1e-9
(normalised by each limit) are allowed, and a viable state must never get an empty interval.
Many joints run at once (the stage is vectorised over joints). Property tests (hypothesis)
draw random limits, periods and states.
"""
from __future__ import annotations

import math
import zlib

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

import oracle_lp as o
from adaptive_streamer.core.limit_stage import LimitStage, LimitStageError
from adaptive_streamer.core.segment import integrate

TOL = 1e-9
POLICIES = ("hi", "lo", "bang_bang", "inside", "clip_far", "normalised", "braking", "push")


def seed(*parts: object) -> int:
    """Deterministic seed from the test parameters."""
    return zlib.crc32(repr(parts).encode())


class Fleet:
    """Many joints: a tiling of the test limit sets, as arrays."""

    def __init__(self, n: int, T: float) -> None:
        sets = list(o.LIMIT_SETS.values())
        self.lims = [sets[i % len(sets)] for i in range(n)]
        self.limits = o.to_joint_limits(self.lims)
        self.stage = LimitStage(self.limits, T)
        self.T, self.n = T, n
        L = self.limits
        self.pmin, self.pmax = np.asarray(L.position_min), np.asarray(L.position_max)
        self.V, self.A, self.J = (np.asarray(x) for x in (L.velocity_max, L.acceleration_max,
                                                          L.jerk_max))
        finite = np.isfinite(self.pmin)
        lo, hi = np.where(finite, self.pmin, -3.0), np.where(finite, self.pmax, 3.0)
        self.centre, self.half = 0.5 * (lo + hi), 0.5 * (hi - lo)

    def violations(self, p, v, a, u) -> np.ndarray:
        """Normalised violation of each joint's segment (reference checker)."""
        return o.segment_violations(p, v, a, u, self.T, self.pmin, self.pmax, self.V, self.A,
                                    self.J)


def start_states(fleet: Fleet, rng: np.random.Generator) -> tuple[np.ndarray, ...]:
    """Half the joints at rest anywhere in the range, half at random states the stage accepts."""
    n = fleet.n
    p = fleet.centre + fleet.half * rng.uniform(-0.95, 0.95, n)
    v, a = np.zeros(n), np.zeros(n)
    moving = np.arange(n) % 2 == 1
    for _ in range(50):  # redraw until the stage calls every moving joint viable
        todo = moving & ~fleet.stage.evaluate(p, v, a).viable
        if not todo.any():
            break
        k = int(todo.sum())
        p[todo] = fleet.centre[todo] + fleet.half[todo] * rng.uniform(-1.0, 1.0, k)
        v[todo] = fleet.V[todo] * rng.uniform(-1.0, 1.0, k)
        a[todo] = fleet.A[todo] * rng.uniform(-1.0, 1.0, k)
    assert fleet.stage.evaluate(p, v, a).viable.all()
    return p, v, a


def decide(fleet: Fleet, policy: np.ndarray, step: int, state, r, rng, period: np.ndarray
           ) -> np.ndarray:
    """One decision per joint according to its adversarial policy."""
    n, stage = fleet.n, fleet.stage
    u = np.empty(n)
    lo, hi = r.lo, r.hi
    phase = (step // period) % 2 == 0
    choice = {
        "hi": hi, "lo": lo,
        "bang_bang": np.where(phase, hi, lo),
        "inside": lo + rng.uniform(0.0, 1.0, n) * (hi - lo),
        "clip_far": stage.clip(state, rng.uniform(-10.0, 10.0, n) * fleet.A),
        "normalised": stage.map_normalised(state, rng.uniform(-1.5, 1.5, n)),
        "braking": stage.braking(state),
        "push": np.where(rng.uniform(0.0, 1.0, n) < 0.9, np.where(phase, hi, lo),
                         lo + rng.uniform(0.0, 1.0, n) * (hi - lo)),
    }
    for k, name in enumerate(POLICIES):
        mask = policy == k
        u[mask] = choice[name][mask]
    return u


def run_fleet(n: int, T: float, steps: int, rng_seed: int) -> dict:
    """Adversarial run; returns counts (decisions, violations, empty, not viable)."""
    fleet = Fleet(n, T)
    rng = np.random.default_rng(rng_seed)
    p, v, a = start_states(fleet, rng)
    policy = rng.integers(0, len(POLICIES), n)
    period = rng.integers(1, 12, n)
    worst, bad_states = -np.inf, []
    counts = {"decisions": 0, "violations": 0, "empty": 0, "not_viable": 0}
    by_policy: dict[str, int] = {}
    for step in range(steps):
        state = (p, v, a)
        r = fleet.stage.evaluate(p, v, a)
        counts["not_viable"] += int((~r.viable).sum())
        for k in policy[~r.viable]:
            by_policy[POLICIES[k]] = by_policy.get(POLICIES[k], 0) + 1
        counts["empty"] += int((r.lo > r.hi).sum())
        u = decide(fleet, policy, step, state, r, rng, period)
        # the mapping lo + (x+1)/2 (hi-lo) may round one ulp past hi: allow float rounding
        ulp = 4.0 * np.finfo(float).eps * fleet.A
        assert np.all((u >= r.lo - ulp) & (u <= r.hi + ulp)), "decision outside the interval"
        viol = fleet.violations(p, v, a, u)
        over = viol > TOL
        counts["violations"] += int(over.sum())
        counts["decisions"] += n
        for i in np.flatnonzero(over | ~r.viable | (r.lo > r.hi))[:3]:
            bad_states.append((POLICIES[policy[i]], fleet.lims[i], float(p[i]), float(v[i]),
                               float(a[i]), float(r.lo[i]), float(r.hi[i]), bool(r.viable[i]),
                               float(u[i]), float(viol[i])))
        worst = max(worst, float(viol.max()))
        p, v, a = o.integrate_segment(p, v, a, u, T)
    counts["worst"], counts["examples"] = worst, bad_states[:5]
    counts["not_viable_by_policy"] = by_policy
    return counts


@pytest.mark.parametrize("T", o.PERIODS)
def test_adversarial_sequences_never_violate(T):
    counts = run_fleet(n=600, T=T, steps=60, rng_seed=seed("fleet", T))
    print(f"T={T}: {counts['decisions']} decisions, violations={counts['violations']}, "
          f"empty={counts['empty']}, not viable={counts['not_viable']}, "
          f"worst normalised={counts['worst']:.2e}, not viable by policy "
          f"{counts['not_viable_by_policy']}")
    assert counts["violations"] == 0, counts["examples"]
    assert counts["empty"] == 0, counts["examples"]
    assert counts["not_viable"] == 0, counts["examples"]


@pytest.mark.parametrize("name", ["shoulder", "asymmetric", "stiff"])
def test_long_pushes_against_a_position_limit(name):
    # hold the decision at hi for a long time (runs into pmax), then at lo (pmin), at 4 and
    # 50 ms: the hardest sustained pressure on the position logic
    lim = o.LIMIT_SETS[name]
    for T in (0.004, 0.05):
        n = 50
        stage = LimitStage(o.to_joint_limits([lim] * n), T)
        rng = np.random.default_rng(seed("push", name, T))
        p = rng.uniform(lim.pmin, lim.pmax, n) * 0.5 + 0.25 * (lim.pmin + lim.pmax)
        v, a = np.zeros(n), np.zeros(n)
        steps = int(3.0 * (lim.pmax - lim.pmin) / lim.vmax / T) + 50
        # deciding hi on the viability edge means the hardest braking, which reverses, so
        # the joint cycles just below the limit: check the push reached it, not where it is
        # at one particular step
        highest, lowest = np.full(n, -np.inf), np.full(n, np.inf)
        for step in range(2 * steps):
            r = stage.evaluate(p, v, a)
            assert r.viable.all() and np.all(r.lo <= r.hi)
            u = r.hi if step < steps else r.lo
            viol = o.segment_violations(p, v, a, u, T, lim.pmin, lim.pmax, lim.vmax, lim.amax,
                                        lim.jmax)
            assert viol.max() <= TOL, (name, T, step, p[viol.argmax()], v[viol.argmax()])
            p, v, a = o.integrate_segment(p, v, a, u, T)
            if step < steps:
                highest = np.maximum(highest, p)
            else:
                lowest = np.minimum(lowest, p)
        assert np.all(highest > lim.pmax - 1e-3 * (lim.pmax - lim.pmin))  # pressed against pmax
        assert np.all(lowest < lim.pmin + 1e-3 * (lim.pmax - lim.pmin))   # and against pmin


def test_stage_viability_agrees_with_the_reference():
    # random states the stage calls viable must be viable for the LP reference and vice
    # versa (source: LP reference, scipy HiGHS); near the edge the stage may only be safe
    rng = np.random.default_rng(seed("agree"))
    disagree = []
    for name in ("shoulder", "asymmetric"):
        lim = o.LIMIT_SETS[name]
        T = 0.02
        stage = LimitStage(o.to_joint_limits([lim]), T)
        for _ in range(12):
            p = float(rng.uniform(lim.pmin, lim.pmax))
            v = float(rng.uniform(-1.0, 1.0) * lim.vmax)
            a = float(rng.uniform(-1.0, 1.0) * lim.amax)
            mine = bool(stage.evaluate(np.array([p]), np.array([v]), np.array([a])).viable[0])
            if mine != o.is_viable(p, v, a, T, lim):
                disagree.append((name, p, v, a, mine))
    assert not disagree


def test_integrate_matches_the_reference_closed_forms():
    # the package's segment integration against the reference's own closed forms
    rng = np.random.default_rng(seed("integrate"))
    p, v, a, u = (rng.uniform(-5.0, 5.0, 1000) for _ in range(4))
    for T in o.PERIODS:
        mine = integrate(p, v, a, u, T)
        ref = o.integrate_segment(p, v, a, u, T)
        for x, y in zip(mine, ref):
            assert np.allclose(x, y, rtol=0.0, atol=1e-14)


# ----------------------------------------------------------------------------- properties
@st.composite
def limits_and_period(draw):
    """Random limits (any mix, exact or not) with a position range the stage accepts."""
    V = draw(st.floats(0.3, 5.0))
    A = draw(st.floats(1.0, 40.0))
    J = draw(st.floats(10.0, 1000.0))
    T = draw(st.sampled_from(o.PERIODS + (0.002, 0.01, 0.033)))
    stop = V * (V / A + 3.0 * A / J + 4.0 * T) + A * A * T
    width = draw(st.floats(4.0, 30.0)) * stop
    lower = draw(st.floats(-3.0, 0.0)) * width
    unlimited = draw(st.booleans())
    lim = o.ScalarLimits(-math.inf if unlimited else lower,
                         math.inf if unlimited else lower + width, V, A, J)
    return lim, T


def make_stage(lim: o.ScalarLimits, T: float) -> LimitStage:
    """Single-joint stage, skipping limit sets the stage refuses (too narrow a range)."""
    try:
        return LimitStage(o.to_joint_limits([lim]), T)
    except LimitStageError:
        assume(False)
        raise


@settings(max_examples=80, deadline=None)
@given(lt=limits_and_period(), x=st.tuples(*(st.floats(-1.0, 1.0),) * 4))
def test_property_interval_inside_box_and_keeps_viability(lt, x):
    lim, T = lt
    stage = make_stage(lim, T)
    centre = 0.0 if not lim.has_position else 0.5 * (lim.pmin + lim.pmax)
    half = 3.0 if not lim.has_position else 0.5 * (lim.pmax - lim.pmin)
    # bias towards the edges of the range, where the position logic works
    p = centre + half * math.copysign(abs(x[0]) ** 0.25, x[0])
    v, a = x[1] * lim.vmax, x[2] * lim.amax
    r = stage.evaluate(np.array([p]), np.array([v]), np.array([a]))
    lo, hi = float(r.lo[0]), float(r.hi[0])
    if not r.viable[0]:
        assert lo == hi == float(r.recovery[0])
        return
    b_lo, b_hi = o.jerk_box(a, T, lim)
    slack = 1e-12 * lim.amax
    assert b_lo - slack <= lo <= hi <= b_hi + slack
    args = (T, lim.pmin, lim.pmax, lim.vmax, lim.amax, lim.jmax)
    for u in (lo, hi, 0.5 * (lo + hi), lo + (x[3] + 1.0) / 2.0 * (hi - lo)):
        assert o.segment_violation(p, v, a, u, *args) <= TOL
        nxt = o.integrate_segment(p, v, a, u, T)
        r1 = stage.evaluate(*(np.atleast_1d(y) for y in nxt))
        assert r1.viable[0] and r1.lo[0] <= r1.hi[0], (lim, T, p, v, a, u)


@settings(max_examples=60, deadline=None)
@given(lt=limits_and_period(), x=st.tuples(*(st.floats(-1.0, 1.0),) * 3),
       proposal=st.floats(-1e3, 1e3), action=st.floats(-3.0, 3.0))
def test_property_clip_and_normalised_mapping(lt, x, proposal, action):
    lim, T = lt
    stage = make_stage(lim, T)
    centre = 0.0 if not lim.has_position else 0.5 * (lim.pmin + lim.pmax)
    half = 3.0 if not lim.has_position else 0.5 * (lim.pmax - lim.pmin)
    state = (np.array([centre + 0.9 * half * x[0]]), np.array([x[1] * lim.vmax]),
             np.array([x[2] * lim.amax]))
    r = stage.evaluate(*state)
    lo, hi = float(r.lo[0]), float(r.hi[0])
    c = float(stage.clip(state, np.array([proposal]))[0])
    assert lo <= c <= hi
    assert c == min(max(proposal, lo), hi)
    m = float(stage.map_normalised(state, np.array([action]))[0])
    y = min(max(action, -1.0), 1.0)
    assert m == pytest.approx(lo + (y + 1.0) / 2.0 * (hi - lo), abs=1e-12 * lim.amax)
    assert float(stage.map_normalised(state, np.array([-1.0]))[0]) == pytest.approx(lo, abs=1e-15)
    assert float(stage.map_normalised(state, np.array([1.0]))[0]) == pytest.approx(hi, abs=1e-12)
    b = float(stage.braking(state)[0])
    assert lo <= b <= hi
