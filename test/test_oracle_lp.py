# SPDX-License-Identifier: Apache-2.0
"""Validation of the external reference (test/oracle_lp.py) on its own, before it judges the stage.

Checks against things outside the reference: numerical ODE integration (scipy solve_ivp) and
dense sampling for the segment closed forms, closed-form answers where the exact interval is
known, mathematical properties of the exact set (mirror symmetry, convexity of the viable
set), optimality by stepping just past the bound, horizon independence, and a first-principles
lower bound on the peak position as a necessary condition on position-limited bounds.
"""
from __future__ import annotations

import math
import time
import zlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp

import oracle_lp as o

SHOULDER = o.LIMIT_SETS["shoulder"]
UNLIMITED = o.LIMIT_SETS["unlimited"]


def seed(*parts: object) -> int:
    """Deterministic seed from the test parameters."""
    return zlib.crc32(repr(parts).encode())


def mirrored(lim: o.ScalarLimits) -> o.ScalarLimits:
    """Limits reflected through zero (p -> -p)."""
    return o.ScalarLimits(-lim.pmax, -lim.pmin, lim.vmax, lim.amax, lim.jmax)


def hi_velocity_closed_form(v: float, a: float, T: float, lim: o.ScalarLimits) -> float:
    """Largest next acceleration allowed by the velocity limit alone (no position limits).

    For u >= 0 the acceleration ramps down at full jerk after the segment, so the velocity
    peaks at v1 + u^2 / (2 J) with v1 = v + T (a + u) / 2; for u < 0 after a > 0 the peak is
    inside the segment, v + T a^2 / (2 (a - u)). Constant-jerk kinematics (Biagiotti &
    Melchiorri 2008, ch. 3; from memory). Exact in the discrete model when J T <= A (the
    ramp can then pass through zero at full jerk).
    """
    J, V = lim.jmax, lim.vmax
    c = v + T * a / 2.0 - V
    disc = T * T / 4.0 - 2.0 * c / J
    u = J * (-T / 2.0 + math.sqrt(disc)) if disc >= 0.0 else -math.inf
    if u < 0.0:
        u = a - T * a * a / (2.0 * (V - v)) if a > 0.0 else -math.inf
    return min(lim.amax, a + J * T, u)


def lowest_peak(p: float, v: float, a: float, lim: o.ScalarLimits) -> float:
    """Lowest highest-position any jerk/acceleration-limited motion from (p, v, a) can have.

    The acceleration can fall no faster than J and no lower than -A, so a(t) >= a_m(t) =
    max(a - J t, -A) and, integrating twice, p(t) >= p_m(t) for every admissible motion:
    max p >= max p_m, reached where v_m falls through zero, either on the ramp (t+ below)
    or on the -A plateau. Constant-jerk closed forms (Biagiotti & Melchiorri 2008, ch. 3;
    from memory).
    """
    J, A = lim.jmax, lim.amax
    t1 = (a + A) / J
    peak = p
    disc = a * a + 2.0 * J * v
    if disc >= 0.0:
        t = (a + math.sqrt(disc)) / J
        if 0.0 < t <= t1:
            peak = max(peak, p + v * t + a * t * t / 2.0 - J * t ** 3 / 6.0)
    v1 = v + a * t1 - J * t1 * t1 / 2.0
    if v1 > 0.0:
        p1 = p + v * t1 + a * t1 * t1 / 2.0 - J * t1 ** 3 / 6.0
        peak = max(peak, p1 + v1 * v1 / (2.0 * A))
    return peak


# ----------------------------------------------------------------------------- segment checker
@settings(max_examples=60, deadline=None)
@given(p=st.floats(-3, 3), v=st.floats(-3, 3), a=st.floats(-20, 20), u=st.floats(-20, 20),
       T=st.sampled_from(o.PERIODS))
def test_segment_closed_forms_match_ode_integration(p, v, a, u, T):
    # source: scipy.integrate.solve_ivp of p' = v, v' = a, a' = j (independent numerics)
    # against the constant-jerk closed forms (Biagiotti & Melchiorri 2008, ch. 3; from memory)
    j = (u - a) / T
    sol = solve_ivp(lambda t, y: [y[1], y[2], j], (0.0, T), [p, v, a], rtol=1e-12, atol=1e-14,
                    dense_output=True)
    p1, v1, a1 = o.integrate_segment(p, v, a, u, T)
    assert p1 == pytest.approx(sol.y[0, -1], abs=1e-11)
    assert v1 == pytest.approx(sol.y[1, -1], abs=1e-11)
    assert a1 == pytest.approx(u, abs=0.0)
    ts = np.linspace(0.0, T, 4001)
    ys = sol.sol(ts)
    ext = o.segment_extrema(p, v, a, u, T)
    # exact extrema bound every sample and are attained up to the grid's curvature error
    h = T / 4000
    dv = max(abs(a), abs(u)) * h + 1e-11
    dp = (abs(v) + max(abs(a), abs(u)) * T) * h + 1e-11
    assert ys[1].max() <= ext["vmax"] + 1e-11 and ext["vmax"] <= ys[1].max() + dv
    assert ys[1].min() >= ext["vmin"] - 1e-11 and ext["vmin"] >= ys[1].min() - dv
    assert ys[0].max() <= ext["pmax"] + 1e-11 and ext["pmax"] <= ys[0].max() + dp
    assert ys[0].min() >= ext["pmin"] - 1e-11 and ext["pmin"] >= ys[0].min() - dp
    # the reported instants give the reported values
    for key, row in (("vmax", 1), ("vmin", 1), ("pmax", 0), ("pmin", 0)):
        assert sol.sol(float(ext["t_" + key]))[row] == pytest.approx(float(ext[key]), abs=1e-10)


