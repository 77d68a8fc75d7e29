# SPDX-License-Identifier: Apache-2.0
"""External reference for the limit stage: the exact admissible interval as a linear program.

Model (one joint, decision period ``T``): state ``(p, v, a)`` at a decision instant; the
decision ``u`` is the acceleration at the next instant, acceleration is linear in between
(constant jerk ``j = (u - a) / T``), so over ``0 <= t <= T``::

    v(t) = v + a t + j t^2 / 2          p(t) = p + v t + a t^2 / 2 + j t^3 / 6

(constant-jerk closed forms, Biagiotti & Melchiorri, Trajectory Planning for Automatic
Machines and Robots, Springer 2008, ch. 3; formulas from memory). The exact admissible set
of ``u`` is every ``u`` whose segment respects the jerk, acceleration, velocity and position
limits everywhere on ``[0, T]`` and from whose end state some sequence of further decisions
reaches rest (v = 0, a = 0) within the limits.

The reference solves that as a linear program with ``scipy.optimize.linprog`` (HiGHS
solver): the unknowns are the boundary accelerations ``a_1 .. a_N`` and boundary velocities
and positions over a horizon long enough to stop from any viable state, ending at rest.
Boundary limits are plain bounds; limits *inside* a segment are handled exactly by cutting
planes: after every solve the analytic extrema of each segment of the solution are found
(velocity extremum where a(t) crosses zero, position extremum where v(t) crosses zero) and a
linear constraint at exactly that instant is added where the limit is exceeded; repeat until
no excess is left beyond a tolerance (``LEVELS``, dimensionless). Every cut is a true
constraint, so the LP optimum is an outer bound, while the returned value is attained by a
trajectory checked to have no excess (a certified inner value): the exact bound lies
between them, ``info['gap']`` apart at most; ``info['max_violation']`` is the certifying
trajectory's largest normalised limit violation (float rounding).
The reference uses no project code (`to_joint_limits` only builds the project's limits object
from the test limit sets).

Public API:
    ScalarLimits, LIMIT_SETS, PERIODS, to_joint_limits,
    integrate_segment, segment_extrema, segment_violations, segment_violation,
    admissible_interval, is_viable, position_boundary, velocity_boundary,
    sample_viable_state, sample_boundary_state, jerk_box, narrowed_cases, OracleError
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog

#: HiGHS options: tight primal/dual feasibility tolerances.
HIGHS_OPTIONS = {
    "primal_feasibility_tolerance": 1e-10,
    "dual_feasibility_tolerance": 1e-10,
}


class OracleError(RuntimeError):
    """The reference LP could not be solved or its cutting planes did not converge."""


@dataclass(frozen=True)
class ScalarLimits:
    """Limits of one joint; ``pmin=-inf, pmax=inf`` for a joint without position limits."""

    pmin: float
    pmax: float
    vmax: float
    amax: float
    jmax: float

    @property
    def has_position(self) -> bool:
        """True when the position range is finite."""
        return math.isfinite(self.pmin) and math.isfinite(self.pmax)

    def horizon_periods(self, T: float, speed: float | None = None) -> int:
        """Periods enough to come to rest from any viable state moving at ``|v| <= speed``.

        The longest trajectory the LP may need brakes to a turning point right at a
        position limit and then stops the reversal. Braking from (v, a): at most |a|/J to
        bring a to zero, then (|v| + a^2/(2J))/A + A/J at full deceleration, below
        2.5 A/J + |v|/A with |a| <= A (constant-jerk ramps, from memory); stopping the
        reversal from (0, -A) takes 2.5 A/J more; |v| grows by at most A T in the first
        period. The horizon is 1.5 times the sum plus 8 periods (checked against horizons
        twice as long in test_oracle_lp). ``speed=None`` means any speed up to ``vmax``.
        """
        speed = self.vmax if speed is None else min(abs(speed), self.vmax)
        t_stop = 5.0 * self.amax / self.jmax + speed / self.amax + T
        return int(math.ceil(1.5 * t_stop / T)) + 8


#: Test limit sets (rad, rad/s, rad/s^2, rad/s^3): values like a 7-joint arm's axes (common
#: practice; invented numbers), one with asymmetric range, one without position limits, one
#: stiff axis whose jerk step J T exceeds its acceleration bound at long periods. All satisfy
#: the stage's documented exactness assumptions A^2/(2J) + A T < V (T <= 50 ms) and a
#: position range >= 4 V^2 / A.
LIMIT_SETS: dict[str, ScalarLimits] = {
    "shoulder": ScalarLimits(-2.9, 2.9, 2.0, 8.0, 80.0),
    "wrist": ScalarLimits(-3.0, 3.0, 2.6, 15.0, 150.0),
    "asymmetric": ScalarLimits(-0.5, 2.5, 1.2, 5.0, 40.0),
    "unlimited": ScalarLimits(-math.inf, math.inf, 3.0, 10.0, 100.0),
    "stiff": ScalarLimits(-2.5, 2.5, 1.5, 4.0, 200.0),
}
#: Decision periods [s]: 4 ms to 50 ms (50 ms is a common decision period; common practice).
PERIODS = (0.004, 0.008, 0.02, 0.05)


def to_joint_limits(limits: Sequence[ScalarLimits], names: Sequence[str] | None = None) -> Any:
    """The project's ``JointLimits`` for a list of scalar limit sets (one joint each)."""
    from adaptive_streamer.core.limits import JointLimits

    names = list(names) if names is not None else [f"j{i}" for i in range(len(limits))]
    return JointLimits(names, [x.pmin for x in limits], [x.pmax for x in limits],
                       [x.vmax for x in limits], [x.amax for x in limits],
                       [x.jmax for x in limits])


