# SPDX-License-Identifier: Apache-2.0
"""The limit stage: the exact interval of admissible next accelerations, per joint.

Discrete model (see `adaptive_streamer.core.segment`): from the state (p, v, a) at a
decision instant, the decision ``u`` is the acceleration one period ``T`` later, reached
with constant jerk. ``u`` is *admissible* when the segment keeps |jerk| <= J, |u| <= A,
|v(t)| <= V and pmin <= p(t) <= pmax, and the new state is *viable*: some sequence of later
admissible decisions keeps every limit forever. The admissible set is an interval [lo, hi].

How the interval is found:

* ``hi`` (from the upper limits) and ``lo`` (from the lower limits) are one problem in
  mirrored coordinates (p, v, a, u -> -p, -v, -a, -u; pmax -> -pmin), solved as one
  stacked array of 2n "upper bound" problems.
* The upper bound is decided by the *hardest braking continuation*: after the decision the
  acceleration falls by Jc·T per period (slope -Jc) down to -A, the last step being the
  shorter chord onto -A (the discrete model cannot switch jerk inside a period). It gives
  the pointwise smallest acceleration, velocity and position of all admissible
  continuations, so the new state is viable for the upper limits exactly when this
  continuation keeps v <= V and its highest point (where v falls through zero) is at or
  below pmax. From that point it recovers to rest through small negative velocities, which
  the construction-time checks guarantee is possible.
* Velocity (vectorised, closed form): the continuation peaks at ``v1 + u^2 / (2 Jc)``; with
  the in-segment peak when a > 0 > u.
* Position (only for joints that can reach a limit within one stop): the highest point
  ``M(u)`` is piecewise closed form (v falls through zero during the slope phase, the chord,
  or the -A phase, where ``M`` is exactly quadratic in ``u``), increasing and convex in
  ``u``; ``hi`` is its root. On a -A-phase piece the root is the exact quadratic root; on
  the other pieces Newton steps from the infeasible side (which never overshoot a convex
  increasing function) converge to it. This branchy search runs per joint in plain Python
  because, for the few joints near a limit, that is several times faster than masked numpy.

Conditions (checked at construction): the continuation uses jerk ``Jc = min(J, A/T)`` and
an acceleration bound ``A_eff <= A`` small enough that the reversal after the highest point
stays within the velocity limit (``A_eff T + A_eff^2 / (2 Jc) <= 0.9 V``); the position range
must be wide compared with the stopping distance (else `LimitStageError`). Where
``J T <= A`` and ``A T + A^2/(2 J) <= 0.9 V`` the interval is exact (``exact`` mask);
otherwise it is a safe inner interval. ``acceleration_limit`` is the bound the stage uses.

A state that is not viable (started outside the limits, or limits tightened) gets the best
recovery: the strongest braking decision towards the violated side, flagged ``viable=False``.
"""
from __future__ import annotations

import math

import numpy as np

from .limits import JointLimits
from .segment import MotionState

_MAX_ITER = 40