def test_segment_violation_known_cases():
    # constructed cases, answers follow from the definitions of the limits
    T, lim = 0.02, SHOULDER
    args = (T, lim.pmin, lim.pmax, lim.vmax, lim.amax, lim.jmax)
    # at rest mid-range with a zero decision the largest normalised slack is the position's
    # (half the range away on either side: -0.5)
    assert o.segment_violation(0.0, 0.0, 0.0, 0.0, *args) == pytest.approx(-0.5)
    # jerk exactly at the limit is allowed, 1 % beyond is a 0.01 violation
    assert o.segment_violation(0.0, 0.0, 0.0, lim.jmax * T, *args) == pytest.approx(0.0, abs=1e-15)
    assert o.segment_violation(0.0, 0.0, 0.0, 1.01 * lim.jmax * T, *args) == pytest.approx(0.01)
    # velocity overshoot inside the segment: a > 0 > u, v just below V
    a, u, v = 0.8, -0.8, lim.vmax - 0.001  # jerk exactly J
    peak = v + T * a * a / (2 * (a - u))  # v(t*) at a(t*) = 0, t* = T a / (a - u)
    assert o.segment_violation(0.0, v, a, u, *args) == pytest.approx(peak / lim.vmax - 1.0)
    # position overshoot inside the segment: moving up at pmax - eps while braking hard
    p, v, a, u = lim.pmax - 1e-4, 0.05, -6.0, -6.0
    t_star = v / -a          # v(t) = v + a t with u = a (zero jerk)
    overshoot = p + v * t_star + a * t_star ** 2 / 2 - lim.pmax
    assert overshoot > 0
    assert o.segment_violation(p, v, a, u, *args) == pytest.approx(
        overshoot / (lim.pmax - lim.pmin), rel=1e-9)
    # infinite position limits contribute nothing
    argsu = (T, -math.inf, math.inf, lim.vmax, lim.amax, lim.jmax)
    assert o.segment_violation(1e6, 0.0, 0.0, 0.0, *argsu) <= 0.0


# ----------------------------------------------------------------------------- known intervals
@pytest.mark.parametrize("name", ["shoulder", "unlimited", "stiff"])
@pytest.mark.parametrize("T", o.PERIODS)
def test_rest_in_the_middle_gives_the_plain_box(name, T):
    # from rest far from position limits only jerk and acceleration bind:
    # [-min(A, J T), min(A, J T)] (definition of the limits)
    lim = o.LIMIT_SETS[name]
    p = 0.0 if not lim.has_position else 0.5 * (lim.pmin + lim.pmax)
    lo, hi, info = o.admissible_interval(p, 0.0, 0.0, T, lim)
    step = min(lim.amax, lim.jmax * T)
    assert lo == pytest.approx(-step, abs=1e-12 * step + info["gap"])
    assert hi == pytest.approx(step, abs=1e-12 * step + info["gap"])


@pytest.mark.parametrize("name", ["shoulder", "wrist", "unlimited"])
@pytest.mark.parametrize("T", o.PERIODS)
def test_velocity_limit_matches_closed_form(name, T):
    # closed form of the velocity-limited bound, see hi_velocity_closed_form (from memory)
    lim = o.LIMIT_SETS[name]
    free = o.ScalarLimits(-math.inf, math.inf, lim.vmax, lim.amax, lim.jmax)
    assert lim.jmax * T <= lim.amax
    rng = np.random.default_rng(11)
    narrowed = 0
    for _ in range(3):
        a = float(rng.uniform(-lim.amax, lim.amax))
        edge = o.velocity_boundary(0.0, a, T, free, +1)
        v = edge - float(10 ** rng.uniform(-3, -0.5)) * lim.jmax * T * T
        lo, hi, info = o.admissible_interval(0.0, v, a, T, free)
        b = o.jerk_box(a, T, free)
        expected = hi_velocity_closed_form(v, a, T, free)
        narrowed += expected < b[1]
        assert hi == pytest.approx(expected, abs=1e-10 * (b[1] - b[0]) + info["gap"])
        # mirror image: the lower bound near -V is the negated closed form
        lo_m, _, info_m = o.admissible_interval(0.0, -v, -a, T, free)
        assert lo_m == pytest.approx(-expected, abs=1e-10 * (b[1] - b[0]) + info_m["gap"])
    assert narrowed >= 1