# --------------------------------------------------------------------------- segment analysis
def integrate_segment(p: Any, v: Any, a: Any, u: Any, T: float
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """End state ``(p1, v1, a1)`` of constant-jerk segments (vectorised, closed form).

    ``v1 = v + T (a + u) / 2``, ``p1 = p + v T + T^2 (2 a + u) / 6``, ``a1 = u``
    (Biagiotti & Melchiorri 2008, ch. 3; from memory).
    """
    p, v, a, u = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (p, v, a, u)))
    return p + v * T + T * T * (2.0 * a + u) / 6.0, v + T * (a + u) / 2.0, u.copy()


def segment_extrema(p: Any, v: Any, a: Any, u: Any, T: float) -> dict[str, np.ndarray]:
    """Exact extrema of velocity and position over constant-jerk segments (vectorised).

    Returns arrays ``vmin, vmax, pmin, pmax`` (values) and ``t_vmin, t_vmax, t_pmin, t_pmax``
    (the instant in ``[0, T]`` where each is reached). Velocity is quadratic: its interior
    extremum is where ``a(t)`` crosses zero, ``t* = T a / (a - u)`` with ``v(t*) = v + a t*/2``.
    Position is cubic: interior extrema are the roots of ``v(t) = 0`` (numerically stable
    quadratic formula). Closed forms: Biagiotti & Melchiorri 2008, ch. 3 (from memory).
    """
    p, v, a, u = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (p, v, a, u)))
    j = (u - a) / T
    p1, v1, _ = integrate_segment(p, v, a, u, T)

    # velocity: endpoints, and the a(t) = 0 crossing when a and u have opposite signs
    vmax, t_vmax = np.where(v1 > v, v1, v), np.where(v1 > v, T, 0.0)
    vmin, t_vmin = np.where(v1 < v, v1, v), np.where(v1 < v, T, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ts = np.where(a * u < 0.0, T * a / (a - u), np.nan)
    vs = v + a * ts / 2.0
    up = (a > 0.0) & (u < 0.0) & (vs > vmax)
    vmax, t_vmax = np.where(up, vs, vmax), np.where(up, ts, t_vmax)
    dn = (a < 0.0) & (u > 0.0) & (vs < vmin)
    vmin, t_vmin = np.where(dn, vs, vmin), np.where(dn, ts, t_vmin)

    # position: endpoints, and roots s in (0, 1) of  c2 s^2 + c1 s + c0 = 0  (t = s T)
    pmax, t_pmax = np.where(p1 > p, p1, p), np.where(p1 > p, T, 0.0)
    pmin, t_pmin = np.where(p1 < p, p1, p), np.where(p1 < p, T, 0.0)
    c2, c1, c0 = (u - a) * T / 2.0, a * T, v
    with np.errstate(divide="ignore", invalid="ignore"):
        disc = c1 * c1 - 4.0 * c2 * c0
        root = np.sqrt(np.where(disc >= 0.0, disc, np.nan))
        q = -0.5 * (c1 + np.copysign(root, c1))
        for s in (q / c2, c0 / q):
            inside = np.isfinite(s) & (s > 0.0) & (s < 1.0)
            t = np.where(inside, s * T, 0.0)
            pt = p + t * (v + t * (a / 2.0 + j * t / 6.0))
            hi = inside & (pt > pmax)
            pmax, t_pmax = np.where(hi, pt, pmax), np.where(hi, t, t_pmax)
            lo = inside & (pt < pmin)
            pmin, t_pmin = np.where(lo, pt, pmin), np.where(lo, t, t_pmin)
    return {"vmin": vmin, "vmax": vmax, "pmin": pmin, "pmax": pmax,
            "t_vmin": t_vmin, "t_vmax": t_vmax, "t_pmin": t_pmin, "t_pmax": t_pmax}


def segment_violations(p: Any, v: Any, a: Any, u: Any, T: float, pmin: Any, pmax: Any,
                       V: Any, A: Any, J: Any) -> np.ndarray:
    """Largest normalised limit violation of each segment (``<= 0`` means within limits).

    Jerk is divided by ``J``, acceleration (start and end) by ``A``, velocity by ``V``,
    position by the position range ``pmax - pmin`` (joints with infinite limits have no
    position term). Extrema are exact (`segment_extrema`), not sampled.
    """
    p, v, a, u, pmin, pmax, V, A, J = np.broadcast_arrays(
        *(np.asarray(x, dtype=float) for x in (p, v, a, u, pmin, pmax, V, A, J)))
    ext = segment_extrema(p, v, a, u, T)
    worst = np.abs(u - a) / T / J - 1.0
    worst = np.maximum(worst, np.maximum(np.abs(a), np.abs(u)) / A - 1.0)
    worst = np.maximum(worst, np.maximum(ext["vmax"], -ext["vmin"]) / V - 1.0)
    finite = np.isfinite(pmin) & np.isfinite(pmax)
    with np.errstate(invalid="ignore"):
        width = np.where(finite, pmax - pmin, 1.0)
        pos = np.maximum(ext["pmax"] - pmax, pmin - ext["pmin"]) / width
    return np.where(finite, np.maximum(worst, pos), worst)


def segment_violation(p: float, v: float, a: float, u: float, T: float, pmin: float,
                      pmax: float, V: float, A: float, J: float) -> float:
    """Maximum normalised violation over one segment (or over arrays of segments)."""
    return float(np.max(segment_violations(p, v, a, u, T, pmin, pmax, V, A, J)))


# --------------------------------------------------------------------------- the LP
class _Horizon:
    """Sparse LP over ``N`` periods in dimensionless units, with its cut pool.

    Units: time ``T``, acceleration ``J T``, velocity ``J T^2``, position ``J T^3`` (so the
    jerk bound is 1 and a period lasts 1); positions are taken relative to ``origin``. In
    these units HiGHS's absolute tolerances are far below the physical resolution needed.
    Unknowns: a_0..a_N, v_0..v_N, q_0..q_N (boundary values) and s_0..s_N >= |v_k| (used
    only by the tie-break objective of `_optimise`). Limits inside segments come only from
    cuts (pre-set rows at sample instants were tried: they did not save rounds).
    """

    def __init__(self, T: float, lim: ScalarLimits, n_periods: int, origin: float) -> None:
        self.T, self.lim, self.N, self.origin = T, lim, n_periods, origin
        self.ua, self.uv, self.uq = lim.jmax * T, lim.jmax * T ** 2, lim.jmax * T ** 3
        self.A, self.V = lim.amax / self.ua, lim.vmax / self.uv
        self.qmin, self.qmax = (lim.pmin - origin) / self.uq, (lim.pmax - origin) / self.uq
        N = n_periods
        self.n_var = 4 * (N + 1)
        k = np.arange(N)
        ia, iv, iq = self.ia, self.iv, self.iq
        one = np.ones(N)
        # dynamics: v_{k+1} - v_k - (a_k + a_{k+1})/2 = 0
        #           q_{k+1} - q_k - v_k - a_k/3 - a_{k+1}/6 = 0
        rows = np.concatenate([np.repeat(k, 4), np.repeat(N + k, 5)])
        cols = np.concatenate([
            np.stack([iv(k + 1), iv(k), ia(k), ia(k + 1)], 1).ravel(),
            np.stack([iq(k + 1), iq(k), iv(k), ia(k), ia(k + 1)], 1).ravel()])
        vals = np.concatenate([
            np.stack([one, -one, -one / 2, -one / 2], 1).ravel(),
            np.stack([one, -one, -one, -one / 3, -one / 6], 1).ravel()])
        self.A_eq = sp.csr_matrix((vals, (rows, cols)), shape=(2 * N, self.n_var))
        self.b_eq = np.zeros(2 * N)
        # jerk: +-(a_{k+1} - a_k) <= 1
        self.rows: list[tuple[np.ndarray, np.ndarray, float]] = []
        for kk in range(N):
            for sign in (1.0, -1.0):
                self.rows.append((np.array([ia(kk + 1), ia(kk)]), np.array([sign, -sign]), 1.0))
        for kk in range(N + 1):  # s_k >= +-v_k
            for sign in (1.0, -1.0):
                self.rows.append((np.array([self.iv(kk), self.i_s(kk)]),
                                  np.array([sign, -1.0]), 0.0))
        self.n_base = len(self.rows)

    def ia(self, k: Any) -> Any:
        """Column of a_k."""
        return k

    def iv(self, k: Any) -> Any:
        """Column of v_k."""
        return self.N + 1 + k

    def iq(self, k: Any) -> Any:
        """Column of q_k."""
        return 2 * (self.N + 1) + k

    def i_s(self, k: Any) -> Any:
        """Column of s_k (|v_k| bound for the tie-break objective)."""
        return 3 * (self.N + 1) + k

    def bounds(self, a0: float, v0: float | None,
               p0: float | None) -> list[tuple[float | None, float | None]]:
        """Variable bounds from physical initial values; ``None`` leaves v0 / p0 free."""
        N = self.N
        qb = (None if math.isinf(self.qmin) else self.qmin,
              None if math.isinf(self.qmax) else self.qmax)
        a0_ = a0 / self.ua
        b: list[tuple[float | None, float | None]] = [(a0_, a0_)]
        b += [(-self.A, self.A)] * (N - 1) + [(0.0, 0.0)]
        v0_ = None if v0 is None else v0 / self.uv
        b += [(v0_, v0_) if v0_ is not None else (-self.V, self.V)]
        b += [(-self.V, self.V)] * (N - 1) + [(0.0, 0.0)]
        q0_ = None if p0 is None else (p0 - self.origin) / self.uq
        b += [(q0_, q0_) if q0_ is not None else qb] + [qb] * N
        b += [(0.0, None)] * (N + 1)
        return b

    def add_cut(self, kind: str, k: int, t: float, sign: float, limit: float) -> None:
        """Row ``sign * x(t) <= sign * limit``, x = v or q at fraction t of segment k."""
        if kind == "v":   # v(t) = v_k + a_k (t - t^2/2) + a_{k+1} t^2/2
            cols = np.array([self.iv(k), self.ia(k), self.ia(k + 1)])
            vals = np.array([1.0, t - t * t / 2, t * t / 2])
        else:             # q(t) = q_k + v_k t + a_k (t^2/2 - t^3/6) + a_{k+1} t^3/6
            cols = np.array([self.iq(k), self.iv(k), self.ia(k), self.ia(k + 1)])
            vals = np.array([1.0, t, t * t / 2 - t ** 3 / 6, t ** 3 / 6])
        self.rows.append((cols, sign * vals, sign * limit))

    def solve(self, objective: np.ndarray, bounds: list, presolve: bool = True) -> Any:
        """One HiGHS solve with the base rows and the current cuts.

        A solve that ends in numerical trouble (status 4) is repeated without presolve.
        """
        rows = np.concatenate([np.full(len(c), i) for i, (c, _, _) in enumerate(self.rows)])
        cols = np.concatenate([c for c, _, _ in self.rows])
        vals = np.concatenate([v for _, v, _ in self.rows])
        A_ub = sp.csr_matrix((vals, (rows, cols)), shape=(len(self.rows), self.n_var))
        b_ub = np.array([b for _, _, b in self.rows])
        for attempt in (presolve, False):
            res = linprog(objective, A_ub=A_ub, b_ub=b_ub, A_eq=self.A_eq, b_eq=self.b_eq,
                          bounds=bounds, method="highs",
                          options={**HIGHS_OPTIONS, "presolve": attempt})
            if res.status != 4:
                break
        return res

    def trajectory(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Boundary (q, v, a) re-integrated exactly from the solution's a_k and v_0, q_0."""
        acc = x[: self.N + 1]
        vel = x[self.iv(0)] + np.concatenate([[0.0], np.cumsum((acc[:-1] + acc[1:]) / 2)])
        dq = vel[:-1] + (2 * acc[:-1] + acc[1:]) / 6
        pos = x[self.iq(0)] + np.concatenate([[0.0], np.cumsum(dq)])
        return pos, vel, acc

    def physical_violation(self, x: np.ndarray) -> float:
        """Largest normalised limit violation of the solution trajectory, physical units."""
        q, v, a = self.trajectory(x)
        lim = self.lim
        return float(max(0.0, np.max(segment_violations(
            self.origin + q[:-1] * self.uq, v[:-1] * self.uv, a[:-1] * self.ua,
            a[1:] * self.ua, self.T, lim.pmin, lim.pmax, lim.vmax, lim.amax, lim.jmax))))


#: (in-segment excess left uncut, certificate slack) in the LP's dimensionless units (see
#: `_Horizon`; the slack is relative to max(1, |optimum|)), finest first; see `_optimise`.
LEVELS = ((1e-11, 1e-12), (1e-10, 1e-11), (1e-9, 1e-10))
#: Tie-break solve attempts (band widening factor, HiGHS presolve): presolve can declare a
#: very thin band infeasible although the plain optimum lies in it; widening is the last resort.
CALM_ATTEMPTS = ((1.0, True), (1.0, False), (1e2, False), (1e4, False))


def _cuts(hz: _Horizon, x: np.ndarray, tol: float) -> list[tuple[str, int, float, float, float]]:
    """Cuts (`_Horizon.add_cut` arguments) for every in-segment extremum of solution ``x``
    that exceeds its limit by > tol (plus the float resolution at the limit's magnitude).

    Besides the cut at the extremum instant t*, two more go where the solution's curve
    re-enters the limit (t* +- w, w from the local curvature): plain Kelley cuts close the
    gap slowly, the bracket makes the next solutions' excess shrink fast.
    """
    pos, vel, acc = hz.trajectory(x)
    ext = segment_extrema(pos[:-1], vel[:-1], acc[:-1], acc[1:], 1.0)
    jerk = acc[1:] - acc[:-1]
    checks = [("v", "vmax", +1.0, hz.V), ("v", "vmin", -1.0, -hz.V)]
    if hz.lim.has_position:
        checks += [("q", "pmax", +1.0, hz.qmax), ("q", "pmin", -1.0, hz.qmin)]
    cuts = []
    for kind, key, sign, limit in checks:
        tk = ext["t_" + key]
        over = sign * (ext[key] - limit)
        floor = tol + 64.0 * np.finfo(float).eps * abs(limit)  # float resolution at the limit
        for k in np.flatnonzero((over > floor) & (tk > 0.0) & (tk < 1.0)):
            t = float(tk[k])
            curvature = abs(jerk[k]) if kind == "v" else abs(acc[k] + jerk[k] * t)
            w = math.sqrt(2.0 * over[k] / curvature) if curvature > 0.0 else 0.0
            for tc in (t, t - w, t + w):
                if 0.0 < tc < 1.0 and (tc == t or w > 1e-9):
                    cuts.append((kind, int(k), tc, sign, limit))
    return cuts


def _optimise(hz: _Horizon, column: int, sense: float, bounds: list,
              max_iter: int = 15) -> tuple[float, dict] | None:
    """Maximise (sense=+1) or minimise (sense=-1) one variable with cutting planes.

    Each round: (P) solve with the plain objective; its optimum ``z_outer`` is an outer
    bound (every cut is a true constraint) and if its trajectory has no in-segment excess
    it is exact. Otherwise (C) solve again with the variable held within ``slack`` of
    ``z_outer`` minimising sum |v_k| (a tie-break that picks a calm trajectory, braking
    early, no excursions along the limits). If that trajectory has no excess it certifies
    ``z`` (its value of the variable) as attainable: the exact optimum lies in
    ``[z, z_outer]`` (the band: ``slack``, widened only if HiGHS fails on it). Else both
    solutions are cut and the round
    repeats. Returns ``(z, info)`` in dimensionless units, or ``None`` when the LP is
    infeasible. ``LEVELS`` lists (excess tolerance, slack), finest first; after
    ``max_iter`` rounds without certificate the next level is used; info reports it (and
    ``gap``, the actual distance between ``z`` and ``z_outer``).
    """
    c_plain = np.zeros(hz.n_var)
    c_plain[column] = -sense
    c_calm = np.zeros(hz.n_var)
    c_calm[hz.i_s(0):] = 1.0
    history: list[float] = []
    it = 0
    for tol, slack in LEVELS:
        for _ in range(max_iter):
            it += 1
            res = hz.solve(c_plain, bounds)
            if res.status == 2:
                return None
            if res.status != 0:
                raise OracleError(f"HiGHS failed: status {res.status}: {res.message}")
            z_outer = float(res.x[column])
            history.append(z_outer)
            z, certificate = z_outer, None
            cuts = _cuts(hz, res.x, tol)
            if not cuts:
                certificate = res.x
            else:
                for widen, presolve in CALM_ATTEMPTS:  # HiGHS can fail on a very thin band
                    held = list(bounds)
                    band = widen * slack * max(1.0, abs(z_outer))
                    held[column] = ((z_outer - band, z_outer) if sense > 0
                                    else (z_outer, z_outer + band))
                    calm = hz.solve(c_calm, held, presolve)
                    if calm.status == 0:
                        break
                if calm.status == 0:
                    calm_cuts = _cuts(hz, calm.x, tol)
                    if not calm_cuts:
                        z, certificate = float(calm.x[column]), calm.x
                    cuts += calm_cuts
            if certificate is not None:
                info = {"iterations": it, "cuts": len(hz.rows) - hz.n_base, "cut_tol": tol,
                        "gap": abs(z_outer - z),
                        "max_violation": hz.physical_violation(certificate),
                        "last_change": abs(history[-1] - history[-2]) if len(history) > 1 else 0.0}
                return z, info
            for cut in cuts:
                hz.add_cut(*cut)
    raise OracleError(f"cutting planes did not converge in {it} iterations "
                      f"(last optima {history[-3:]})")


def _initial_ok(p: float | None, v: float | None, a: float, lim: ScalarLimits) -> bool:
    """The start state itself within limits (it is the first point of the first segment)."""
    if abs(a) > lim.amax or (v is not None and abs(v) > lim.vmax):
        return False
    return p is None or (lim.pmin <= p <= lim.pmax)


def admissible_interval(p: float, v: float, a: float, T: float, lim: ScalarLimits,
                        n_periods: int | None = None) -> tuple[float, float, dict] | None:
    """Exact admissible interval ``(lo, hi, info)`` of the next acceleration, or ``None``.

    ``lo``/``hi`` are attained by checked trajectories; the exact bounds lie at most
    ``info['gap']`` (rad/s^2) further out. ``None`` means the state is not viable (the LP
    is infeasible: no admissible decision leads to a state that can still come to rest
    within the limits; certified, since every constraint of the LP is a true constraint).
    ``info`` holds per bound (``'lo'``, ``'hi'``) the cutting-plane rounds
    (``iterations``), the number of cuts, the excess tolerance used (``cut_tol``), the
    ``gap``, the certifying trajectory's largest normalised violation (``max_violation``,
    as `segment_violations`) and the change of the optimum in the last round
    (``last_change``, rad/s^2); plus the overall maxima and the horizon used (periods).
    Positions are handled relative to ``p``.
    """
    if not _initial_ok(p, v, a, lim):
        return None
    hz = _Horizon(T, lim, n_periods or lim.horizon_periods(T, v), origin=p)
    bounds = hz.bounds(a, v, p)
    out = {}
    for name, sense in (("hi", +1.0), ("lo", -1.0)):
        res = _optimise(hz, hz.ia(1), sense, bounds)
        if res is None:
            if name == "lo":  # hi was feasible, so lo must be: numerical trouble
                raise OracleError(f"inconsistent LP at p={p!r} v={v!r} a={a!r} T={T!r} {lim}")
            return None
        value, info = res
        info["last_change"] *= hz.ua
        info["gap"] *= hz.ua
        out[name] = (value * hz.ua, info)
    info = {"horizon": hz.N, "hi": out["hi"][1], "lo": out["lo"][1],
            "max_violation": max(out["hi"][1]["max_violation"], out["lo"][1]["max_violation"]),
            "last_change": max(out["hi"][1]["last_change"], out["lo"][1]["last_change"]),
            "gap": max(out["hi"][1]["gap"], out["lo"][1]["gap"]),
            "iterations": out["hi"][1]["iterations"] + out["lo"][1]["iterations"]}
    return out["lo"][0], out["hi"][0], info


def is_viable(p: float, v: float, a: float, T: float, lim: ScalarLimits,
              n_periods: int | None = None) -> bool:
    """True when some admissible decision sequence from (p, v, a) reaches rest within limits."""
    if not _initial_ok(p, v, a, lim):
        return False
    hz = _Horizon(T, lim, n_periods or lim.horizon_periods(T, v), origin=p)
    return _optimise(hz, hz.ia(1), +1.0, hz.bounds(a, v, p)) is not None


def position_boundary(v: float, a: float, T: float, lim: ScalarLimits, side: int,
                      n_periods: int | None = None) -> float | None:
    """Largest (side=+1) or smallest (side=-1) position from which (p, v, a) is viable.

    Viability is linear in the initial position too, so this is one LP (with cuts) with
    ``p_0`` free. Positions are handled relative to the limit on that side. ``None`` when
    no position is viable for this (v, a).
    """
    if not lim.has_position:
        raise OracleError("position_boundary needs finite position limits")
    if not _initial_ok(None, v, a, lim):
        return None
    origin = lim.pmax if side > 0 else lim.pmin
    hz = _Horizon(T, lim, n_periods or lim.horizon_periods(T, v), origin=origin)
    res = _optimise(hz, hz.iq(0), float(side), hz.bounds(a, v, None))
    return None if res is None else origin + res[0] * hz.uq


def velocity_boundary(p: float, a: float, T: float, lim: ScalarLimits, side: int,
                      n_periods: int | None = None) -> float | None:
    """Largest (side=+1) or smallest (side=-1) velocity from which (p, v, a) is viable."""
    if not _initial_ok(p, None, a, lim):
        return None
    hz = _Horizon(T, lim, n_periods or lim.horizon_periods(T), origin=p)
    res = _optimise(hz, hz.iv(0), float(side), hz.bounds(a, None, p))
    return None if res is None else res[0] * hz.uv


def sample_viable_state(rng: np.random.Generator, T: float, lim: ScalarLimits,
                        max_tries: int = 200) -> tuple[float, float, float]:
    """A random viable state: uniform (p, v, a) in the limit box, kept when the LP says viable."""
    centre = 0.0 if not lim.has_position else 0.5 * (lim.pmin + lim.pmax)
    half = 2.0 * lim.vmax ** 2 / lim.amax if not lim.has_position else 0.5 * (lim.pmax - lim.pmin)
    for _ in range(max_tries):
        p = float(centre + half * rng.uniform(-1.0, 1.0))
        v = float(lim.vmax * rng.uniform(-1.0, 1.0))
        a = float(lim.amax * rng.uniform(-1.0, 1.0))
        if is_viable(p, v, a, T, lim):
            return p, v, a
    raise OracleError(f"no viable state found in {max_tries} draws for {lim}, T={T}")


def sample_boundary_state(rng: np.random.Generator, T: float, lim: ScalarLimits, kind: str,
                          max_tries: int = 50) -> tuple[float, float, float]:
    """A viable state close to the edge of the viable set, where limits narrow the interval.

    ``kind``: ``'position_max'`` / ``'position_min'`` (random v towards that side, random
    a; p found with `position_boundary`, then backed off towards the centre) or
    ``'velocity_max'`` / ``'velocity_min'`` (random p in the middle half of the range,
    random a mostly towards that side; v found with `velocity_boundary`, then backed off).
    Back-offs are log-uniform up to the size that moves the bound by about one jerk step
    ``J T`` (position ``J T^2 t_stop``, velocity ``J T^2``), so the narrowing ranges from
    slight to almost a single point.
    """
    side = {"position_max": 1, "position_min": -1, "velocity_max": 1, "velocity_min": -1}.get(kind)
    if side is None:
        raise OracleError(f"kind: expected position_max/position_min/velocity_max/velocity_min, "
                          f"got {kind!r}")
    t_stop = lim.vmax / lim.amax + 2.0 * lim.amax / lim.jmax
    for _ in range(max_tries):
        if kind.startswith("position"):
            a = float(lim.amax * rng.uniform(-1.0, 1.0))
            v = float(side * lim.vmax * rng.uniform(0.0, 1.0))
            edge = position_boundary(v, a, T, lim, side)
            if edge is None:
                continue
            p = edge - side * 10.0 ** rng.uniform(-2.0, 0.0) * lim.jmax * T * T * t_stop
            if not lim.pmin <= p <= lim.pmax:
                continue
        else:  # mostly accelerating towards the limit: decelerating states sit at |v| = V
            a = float(side * lim.amax * rng.uniform(-0.3, 1.0))
            centre = 0.0 if not lim.has_position else 0.5 * (lim.pmin + lim.pmax)
            half = 0.0 if not lim.has_position else 0.25 * (lim.pmax - lim.pmin)
            p = float(centre + half * rng.uniform(-1.0, 1.0))
            edge = velocity_boundary(p, a, T, lim, side)
            if edge is None:
                continue
            v = edge - side * 10.0 ** rng.uniform(-2.5, 0.0) * lim.jmax * T * T
        if is_viable(p, v, a, T, lim):
            return p, v, a
    raise OracleError(f"no viable {kind} state found in {max_tries} draws for {lim}, T={T}")


def jerk_box(a: float, T: float, lim: ScalarLimits) -> tuple[float, float]:
    """The plain jerk/acceleration box ``[max(-A, a - J T), min(A, a + J T)]``."""
    return max(-lim.amax, a - lim.jmax * T), min(lim.amax, a + lim.jmax * T)


BOUNDARY_KINDS = ("position_max", "position_min", "velocity_max", "velocity_min")


def narrowed_cases(rng: np.random.Generator, T: float, lim: ScalarLimits, per_kind: int
                   ) -> list[tuple[float, float, float, float, float, dict]]:
    """Viable near-boundary states whose exact interval is narrower than the jerk box.

    Draws ``per_kind`` states of each `sample_boundary_state` kind that applies (position
    kinds only with finite limits) and keeps those whose exact interval is narrower than
    `jerk_box` by more than 1e-6 of its width: ``(p, v, a, lo, hi, info)``.
    """
    kinds = BOUNDARY_KINDS if lim.has_position else BOUNDARY_KINDS[2:]
    cases = []
    for kind in kinds:
        for _ in range(per_kind):
            p, v, a = sample_boundary_state(rng, T, lim, kind)
            lo, hi, info = admissible_interval(p, v, a, T, lim)
            b_lo, b_hi = jerk_box(a, T, lim)
            if hi - lo < (1.0 - 1e-6) * (b_hi - b_lo):
                cases.append((p, v, a, lo, hi, info))
    return cases