def normalised_onto(action: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Map ``action`` (clipped into [-1, 1]) linearly onto [lo, hi], elementwise: -1 gives
    ``lo`` and +1 gives ``hi`` exactly (the weighted form ``lo (1 - s) + hi s`` is exact at
    both ends, where ``lo + s (hi - lo)`` can miss ``hi`` by one rounding), and no result
    leaves [lo, hi]. NaN stays NaN."""
    s = 0.5 * (np.clip(action, -1.0, 1.0) + 1.0)
    return np.minimum(np.maximum(lo * (1.0 - s) + hi * s, lo), hi)

class LimitStageError(ValueError):
    """The limits and period cannot be handled safely, or inputs are malformed."""


class Admissible:
    """Result of `LimitStage.evaluate` (arrays of shape (n,)).

    ``lo``/``hi`` bound the admissible next acceleration; ``viable`` is False where the state
    cannot be kept within the limits, and there ``lo = hi = recovery`` (strongest braking
    towards the violated side). Where viable, ``recovery`` is the strongest braking decision
    inside [lo, hi] in the direction of motion (computed on first use).
    """

    __slots__ = ("lo", "hi", "viable", "_recovery", "_velocity")

    def __init__(self, lo: np.ndarray, hi: np.ndarray, viable: np.ndarray,
                 recovery: np.ndarray | None = None, velocity: np.ndarray | None = None) -> None:
        self.lo, self.hi, self.viable = lo, hi, viable
        self._recovery, self._velocity = recovery, velocity

    @property
    def recovery(self) -> np.ndarray:
        """Strongest braking decision (see the class docstring)."""
        if self._recovery is None:
            self._recovery = np.where(self._velocity > 0.0, self.lo, self.hi)
        return self._recovery

    def __repr__(self) -> str:
        return f"Admissible(lo={self.lo}, hi={self.hi}, viable={self.viable})"


class LimitStage:
    """Admissible next-acceleration intervals for joints with jerk-bounded decisions.

    Args:
        limits: joint limits (position range may be infinite per joint).
        period: decision period T [s].
    """

    def __init__(self, limits: JointLimits, period: float) -> None:
        if not (math.isfinite(period) and period > 0.0):
            raise LimitStageError(f"decision period must be positive and finite, got {period}")
        self.limits = limits
        self.period = T = float(period)
        n = self._n = len(limits)
        V, A, J = limits.velocity_max, limits.acceleration_max, limits.jerk_max
        A_eff = A.copy()
        with np.errstate(invalid="ignore", divide="ignore"):
            for _ in range(50):  # shrink A until the reversal after the highest point is recoverable
                Jc = np.minimum(J, A_eff / T)
                allowed = Jc * (-T + np.sqrt(T * T + 1.8 * V / Jc))
                if np.all(A_eff <= allowed * (1 + 1e-12)):
                    break
                A_eff = np.minimum(A_eff, allowed)
        unusable = ~(A_eff > 0.0)  # NaN too: a velocity limit lost in rounding (found by fuzzing)
        if unusable.any():
            i = int(np.argmax(unusable))
            raise LimitStageError(
                f"joint '{limits.names[i]}': velocity_max {V[i]:g}, acceleration_max {A[i]:g} "
                f"and jerk_max {J[i]:g} leave no usable acceleration at period {T:g} s")
        Jc = np.minimum(J, A_eff / T)
        self.acceleration_limit = A_eff
        self.continuation_jerk = Jc
        self.exact = (J * T <= A_eff * (1 + 1e-12)) & (A_eff >= A)
        two = lambda x: np.concatenate([x, x]).astype(float)  # noqa: E731
        self._V, self._A, self._Jc = two(V), two(A_eff), two(Jc)
        self._negA, self._JT, self._halfT = -self._A, two(J) * T, np.full(2 * n, 0.5 * T)
        self._JcT = self._Jc * T
        self._JcT_margin = self._JcT + 2e-10 * self._A
        self._JcT2, self._8Jc = self._JcT ** 2, 8.0 * self._Jc
        self._half = np.full(2 * n, 0.5)
        self._Vtol = self._V * (1 + 1e-12)
        self._utol = 1e-9 * self._A      # a state this close to the viability edge is viable
        self._umargin = 1e-10 * self._A  # bounds are pulled in by this much (rounding)
        self._zero = np.zeros(2 * n)
        pmax = np.concatenate([limits.position_max, -limits.position_min])
        self._pmax = pmax
        finite = np.isfinite(pmax)
        # nothing can reach a position limit from farther away than one full stop (with huge
        # limits `far` overflows to inf: every state then takes the exact near-limit path)
        with np.errstate(over="ignore", invalid="ignore"):
            far = self._V * (3 * T + 2 * self._A / self._Jc + self._V / self._A) * 1.05 + 1e-9
            self._near_from = np.where(finite, pmax - far, np.inf)
        self._ptol = (1e-13 * (np.where(finite, np.abs(pmax), 0.0) + 1.0)).tolist()
        self._pmax_tol = np.where(finite, pmax + 1e-12 * (np.abs(pmax) + 1.0), np.inf)
        self._consts = list(zip(self._A.tolist(), self._Jc.tolist(),
                                np.where(finite, pmax, np.inf).tolist()))
        self._check_range(limits)

    # ------------------------------------------------------------------ public API
    def admissible_range(self, position: np.ndarray, velocity: np.ndarray,
                         acceleration: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(lo, hi) of the admissible next acceleration per joint."""
        r = self.evaluate(position, velocity, acceleration)
        return r.lo, r.hi

    def evaluate(self, position: np.ndarray, velocity: np.ndarray,
                 acceleration: np.ndarray) -> Admissible:
        """Interval, viability flag and recovery decision per joint."""
        n = self._n
        P, Vv, Aa = self._stack(position), self._stack(velocity), self._stack(acceleration)
        box_hi = np.minimum(self._A, Aa + self._JT)
        box_lo = np.maximum(self._negA, Aa - self._JT)
        # velocity: K = end velocity for u = 0 minus V; K <= 0 -> root of v1 + u^2/(2 Jc) = V
        K = Vv + self._halfT * Aa - self._V
        U = self._JcT2 - self._8Jc * K
        np.maximum(U, self._zero, out=U)  # K > 0 entries are replaced below
        np.sqrt(U, out=U)
        U -= self._JcT_margin  # bounds are pulled in by the rounding margin
        U *= self._half
        over = K > self._zero
        if np.count_nonzero(over):
            U = np.where(over, _segment_peak_bound(Vv, Aa, self._V, self.period)
                         - self._umargin, U)
        np.minimum(U, box_hi, out=U)
        near = P > self._near_from
        pos_bad = None
        if np.count_nonzero(near):
            pos_bad = self._position_bound(P, Vv, Aa, U, box_lo, near.nonzero()[0])
        ok = U + self._utol >= box_lo
        ok &= Vv <= self._Vtol
        ok &= P <= self._pmax_tol
        if pos_bad is not None:
            ok[pos_bad] = False
        np.maximum(U, box_lo, out=U)  # within the tolerance of the edge: the jerk box wins
        hi = U[:n]
        lo = -U[n:]
        viable = ok[:n] & ok[n:]
        if np.count_nonzero(viable) == n:
            crossed = lo > hi
            if np.count_nonzero(crossed):  # both sides tight to rounding: one point
                mid = 0.5 * (lo + hi)
                viable = viable & (lo <= hi + self._utol[:n])
                lo, hi = np.where(crossed, mid, lo), np.where(crossed, mid, hi)
            if np.count_nonzero(viable) == n:
                return Admissible(lo, hi, viable, velocity=Vv[:n])
        recovery = self._recovery(Vv[:n], Aa[:n], box_lo, ok)
        viable = viable & (lo <= hi + self._utol[:n])
        mid = 0.5 * (lo + hi)
        crossed = lo > hi
        lo = np.where(viable, np.where(crossed, mid, lo), recovery)
        hi = np.where(viable, np.where(crossed, mid, hi), recovery)
        return Admissible(lo, hi, viable, np.where(viable, np.where(Vv[:n] > 0.0, lo, hi),
                                                   recovery))

    def clip(self, state: MotionState | tuple, proposed: np.ndarray) -> np.ndarray:
        """The proposed accelerations clipped into the admissible interval.

        A non-finite proposal is replaced by the braking decision.
        """
        r = self.evaluate(*state)
        out = np.minimum(np.maximum(np.asarray(proposed, float), r.lo), r.hi)
        bad = ~np.isfinite(out)
        if np.count_nonzero(bad):
            out = np.where(bad, self._braking_from(state, r), out)
        return out

    def map_normalised(self, state: MotionState | tuple, action: np.ndarray) -> np.ndarray:
        """Map an action in [-1, 1] (clipped; non-finite -> braking) onto [lo, hi]."""
        r = self.evaluate(*state)
        out = normalised_onto(np.asarray(action, float), r.lo, r.hi)
        bad = ~np.isfinite(out)
        if np.count_nonzero(bad):
            out = np.where(bad, self._braking_from(state, r), out)
        return out

    def braking(self, state: MotionState | tuple, admissible: Admissible | None = None
                ) -> np.ndarray:
        """The braking decision: the fastest admissible way towards rest.

        Decelerates as hard as the interval allows, ramps the acceleration out so that the
        joint arrives at rest without reversing (the mirrored velocity bound with a zero
        velocity limit), and finishes with an exact two-period stop once that is admissible.
        ``admissible`` may pass an already computed `evaluate` result for ``state``.
        """
        return self._braking_from(state, admissible or self.evaluate(*state))

    # ------------------------------------------------------------------ internals
    def _stack(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, float)
        if x.shape != (self._n,):
            raise LimitStageError(f"expected {self._n} values (joints {list(self.limits.names)}), "
                                  f"got shape {x.shape}")
        return np.concatenate((x, -x))

    def _braking_from(self, state: MotionState | tuple, r: Admissible) -> np.ndarray:
        _, v, a = (np.asarray(x, float) for x in state)
        T, n = self.period, self._n
        Jc, A, JT = self._Jc[:n], self._A[:n], self._JT[:n]
        coast = v + a * np.abs(a) / (2.0 * Jc)  # velocity once the acceleration is ramped out
        s = np.where(coast > 0.0, 1.0, -1.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            K = -s * v - s * a * 0.5 * T
            no_rev = np.sqrt(Jc * Jc * T * T - 8.0 * Jc * K) - Jc * T
            no_rev = 0.5 * no_rev
            no_rev = np.where(K > 0.0, _segment_peak_bound(-s * v, -s * a, 0.0, T), no_rev)
            no_rev = -s * no_rev
        no_rev = np.where((s * v > 0.0) & np.isfinite(no_rev), no_rev, -s * A)
        dead = -(v + 0.5 * T * a) / T  # two-period stop: v2 = 0 with a2 = 0
        dead_ok = (np.abs(dead - a) <= JT) & (np.abs(dead) <= JT)
        u = np.where(dead_ok, dead, no_rev)
        return np.minimum(np.maximum(u, r.lo), r.hi)

    def _recovery(self, v: np.ndarray, a: np.ndarray, box_lo: np.ndarray, ok: np.ndarray
                  ) -> np.ndarray:
        n = self._n
        down, up = box_lo[:n], -box_lo[n:]  # strongest braking down / up
        bad_up, bad_dn = ~ok[:n], ~ok[n:]
        coast = v + a * np.abs(a) / (2.0 * self._Jc[:n])
        toward_down = np.where(bad_up & ~bad_dn, True,
                               np.where(bad_dn & ~bad_up, False, coast > 0.0))
        return np.where(toward_down, down, up)

    def _position_bound(self, P: np.ndarray, Vv: np.ndarray, Aa: np.ndarray, U: np.ndarray,
                        box_lo: np.ndarray, idx: np.ndarray) -> list[int]:
        """Lower U in place where the position limit binds; returns non-viable indices."""
        T, consts, ptol = self.period, self._consts, self._ptol
        Pl, Vl, Al, Ul, Ll = P.tolist(), Vv.tolist(), Aa.tolist(), U.tolist(), box_lo.tolist()
        margin = self._umargin.tolist()
        bad = []
        for i in idx.tolist():
            A, Jc, pmax = consts[i]
            u = Ul[i]
            root = _position_root(Pl[i], Vl[i], Al[i], u, Ll[i], T, A, Jc, pmax, ptol[i], margin[i])
            if root is None:
                bad.append(i)
            elif root < u:
                U[i] = root
        return bad

    def _check_range(self, limits: JointLimits) -> None:
        """Refuse position ranges too narrow to brake in from either side."""
        n, T = self._n, self.period
        for i in range(n):
            width = limits.position_max[i] - limits.position_min[i]
            if not math.isfinite(width):
                continue
            A, Jc, V = float(self._A[i]), float(self._Jc[i]), float(self._V[i])
            stop = _highest_point(0.0, V, 0.0, max(-A, -float(self._JT[i])), T, A, Jc)[0]
            reversal = (A * T + A * A / (2 * Jc)) * (2 * T + A / Jc)
            need = 2.2 * (stop + reversal)
            if width < need:
                raise LimitStageError(
                    f"joint '{limits.names[i]}': position range {width:.4g} rad is too narrow "
                    f"for its velocity/acceleration/jerk limits at period {T:g} s (needs at "
                    f"least {need:.4g} rad to brake safely from either side); lower velocity_max "
                    "or acceleration_max, or widen the range")


def _segment_peak_bound(v: np.ndarray, a: np.ndarray, V: np.ndarray | float, T: float
                        ) -> np.ndarray:
    """Largest u < 0 keeping the in-segment velocity peak ``v + a^2 T / (2 (a - u))`` <= V.

    Used when even u = 0 ends the segment above V (so u must be negative and a > 0).
    """
    room = V - v
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(room > 0.0, a - a * a * T / (2.0 * room), -np.inf)


def _slope_phase(p1: float, v1: float, u: float, m: int, T: float, Jc: float
                 ) -> tuple[float, float, float, float, float]:
    """State after ``m`` full periods at jerk -Jc from state 1: (pA, vA, b, dpA, dvA)."""
    tau = m * T
    vA = v1 + tau * (u - 0.5 * Jc * tau)
    pA = p1 + tau * (v1 + tau * (0.5 * u - Jc * tau / 6.0))
    dv1 = 0.5 * T
    return pA, vA, u - Jc * tau, T * T / 6.0 + dv1 * tau + 0.5 * tau * tau, dv1 + tau


def _piece(p0: float, v0: float, a0: float, u: float, m: int, T: float, A: float, Jc: float
           ) -> tuple:
    """The -A-phase piece for ``m`` full slope periods, at ``u``: (m, pB, vB, dpB, dvB).

    On a piece, pB and vB (state when the acceleration reaches -A) are affine in u, so the
    highest point pB + vB^2 / (2A) is exactly quadratic in u.
    """
    p1 = p0 + T * v0 + T * T * (2.0 * a0 + u) / 6.0
    v1 = v0 + 0.5 * T * (a0 + u)
    pA, vA, b, dpA, dvA = _slope_phase(p1, v1, u, m, T, Jc)
    return (m, pA + T * vA + T * T * (2.0 * b - A) / 6.0, vA + 0.5 * T * (b - A),
            dpA + dvA * T + T * T / 3.0, dvA + 0.5 * T)


def _highest_point(p0: float, v0: float, a0: float, u: float, T: float, A: float, Jc: float
                   ) -> tuple[float, float, tuple | None]:
    """Highest position M(u) of segment 0 followed by the hardest braking continuation.

    Returns ``(M, dM/du, piece)``; ``piece`` is ``(m, pB, vB, dpB, dvB)`` when v falls
    through zero during the -A phase (where M is quadratic in u), else None. dM/du is the
    partial derivative at the fixed crossing time (the crossing-time term vanishes, v = 0).
    """
    TT = T * T
    p1 = p0 + T * v0 + TT * (2.0 * a0 + u) / 6.0
    v1 = v0 + 0.5 * T * (a0 + u)
    dp1, dv1 = TT / 6.0, 0.5 * T
    M, dM, piece = p1, dp1, None
    vpk = v1 + u * u / (2.0 * Jc) if u > 0.0 else v1
    if vpk > 0.0:
        m = max(math.floor((u + A) / (Jc * T)), 0)
        pA, vA, b, dpA, dvA = _slope_phase(p1, v1, u, m, T, Jc)
        if vA <= 0.0:  # falls through zero during the slope phase (jerk -Jc from state 1)
            s = math.sqrt(max(u * u + 2.0 * Jc * v1, 0.0))
            w = u + s if u > 0.0 else 2.0 * Jc * v1 / (s - u)  # = Jc * t*
            t = w / Jc
            M = p1 + w * w * (2.0 * s - u) / (6.0 * Jc * Jc)
            dM = dp1 + dv1 * t + 0.5 * t * t
        else:
            vB = vA + 0.5 * T * (b - A)
            if vB > 0.0:  # during the -A phase
                pB = pA + T * vA + TT * (2.0 * b - A) / 6.0
                dvB = dvA + 0.5 * T
                dpB = dpA + dvA * T + TT / 3.0
                M = pB + vB * vB / (2.0 * A)
                dM = dpB + vB * dvB / A
                piece = (m, pB, vB, dpB, dvB)
            else:  # during the chord (jerk -Jb, Jb = (b + A)/T >= 0, from b <= 0)
                Jb = (b + A) / T
                sb = math.sqrt(b * b + 2.0 * Jb * vA)
                t = 2.0 * vA / (sb - b)
                M = pA + t * (vA + t * (0.5 * b - Jb * t / 6.0))
                dM = dpA + dvA * t + 0.5 * t * t - t ** 3 / (6.0 * T)
    if v0 > 0.0 and v0 + T * min(a0, u, 0.0) < 0.0:
        # v may fall through zero inside segment 0: that local peak can be the highest
        j = (u - a0) / T
        for t in _roots(0.5 * j, a0, v0):
            if 0.0 < t <= T and a0 + j * t <= 0.0:
                pt = p0 + t * (v0 + t * (0.5 * a0 + j * t / 6.0))
                if pt > M:
                    M, dM, piece = pt, t ** 3 / (6.0 * T), None
                elif piece is not None:
                    piece = None  # the piece formula alone no longer describes M nearby
    return M, dM, piece


def _roots(qa: float, qb: float, qc: float) -> tuple[float, ...]:
    """Real roots of qa t^2 + qb t + qc (numerically stable)."""
    if qa == 0.0:
        return (-qc / qb,) if qb != 0.0 else ()
    disc = qb * qb - 4.0 * qa * qc
    if disc < 0.0:
        return ()
    q = -0.5 * (qb + math.copysign(math.sqrt(disc), qb))
    return (q / qa, qc / q) if q != 0.0 else (0.0,)


def _piece_root(piece: tuple, u: float, pmax: float, A: float, Jc: float, T: float
                ) -> float | None:
    """Exact root of pB + vB^2/(2A) = pmax on ``piece`` if it lies on that piece."""
    m, pB, vB, dpB, dvB = piece
    qa = dvB * dvB
    qb = 2.0 * (vB * dvB + A * dpB)
    qc = vB * vB + 2.0 * A * (pB - pmax)
    disc = qb * qb - 4.0 * qa * qc
    if disc < 0.0 or qb <= 0.0:
        return None
    # root on the increasing branch, stable for either sign of qc
    r = u - 2.0 * qc / (qb + math.sqrt(disc))
    return r if vB + dvB * (r - u) > 0.0 else None


def _exact_root(p: float, v: float, a: float, piece: tuple | None, x: float, T: float,
                A: float, Jc: float, pmax: float) -> float | None:
    """The exact root reached by hopping along -A-phase pieces from ``piece`` (taken at
    ``x``), or None when the root is not on such a piece."""
    for _ in range(4):  # at most 3 pieces lie inside the jerk box
        if piece is None:
            return None
        r = _piece_root(piece, x, pmax, A, Jc, T)
        if r is None:
            return None
        m_r = max(math.floor((r + A) / (Jc * T)), 0)
        if m_r == piece[0]:
            # valid unless v may fall through zero inside segment 0 (another local peak)
            return None if v > 0.0 and v + T * min(a, r, 0.0) < 0.0 else r
        piece, x = _piece(p, v, a, r, m_r, T, A, Jc), r
        if piece[2] <= 0.0:
            return None
    return None


def _position_root(p: float, v: float, a: float, u: float, lo: float, T: float, A: float,
                   Jc: float, pmax: float, ptol: float, umargin: float) -> float | None:
    """Largest verified-feasible u' <= u with M(u') <= pmax, or None when even ``lo`` fails
    (by more than ``ptol``, the rounding tolerance for a state on the viability edge).

    Exact piece roots where they apply; otherwise Newton steps from the infeasible side
    (never past the root of a convex increasing function), safeguarded by bisection towards a
    known feasible point. Results are pulled in by ``umargin`` (far below any width that
    matters) so that a successor state reached by deciding exactly the bound stays viable
    despite rounding; a Newton result is verified before it is returned.
    """
    M, dM, piece = _highest_point(p, v, a, u, T, A, Jc)
    if M - pmax <= 0.0:
        return u
    r = _exact_root(p, v, a, piece, u, T, A, Jc, pmax)
    if r is not None:
        return r - umargin
    x_i, g_i, d_i = u, M - pmax, dM
    x_f: float | None = None
    step_tol = 1e-13 * (abs(u) + A)
    for _ in range(_MAX_ITER):
        x = x_i - g_i / d_i if d_i > 0.0 else -math.inf
        if x_f is None and x <= lo:
            M, _, _ = _highest_point(p, v, a, lo, T, A, Jc)
            if M - pmax > ptol:
                return None
            x_f = lo
        if x_f is not None and not x_f < x < x_i:
            x = 0.5 * (x_f + x_i)
        if x_i - x <= step_tol:  # converged from the infeasible side: step back and verify
            x = x_i - umargin
            if x_f is not None and x <= x_f:
                return x_f
        M, dM, piece = _highest_point(p, v, a, x, T, A, Jc)
        g = M - pmax
        if g <= 0.0:  # strictly feasible: a decision never relies on the state tolerance
            if x_i - x <= umargin * 1.000001:
                return x
            r = _exact_root(p, v, a, piece, x, T, A, Jc, pmax)
            if r is not None and x <= r - umargin:
                return r - umargin
            x_f = x
        else:
            r = _exact_root(p, v, a, piece, x, T, A, Jc, pmax)
            if r is not None:
                return r - umargin
            x_i, g_i, d_i = x, g, dM
        if x_f is not None and x_i - x_f <= step_tol:
            return x_f
    return x_f