@pytest.mark.parametrize("T", o.PERIODS)
def test_rest_at_a_position_limit(T):
    # at rest exactly on pmax any u > 0 leaves the range at once: hi = 0; mirrored at pmin
    lim = SHOULDER
    step = min(lim.amax, lim.jmax * T)
    lo, hi, info = o.admissible_interval(lim.pmax, 0.0, 0.0, T, lim)
    assert abs(hi) <= 1e-12 + info["gap"] and lo == pytest.approx(-step, abs=1e-12 + info["gap"])
    lo, hi, info = o.admissible_interval(lim.pmin, 0.0, 0.0, T, lim)
    assert abs(lo) <= 1e-12 + info["gap"] and hi == pytest.approx(step, abs=1e-12 + info["gap"])


def test_states_outside_the_viable_set_are_rejected():
    lim, T = SHOULDER, 0.008
    assert o.admissible_interval(lim.pmax + 1e-9, 0.0, 0.0, T, lim) is None
    assert o.admissible_interval(0.0, lim.vmax + 1e-9, 0.0, T, lim) is None
    assert o.admissible_interval(0.0, 0.0, -lim.amax - 1e-9, T, lim) is None
    # at +V with a > 0 the velocity exceeds V right after the start whatever u is
    assert o.admissible_interval(0.0, lim.vmax, 0.5, T, lim) is None
    # just past the position-viability boundary: rejected; just inside: accepted
    v, a = 1.2, 3.0
    edge = o.position_boundary(v, a, T, lim, +1)
    assert lim.pmin < edge < lim.pmax
    assert o.admissible_interval(edge + 1e-6, v, a, T, lim) is None
    r = o.admissible_interval(edge - 1e-6, v, a, T, lim)
    assert r is not None and r[0] <= r[1]
    assert o.is_viable(edge - 1e-6, v, a, T, lim) and not o.is_viable(edge + 1e-6, v, a, T, lim)


# ----------------------------------------------------------------------------- properties
BOUNDARY_CASES = [(name, T, kind) for name in ("shoulder", "asymmetric") for T in (0.008, 0.05)
                  for kind in ("position_max", "position_min", "velocity_max")]


@pytest.mark.parametrize("name,T,kind", BOUNDARY_CASES)
def test_mirror_symmetry(name, T, kind):
    # the exact set is symmetric under p, v, a, u -> -p, -v, -a, -u with mirrored limits
    lim = o.LIMIT_SETS[name]
    rng = np.random.default_rng(seed('mirror', name, T, kind))
    p, v, a = o.sample_boundary_state(rng, T, lim, kind)
    lo, hi, info = o.admissible_interval(p, v, a, T, lim)
    lo_m, hi_m, info_m = o.admissible_interval(-p, -v, -a, T, mirrored(lim))
    tol = 1e-10 + info["gap"] + info_m["gap"]
    assert lo_m == pytest.approx(-hi, abs=tol) and hi_m == pytest.approx(-lo, abs=tol)


@pytest.mark.parametrize("name,T,kind", BOUNDARY_CASES)
def test_convexity_of_the_viable_set(name, T, kind):
    # the viable set of a linear system under convex constraints is convex, so hi is concave
    # and lo convex along any segment between viable states (convex analysis; common knowledge)
    lim = o.LIMIT_SETS[name]
    rng = np.random.default_rng(seed('convex', name, T, kind))
    s1 = np.array(o.sample_boundary_state(rng, T, lim, kind))
    s2 = np.array(o.sample_boundary_state(rng, T, lim, kind))
    r1, r2, rm = (o.admissible_interval(*map(float, s), T, lim) for s in (s1, s2, (s1 + s2) / 2))
    assert rm is not None
    tol = 1e-10 + max(r[2]["gap"] for r in (r1, r2, rm))
    assert rm[1] >= (r1[1] + r2[1]) / 2 - tol
    assert rm[0] <= (r1[0] + r2[0]) / 2 + tol


