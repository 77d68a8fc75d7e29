# SPDX-License-Identifier: Apache-2.0
"""The last guard on every outgoing setpoint.

Whatever produced it, a setpoint leaves only if it is finite, inside the position, velocity
and acceleration limits, and continuous with the previous one (the first one of a stream
must be at rest): the position, velocity and
acceleration steps since the previous setpoint must be within what the velocity,
acceleration and jerk limits allow over the elapsed time. A failure names the joint and
what was wrong; the adapter then stops (and counts it).

The elapsed time is the smaller of the stamps' step and, when the caller knows it, the real
time since the previous setpoint actually left (a monotonic clock) plus ``jitter``: a
setpoint whose stamp is far ahead of the previous one but that follows it within a few
milliseconds (the previous one left late, or the stamps' clock jumped) is judged over the
real time, so a jump is refused even when the stamps are far apart.
"""
from __future__ import annotations

import math

import numpy as np

from .limits import JointLimits
from .segment import MotionState

REL_TOL = 1e-6


class SetpointGuard:
    """Checks successive setpoints against ``limits`` (relative tolerance ``REL_TOL``).

    Args:
        limits: the hardware limits.
        jitter: slack [s] added to the real time since the previous setpoint left (the
            timing jitter of a sent setpoint; see the module docstring).
    """

    def __init__(self, limits: JointLimits, jitter: float = 0.0) -> None:
        if not (math.isfinite(jitter) and jitter >= 0.0):
            raise ValueError(f"stream_jitter must be a non-negative time [s], got {jitter!r}")
        self.jitter = float(jitter)
        self.limits = limits
        self._pmin = limits.position_min - REL_TOL * (1 + np.abs(limits.position_min))
        self._pmax = limits.position_max + REL_TOL * (1 + np.abs(limits.position_max))
        self._v = limits.velocity_max * (1 + REL_TOL)
        self._a = limits.acceleration_max * (1 + REL_TOL)
        self._j = limits.jerk_max * (1 + REL_TOL)
        self._prev: tuple[float, MotionState] | None = None
        self.failures = 0

    def reset(self) -> None:
        """Forget the previous setpoint (a new stream starts)."""
        self._prev = None

    def check(self, t: float, sp: MotionState, since_sent: float | None = None) -> str | None:
        """None if ``sp`` at time ``t`` may go out, else the reason (and it is counted).

        ``since_sent``: real time [s] since the previous setpoint left (None: unknown, the
        stamps alone measure the elapsed time)."""
        reason = self._reason(t, sp, since_sent)
        if reason is None:
            self._prev = (t, sp)
        else:
            self.failures += 1
        return reason

    def check_all(self, t: np.ndarray, p: np.ndarray, v: np.ndarray, a: np.ndarray,
                  limit: int) -> list[tuple[int, str]]:
        """`check` of the setpoints ``(t[i], p[i], v[i], a[i])`` in order, vectorised over
        the rows that pass: (row, reason) of the failures, up to ``limit`` of them (the rows
        after the last one reported are then left unchecked)."""
        failures: list[tuple[int, str]] = []
        start = 0
        while start < len(t) and len(failures) < limit:
            bad = self._first_bad(t[start:], p[start:], v[start:], a[start:])
            if bad is None:
                self._prev = (float(t[-1]), MotionState(p[-1], v[-1], a[-1]))
                break
            i = start + bad
            if bad > 0:
                self._prev = (float(t[i - 1]), MotionState(p[i - 1], v[i - 1], a[i - 1]))
            reason = self.check(float(t[i]), MotionState(p[i], v[i], a[i]))
            if reason is not None:
                failures.append((i, reason))
            start = i + 1
        return failures

    def _first_bad(self, t: np.ndarray, p: np.ndarray, v: np.ndarray,
                   a: np.ndarray) -> int | None:
        """Row of the first setpoint `_reason` refuses (stamps alone measure the elapsed time)
        when every row before it passed."""
        bad = ~(np.isfinite(p).all(axis=1) & np.isfinite(v).all(axis=1)
                & np.isfinite(a).all(axis=1))
        bad |= ((p < self._pmin) | (p > self._pmax) | (np.abs(v) > self._v)
                | (np.abs(a) > self._a)).any(axis=1)
        if self._prev is None:
            bad[0] |= bool(np.any((np.abs(v[0]) > self._v * 1e-9)
                                  | (np.abs(a[0]) > self._a * 1e-9)))
            first, t0, p0, v0, a0 = 1, t[:-1], p[:-1], v[:-1], a[:-1]
        else:
            tp, (pp, vp, ap) = self._prev
            first = 0
            t0 = np.concatenate(([tp], t[:-1]))
            p0, v0, a0 = (np.vstack((x[None], y[:-1])) for x, y in ((pp, p), (vp, v), (ap, a)))
        if len(t) > first:
            tn = t[first:]
            dt = tn - t0
            span = (dt + 2.0 * np.spacing(np.abs(tn)))[:, None]
            slack = 1e-9
            bad[first:] |= (dt <= 0.0) | (
                (np.abs(p[first:] - p0) > self._v * span + slack)
                | (np.abs(v[first:] - v0) > self._a * span + slack)
                | (np.abs(a[first:] - a0) > self._j * span + slack)).any(axis=1)
        hits = np.flatnonzero(bad)
        return int(hits[0]) if len(hits) else None

    def _reason(self, t: float, sp: MotionState, since_sent: float | None) -> str | None:
        p, v, a = sp
        names = self.limits.names
        for label, x in (("position", p), ("velocity", v), ("acceleration", a)):
            bad = ~np.isfinite(x)
            if bad.any():
                return f"setpoint {label} of joint '{names[int(np.argmax(bad))]}' is not finite"
        for label, bad in (("position below its minimum", p < self._pmin),
                           ("position above its maximum", p > self._pmax),
                           ("velocity over its limit", np.abs(v) > self._v),
                           ("acceleration over its limit", np.abs(a) > self._a)):
            if bad.any():
                i = int(np.argmax(bad))
                return f"setpoint {label} on joint '{names[i]}' (p={p[i]:.6g}, v={v[i]:.6g}, a={a[i]:.6g})"
        if self._prev is None:  # a new stream starts at rest
            moving = (np.abs(v) > self._v * 1e-9) | (np.abs(a) > self._a * 1e-9)
            if moving.any():
                i = int(np.argmax(moving))
                return (f"first setpoint of a stream on joint '{names[i]}' is not at rest "
                        f"(v={v[i]:.6g}, a={a[i]:.6g})")
            return None
        t0, (p0, v0, a0) = self._prev
        dt = t - t0
        if dt <= 0.0:
            return f"setpoint time {t:.6f} s does not advance past {t0:.6f} s"
        slack = 1e-9
        # Setpoint and segment times are absolute ROS times in float64, each known only to
        # its spacing (2.4e-7 s at today's epoch, 1e-4 of a 2 ms tick): the steps are
        # allowed over dt plus two spacings, or a plan at exactly its limit fails here.
        span = dt + 2.0 * float(np.spacing(abs(t)))
        if since_sent is not None:
            span = min(span, max(0.0, since_sent) + self.jitter)
        for label, step, bound in (
                ("position", np.abs(p - p0), self._v * span + slack),
                ("velocity", np.abs(v - v0), self._a * span + slack),
                ("acceleration", np.abs(a - a0), self._j * span + slack)):
            bad = step > bound
            if bad.any():
                i = int(np.argmax(bad))
                return (f"setpoint {label} jumps by {step[i]:.6g} on joint '{names[i]}' in "
                        f"{dt * 1e3:.3f} ms of stamps, {span * 1e3:.3f} ms judged (at most "
                        f"{bound[i]:.6g} allowed)")
        return None
