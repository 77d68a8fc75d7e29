# SPDX-License-Identifier: Apache-2.0
"""The plan-ahead output: the committed motion as knots for a trajectory-following driver.

After every committed decision (the segment ``[t_k, t_k + T]``) the adapter sends its whole
plan from the decision instant on: the knot at ``t_k`` (the state the driver is already
heading to), the knot at ``t_k + T`` (the end of the committed segment), then the braking
continuation to rest that the session will commit if the next decision comes late, one knot
per decision boundary, the last one at rest. Knots carry position, velocity and
acceleration; between two knots the motion is one constant-jerk segment, which a quintic
Hermite interpolation of the two knots (p, v, a at both ends) reproduces exactly (a cubic is
a quintic, and the Hermite interpolant of degree five is unique).

Message semantics (the driver's side): a new plan replaces the previous one from its first
knot's time on; before that time the previous plan still applies; after the last knot the
arm holds at rest there. The session keeps its end of the bargain (`StreamingSession`): a
decision is committed, and its plan sent, at least ``plan_lead`` before its instant, or it
is dropped and the segment is taken from the sent continuation, so what was last sent is
always the committed plan.

The continuation is the cycle's own braking decision applied from state to state
(`adaptive_streamer.core.limit_stage.LimitStage.braking`), the same function a late
decision commits, so it is within every limit by the limit stage's guarantee.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .limit_stage import Admissible, LimitStage
from .segment import MotionState

MAX_TAIL_SEGMENTS = 2000   # a braking continuation longer than this is refused (100 s at 50 ms)


class PlanAheadError(RuntimeError):
    """The braking continuation did not reach rest within `MAX_TAIL_SEGMENTS` periods."""


@dataclass(frozen=True)
class PlanKnots:
    """One plan message's content. Times are integer nanoseconds on the plan's grid
    (`PlanGrid`), so that consecutive messages put the same instant at the same time
    exactly: ``stamp_ns`` is the absolute time of knot 0, knot ``i`` is at ``stamp_ns + i *
    period_ns``. Per knot the joints' position, velocity and acceleration, shape (m, n).
    ``tail`` holds the decisions of the braking continuation after the committed segment
    (one per period, in order)."""

    stamp_ns: int
    period_ns: int
    positions: np.ndarray
    velocities: np.ndarray
    accelerations: np.ndarray
    tail: tuple[np.ndarray, ...]

    @property
    def offsets_ns(self) -> list[int]:
        """Knot times from ``stamp_ns`` [ns]: 0, T, 2T, ..."""
        return [i * self.period_ns for i in range(len(self.positions))]

    @property
    def end_ns(self) -> int:
        """Absolute time of the last knot [ns] (the plan is at rest from there on)."""
        return self.stamp_ns + (len(self.positions) - 1) * self.period_ns


@dataclass(frozen=True)
class PlanGrid:
    """Decision instants as integer nanoseconds: ``t0_ns + k * period_ns``, anchored at the
    plan's first instant ``t0`` [s]. The session's float instants (which gather rounding as
    they add up) are mapped onto the grid by their index ``k``."""

    t0: float
    t0_ns: int
    period: float
    period_ns: int

    @classmethod
    def anchored(cls, t0: float, period: float) -> "PlanGrid":
        """The grid through ``t0`` (rounded to the microsecond, so that the same instant
        reached by float sums that differ in the last bit anchors the same grid) with
        spacing ``period`` (both in seconds)."""
        return cls(float(t0), int(round(t0 * 1e6)) * 1000, float(period),
                   int(round(period * 1e9)))

    def ns(self, t: float) -> int:
        """The grid time [ns] of the decision instant nearest ``t`` [s]."""
        return self.t0_ns + round((t - self.t0) / self.period) * self.period_ns


@dataclass(frozen=True)
class BrakingTail:
    """The braking decisions from a state until at rest, the state after each, and the
    limit stage's interval at the starting state (None when it was already at rest)."""

    decisions: list[np.ndarray]
    states: list[MotionState]
    first: Admissible | None


def braking_tail(stage: LimitStage, state: MotionState, rest_velocity: float,
                 rest_acceleration: float) -> BrakingTail:
    """The braking decisions from ``state`` until at rest (`BrakingTail`).

    At rest means every joint within ``rest_velocity`` and ``rest_acceleration``; a state
    already at rest gives no decision. Raises `PlanAheadError` when rest is not reached
    within `MAX_TAIL_SEGMENTS` periods (only possible from a state outside the limits).
    The states follow the constant-jerk closed forms of `adaptive_streamer.core.segment`
    (`integrate`, written out here: this loop is the plan output's cost per decision).
    """
    decisions: list[np.ndarray] = []
    states: list[MotionState] = []
    first = None
    T = stage.period
    p, v, a = state
    while np.max(np.abs(v)) > rest_velocity or np.max(np.abs(a)) > rest_acceleration:
        if len(decisions) >= MAX_TAIL_SEGMENTS:
            raise PlanAheadError(f"the braking continuation did not reach rest within "
                                 f"{MAX_TAIL_SEGMENTS} periods ({MAX_TAIL_SEGMENTS * T:g} s)")
        r = stage.evaluate(p, v, a)
        first = first or r
        u = stage.braking((p, v, a), r)
        p, v, a = p + T * v + T * T * (2.0 * a + u) / 6.0, v + 0.5 * T * (a + u), u
        decisions.append(u)
        states.append(MotionState(p, v, a))
    return BrakingTail(decisions, states, first)


@dataclass(frozen=True)
class PlanBuild:
    """A plan message and the limit stage's interval at its committed segment's end state
    (the next decision's state; None when at rest), which the next decision can reuse."""

    knots: PlanKnots
    end_admissible: Admissible | None


def plan_knots(grid: PlanGrid, start: float, state: MotionState, end: MotionState,
               stage: LimitStage, rest_velocity: float, rest_acceleration: float) -> PlanBuild:
    """The plan message for the segment committed at ``start`` from ``state`` to ``end``
    (its end state): that segment's two knots, then the braking continuation to rest."""
    tail = braking_tail(stage, end, rest_velocity, rest_acceleration)
    knots = [state, end, *tail.states]
    return PlanBuild(PlanKnots(grid.ns(start), grid.period_ns,
                               np.array([k.position for k in knots], float),
                               np.array([k.velocity for k in knots], float),
                               np.array([k.acceleration for k in knots], float),
                               tuple(tail.decisions)),
                     tail.first)