@pytest.mark.parametrize("name,T,kind", BOUNDARY_CASES)
def test_bounds_are_tight_one_step_ahead(name, T, kind):
    # optimality checked with a different LP (from the next state) and the segment checker:
    # u slightly inside the bound is admissible and leads to a viable state; slightly beyond
    # it either breaks a limit within the segment or leads to a state that cannot stop
    lim = o.LIMIT_SETS[name]
    rng = np.random.default_rng(seed('tight', name, T, kind))
    p, v, a = o.sample_boundary_state(rng, T, lim, kind)
    lo, hi, _ = o.admissible_interval(p, v, a, T, lim)
    b = o.jerk_box(a, T, lim)
    delta = 1e-6 * (b[1] - b[0])
    args = (T, lim.pmin, lim.pmax, lim.vmax, lim.amax, lim.jmax)

    def admissible(u: float) -> bool:
        return (o.segment_violation(p, v, a, u, *args) <= 1e-12
                and o.is_viable(*(float(x) for x in o.integrate_segment(p, v, a, u, T)), T, lim))

    for bound, inward in ((hi, -1.0), (lo, +1.0)):
        assert admissible(bound + inward * delta)
        assert not admissible(bound - inward * delta)


@pytest.mark.parametrize("name,T", [("shoulder", 0.008), ("asymmetric", 0.02), ("stiff", 0.05),
                                    ("unlimited", 0.008)])
def test_horizon_is_long_enough(name, T):
    # results must not change on a horizon twice as long (the default covers the slowest
    # stop, including a turn-around at a position limit). Cases: near-edge states of every
    # kind, and states accelerating hard towards a position limit (the longest trajectories)
    lim = o.LIMIT_SETS[name]
    rng = np.random.default_rng(seed("horizon", name, T))
    states = [c[:3] for c in o.narrowed_cases(rng, T, lim, per_kind=1)]
    if lim.has_position:
        t_stop = lim.vmax / lim.amax + 2.0 * lim.amax / lim.jmax
        for side in (+1, -1):
            v, a = side * 0.1 * lim.vmax, side * 0.99 * lim.amax
            edge = o.position_boundary(v, a, T, lim, side)
            states.append((edge - side * 0.05 * lim.jmax * T * T * t_stop, v, a))
    for p, v, a in states:
        ref = o.admissible_interval(p, v, a, T, lim)
        alt = o.admissible_interval(p, v, a, T, lim, n_periods=2 * ref[2]["horizon"])
        tol = 1e-10 + ref[2]["gap"] + alt[2]["gap"]
        assert alt[0] == pytest.approx(ref[0], abs=tol), (p, v, a)
        assert alt[1] == pytest.approx(ref[1], abs=tol), (p, v, a)


@pytest.mark.parametrize("name", ["shoulder", "asymmetric", "stiff"])
@pytest.mark.parametrize("T", [0.008, 0.05])
def test_position_bound_against_the_continuous_lowest_peak(name, T):
    # necessary condition from first principles: after u = hi no trajectory can peak lower
    # than lowest_peak (continuous time, see there), so that peak must stay below pmax; and
    # when the position limit is what bounds hi, the discrete model loses at most a little
    # (the segment where a reaches -A cannot follow the corner: ~ J T^2 per stop time)
    lim = o.LIMIT_SETS[name]
    rng = np.random.default_rng(seed("peak", name, T))
    margins = []
    for _ in range(3):
        p, v, a = o.sample_boundary_state(rng, T, lim, "position_max")
        lo, hi, info = o.admissible_interval(p, v, a, T, lim)
        p1, v1, a1 = (float(x) for x in o.integrate_segment(p, v, a, hi, T))
        margin = lim.pmax - lowest_peak(p1, v1, a1, lim)
        assert margin >= -1e-12
        if hi < o.jerk_box(a, T, lim)[1] - 1e-9:
            t_stop = lim.amax / lim.jmax + lim.vmax / lim.amax
            assert margin <= lim.jmax * T * T * t_stop
        margins.append(margin)
    print(f"{name} T={T}: pmax - lowest continuous peak after u=hi: {np.round(margins, 9)}")


def test_reference_error_and_speed_report():
    # the reference's own error on near-boundary states: final violation of the certifying
    # trajectory, gap between outer bound and certified value, iterations; time (not asserted)
    rng = np.random.default_rng(3)
    rows = []
    for name in ("shoulder", "unlimited"):
        lim = o.LIMIT_SETS[name]
        for T in o.PERIODS:
            kind = "position_max" if lim.has_position else "velocity_max"
            p, v, a = o.sample_boundary_state(rng, T, lim, kind)
            t0 = time.perf_counter()
            lo, hi, info = o.admissible_interval(p, v, a, T, lim)
            dt = time.perf_counter() - t0
            b = o.jerk_box(a, T, lim)
            rows.append((name, T, info["max_violation"], info["gap"] / (b[1] - b[0]),
                         info["iterations"], dt))
            assert info["max_violation"] <= 1e-12
            assert info["gap"] <= 1e-9 * (b[1] - b[0])
    for r in rows:
        print("%-10s T=%.3f violation=%.1e gap/box=%.1e iterations=%d time=%.2fs" % r)
