# SPDX-License-Identifier: Apache-2.0
"""Braking with the limit stage against ruckig's time-optimal stop.

Reference: the ruckig library (PyPI), velocity control interface with target v = 0, a = 0
and the joint's acceleration and jerk limits: the time-optimal jerk-limited stop in
continuous time, a lower bound on any stop (no position target). Repeated
`LimitStage.braking` decisions, integrated segment by segment with the reference's own
closed forms (test/oracle_lp.py), must reach rest, never faster than ruckig and at most a
few periods slower, with zero limit violations (analytic segment checker).
"""
from __future__ import annotations

import math
import zlib

import numpy as np
import pytest
from ruckig import ControlInterface, InputParameter, Result, Ruckig, Trajectory

import oracle_lp as o
from adaptive_streamer.core.limit_stage import LimitStage

TOL = 1e-9
MAX_LATE_PERIODS = 4


def seed(*parts: object) -> int:
    """Deterministic seed from the test parameters."""
    return zlib.crc32(repr(parts).encode())


def ruckig_stop_time(v: float, a: float, lim: o.ScalarLimits) -> float:
    """Duration of ruckig's time-optimal stop from (v, a) (velocity interface)."""
    inp = InputParameter(1)
    inp.control_interface = ControlInterface.Velocity
    inp.current_position, inp.current_velocity, inp.current_acceleration = [0.0], [v], [a]
    inp.target_velocity, inp.target_acceleration = [0.0], [0.0]
    inp.max_velocity, inp.max_acceleration, inp.max_jerk = [lim.vmax], [lim.amax], [lim.jmax]
    traj = Trajectory(1)
    result = Ruckig(1).calculate(inp, traj)
    assert result in (Result.Working, Result.Finished), result
    return traj.duration


def brake_to_rest(lims: list[o.ScalarLimits], T: float, p, v, a, max_steps: int) -> dict:
    """Repeated stage braking; returns periods to rest per joint and the worst violation."""
    stage = LimitStage(o.to_joint_limits(lims), T)
    pmin, pmax, V, A, J = (np.array([getattr(x, f) for x in lims])
                           for f in ("pmin", "pmax", "vmax", "amax", "jmax"))
    steps = np.full(len(lims), -1)
    worst = -np.inf
    for k in range(1, max_steps + 1):
        r = stage.evaluate(p, v, a)
        assert r.viable.all(), np.flatnonzero(~r.viable)
        u = stage.braking((p, v, a), r)
        worst = max(worst, float(o.segment_violations(p, v, a, u, T, pmin, pmax, V, A, J).max()))
        p, v, a = o.integrate_segment(p, v, a, u, T)
        rest = (np.abs(v) <= 1e-9 * V) & (np.abs(a) <= 1e-9 * A)
        steps = np.where((steps < 0) & rest, k, steps)
        # once at rest it stays at rest
        assert np.all(rest | (steps < 0) | (steps == k)), "left rest after reaching it"
        if np.all(steps > 0) and k > steps.max() + 3:
            break
    return {"steps": steps, "worst": worst, "p": p}


def random_states(lims: list[o.ScalarLimits], T: float, rng: np.random.Generator):
    """Random (v, a) at mid-range positions that the stage accepts as viable."""
    n = len(lims)
    stage = LimitStage(o.to_joint_limits(lims), T)
    V, A = np.array([x.vmax for x in lims]), np.array([x.amax for x in lims])
    p = np.array([0.0 if not x.has_position else 0.5 * (x.pmin + x.pmax) for x in lims])
    v, a = np.zeros(n), np.zeros(n)
    todo = np.ones(n, bool)
    for _ in range(100):
        k = int(todo.sum())
        v[todo] = V[todo] * rng.uniform(-1.0, 1.0, k)
        a[todo] = A[todo] * rng.uniform(-1.0, 1.0, k)
        todo = ~stage.evaluate(p, v, a).viable
        if not todo.any():
            break
    assert not todo.any()
    return p, v, a


@pytest.mark.parametrize("name", list(o.LIMIT_SETS))
@pytest.mark.parametrize("T", o.PERIODS)
def test_braking_reaches_rest_close_to_time_optimal(name, T):
    lim = o.LIMIT_SETS[name]
    n = 150
    lims = [lim] * n
    p, v, a = random_states(lims, T, np.random.default_rng(seed("brake", name, T)))
    t_opt = np.array([ruckig_stop_time(float(v[i]), float(a[i]), lim) for i in range(n)])
    max_steps = int(math.ceil(t_opt.max() / T)) + 20 * MAX_LATE_PERIODS
    out = brake_to_rest(lims, T, p, v, a, max_steps)
    steps = out["steps"]
    assert np.all(steps > 0), "did not reach rest"
    late = steps - t_opt / T                      # periods slower than time-optimal
    print(f"{name} T={T}: periods slower than ruckig: median={np.median(late):.2f} "
          f"p95={np.percentile(late, 95):.2f} max={late.max():.2f} min={late.min():.2f}; "
          f"worst violation={out['worst']:.1e}")
    assert out["worst"] <= TOL
    # never faster than the continuous time-optimal stop (source: ruckig)
    assert np.all(steps * T >= t_opt - 1e-9)
    assert late.max() <= MAX_LATE_PERIODS, (name, T, v[late.argmax()], a[late.argmax()])


@pytest.mark.parametrize("name", ["shoulder", "asymmetric", "stiff"])
@pytest.mark.parametrize("T", [0.008, 0.05])
def test_braking_near_a_position_limit(name, T):
    # from near-edge states (LP reference) braking stays within every limit and comes to
    # rest; the time-optimal stop without position limits still bounds it from below
    lim = o.LIMIT_SETS[name]
    rng = np.random.default_rng(seed("edge brake", name, T))
    states = [o.sample_boundary_state(rng, T, lim, kind)
              for kind in ("position_max", "position_min") for _ in range(3)]
    p, v, a = (np.array([s[i] for s in states]) for i in range(3))
    t_opt = np.array([ruckig_stop_time(float(v[i]), float(a[i]), lim) for i in range(len(states))])
    out = brake_to_rest([lim] * len(states), T, p, v, a, int(4 * t_opt.max() / T) + 40)
    steps = out["steps"]
    late = steps - t_opt / T
    print(f"{name} T={T} near limits: periods slower than ruckig: {np.round(late, 2)}; "
          f"worst violation={out['worst']:.1e}")
    assert np.all(steps > 0) and out["worst"] <= TOL
    assert np.all(steps * T >= t_opt - 1e-9)
    assert np.all((out["p"] >= lim.pmin) & (out["p"] <= lim.pmax))


def test_braking_from_random_viable_states():
    # random states anywhere in the range that the LP reference certifies viable (source:
    # scipy HiGHS): the stage must accept them and brake them to rest within every limit
    rng = np.random.default_rng(seed("random viable"))
    T = 0.02
    for name in ("shoulder", "asymmetric"):
        lim = o.LIMIT_SETS[name]
        states = [o.sample_viable_state(rng, T, lim) for _ in range(8)]
        p, v, a = (np.array([s[i] for s in states]) for i in range(3))
        out = brake_to_rest([lim] * len(states), T, p, v, a, 400)
        assert np.all(out["steps"] > 0) and out["worst"] <= TOL, (name, states)
