# SPDX-License-Identifier: Apache-2.0
"""A follower of plan messages written for the tests, independent of the package's code.

It implements the message semantics the plan output documents: a plan is knots (absolute
time in integer ns, position, velocity, acceleration per joint); a message applies from its
first knot's time on and replaces the previous one from there; between knots the motion is
the quintic Hermite interpolant of the two knots' p, v, a; after the last knot the arm
holds at the last position at rest. Messages are taken in the order they were received;
one received after its first knot's time would make a real driver jump, so `late` counts
them apart (a receive time in a bag is when the recorder got it, later than the driver
under load, so the follower itself does not use it beyond the order).

The quintic Hermite coefficients are derived from the six end conditions (from memory);
`test_plan_ahead.py` checks them against ``scipy.interpolate.BPoly.from_derivatives``.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PlanMessage:
    """One plan as the driver receives it: ``received_ns`` (arrival), knot times
    ``times_ns`` (m,) absolute, and ``p``, ``v``, ``a`` of shape (m, n)."""

    received_ns: int
    times_ns: np.ndarray
    p: np.ndarray
    v: np.ndarray
    a: np.ndarray

    @property
    def start_ns(self) -> int:
        return int(self.times_ns[0])


def hermite5(p0, v0, a0, p1, v1, a1, h: float, s):
    """(p, v, a, jerk) at ``s`` in [0, h] of the quintic with the given end values."""
    c0, c1, c2 = p0, v0, 0.5 * a0
    d = p1 - p0
    c3 = (20 * d - (8 * v1 + 12 * v0) * h - (3 * a0 - a1) * h * h) / (2 * h ** 3)
    c4 = (-30 * d + (14 * v1 + 16 * v0) * h + (3 * a0 - 2 * a1) * h * h) / (2 * h ** 4)
    c5 = (12 * d - 6 * (v1 + v0) * h + (a1 - a0) * h * h) / (2 * h ** 5)
    p = c0 + s * (c1 + s * (c2 + s * (c3 + s * (c4 + s * c5))))
    v = c1 + s * (2 * c2 + s * (3 * c3 + s * (4 * c4 + s * 5 * c5)))
    a = 2 * c2 + s * (6 * c3 + s * (12 * c4 + s * 20 * c5))
    j = 6 * c3 + s * (24 * c4 + s * 60 * c5)
    return p, v, a, j


def evaluate(msg: PlanMessage, t_ns: int) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                    np.ndarray]:
    """(p, v, a, jerk) of one plan at absolute time ``t_ns`` (at or after its start)."""
    times = msg.times_ns
    if t_ns >= times[-1]:
        z = np.zeros_like(msg.p[-1])
        return msg.p[-1].copy(), z, z.copy(), z.copy()
    i = int(np.searchsorted(times, t_ns, side="right")) - 1
    i = max(i, 0)
    h = (times[i + 1] - times[i]) * 1e-9
    s = (t_ns - times[i]) * 1e-9
    return hermite5(msg.p[i], msg.v[i], msg.a[i], msg.p[i + 1], msg.v[i + 1], msg.a[i + 1],
                    h, s)


def active(messages: list[PlanMessage], t_ns: int) -> int | None:
    """Index of the message in force at ``t_ns``: the last one (in receive order) whose
    first knot's time has come (None before the first)."""
    best = None
    for k, m in enumerate(messages):
        if m.start_ns <= t_ns:
            best = k
    return best


def late(messages: list[PlanMessage]) -> int:
    """How many messages were received after their first knot's time."""
    return sum(m.received_ns > m.start_ns for m in messages)


def follow(messages: list[PlanMessage], t0_ns: int, t1_ns: int, step_ns: int = 1_000_000
           ) -> dict[str, np.ndarray]:
    """Sample the followed motion every ``step_ns`` from ``t0_ns`` to ``t1_ns``: arrays
    ``t`` (s from t0), ``p``, ``v``, ``a``, ``j`` and ``msg`` (index in force, -1 none)."""
    ts = np.arange(t0_ns, t1_ns + 1, step_ns, dtype=np.int64)
    n = messages[0].p.shape[1]
    out = {k: np.full((ts.size, n), np.nan) for k in ("p", "v", "a", "j")}
    which = np.full(ts.size, -1)
    for i, t in enumerate(ts):
        k = active(messages, int(t))
        if k is None:
            continue
        which[i] = k
        out["p"][i], out["v"][i], out["a"][i], out["j"][i] = evaluate(messages[k], int(t))
    out["t"] = (ts - t0_ns) * 1e-9
    out["msg"] = which
    return out


def switch_differences(messages: list[PlanMessage]) -> list[tuple[np.ndarray, bool]]:
    """At every switch from one message in force to the next (at the later one's first knot
    time): the largest |difference| of p, v and a (3,) between the outgoing and the
    incoming plan there, and whether the outgoing plan had ended (it then holds its last
    knot's position at rest, and that knot is at rest only within the session's rest
    tolerances)."""
    out = []
    for k in range(1, len(messages)):
        t = messages[k].start_ns
        prev = active(messages[:k], t)
        if prev is None:
            continue
        old = evaluate(messages[prev], t)[:3]
        new = evaluate(messages[k], t)[:3]
        out.append((np.array([float(np.max(np.abs(x - y))) for x, y in zip(old, new)]),
                    bool(t >= messages[prev].times_ns[-1])))
    return out


def switch_jumps(messages: list[PlanMessage]) -> list[float]:
    """At every switch (`switch_differences`): the largest |difference| of p, v and a."""
    return [float(d.max()) for d, _ in switch_differences(messages)]
