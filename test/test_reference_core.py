# SPDX-License-Identifier: Apache-2.0
"""Core reference: spline, time parameterisation, feasibility, resampling, override, playback.

External checks (sources named beside each):
- quintic rest-to-rest closed form (Biagiotti & Melchiorri 2008, sec. 2.1.5, from memory);
- time scaling v/lam, a/lam^2, j/lam^3 (Biagiotti & Melchiorri 2008, ch. 5, from memory);
- clamped cubic spline error bounds (Hall & Meyer, J. Approx. Theory 16, 1976, from memory)
  against scipy.interpolate.CubicSpline;
- dense 20x oversampling with the spline's derivatives and with finite differences;
- scipy.integrate.quad for the elapsed reference time.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy.integrate import quad
from scipy.interpolate import CubicSpline

from adaptive_streamer.core.feasibility import FeasibilityError, check_feasibility, ensure_feasible
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.override import OverrideError, OverrideRamp
from adaptive_streamer.core.playback import Playback, PlaybackError
from adaptive_streamer.core.reference import ReferenceTrajectory, TrajectoryError
from adaptive_streamer.core.timing import TimingError, time_parameterise

NAMES = ("j1", "j2", "j3")
LIMITS = JointLimits(NAMES, [-6.0, -6.0, -6.0], [6.0, 6.0, 6.0], [2.0, 1.5, 2.5],
                     [8.0, 6.0, 10.0], [80.0, 60.0, 100.0])
PERIOD = 0.05


def smooth(t: np.ndarray, amp: float = 0.8, length: float = 4.0):
    """f = amp (1 - cos w t)^2 / 4 and its first four derivatives (rest at t = 0, length)."""
    w = 2 * math.pi / length
    x = w * t
    # f = amp/4 (1.5 - 2 cos x + 0.5 cos 2x)
    f = amp / 4 * (1.5 - 2 * np.cos(x) + 0.5 * np.cos(2 * x))
    f1 = amp / 4 * (2 * w * np.sin(x) - w * np.sin(2 * x))
    f2 = amp / 4 * (2 * w**2 * np.cos(x) - 2 * w**2 * np.cos(2 * x))
    f3 = amp / 4 * (-2 * w**3 * np.sin(x) + 4 * w**3 * np.sin(2 * x))
    f4 = amp / 4 * (-2 * w**4 * np.cos(x) + 8 * w**4 * np.cos(2 * x))
    return f, f1, f2, f3, f4


def dense_fd(ref: ReferenceTrajectory, dt: float):
    """Positions on a fine grid and their central finite differences (v, a, j)."""
    t = np.arange(0.0, ref.duration + dt / 2, dt)
    p = ref.evaluate(t, 0)
    v = (p[2:] - p[:-2]) / (2 * dt)
    a = (p[2:] - 2 * p[1:-1] + p[:-2]) / dt**2
    j = (p[4:] - 2 * p[3:-1] + 2 * p[1:-3] - p[:-4]) / (2 * dt**3)
    return t, v, a, j


# ---------------------------------------------------------------- time parameterisation
waypoint_sets = st.integers(2, 6).flatmap(
    lambda m: st.lists(st.lists(st.floats(-1.0, 1.0), min_size=3, max_size=3),
                       min_size=m, max_size=m))


@settings(max_examples=15, deadline=None)
@given(waypoint_sets, st.sampled_from([0.5, 0.8, 1.0]))
@example([[0.0, 0.0, 0.25], [0.375, 0.0, 0.0], [0.3990850721774659, 0.0, 0.0]], 0.8)
def test_time_parameterisation_within_fraction_dense(points, fraction):
    w = np.array(points)
    if np.min(np.linalg.norm(np.diff(w, axis=0), axis=1)) < 0.05:
        w = w + np.arange(len(w))[:, None] * 0.1  # keep consecutive waypoints apart
    ref = time_parameterise(NAMES, w, LIMITS, fraction=fraction)
    # passes through the waypoints
    np.testing.assert_allclose(ref.evaluate(ref.times), w, atol=1e-9)
    np.testing.assert_allclose(ref.evaluate([0.0, ref.duration], 1), 0.0, atol=1e-9)
    # dense check, 20x oversampled relative to the decision period (and at least 2000
    # samples over a short reference, whose jerk peaks are narrow), spline's own derivatives
    dt = min(PERIOD / 20, ref.duration / 2000)
    t = np.arange(0.0, ref.duration + dt / 2, dt)
    ratios = []
    for order, bound in ((1, LIMITS.velocity_max), (2, LIMITS.acceleration_max),
                         (3, LIMITS.jerk_max)):
        r = np.abs(ref.evaluate(t, order)).max(axis=0) / bound
        assert np.all(r <= fraction * (1 + 1e-9)), (order, r)
        ratios.append(r.max())
    # time scaling makes the binding quantity reach the fraction (to sampling resolution)
    assert max(ratios) >= fraction * 0.99
    # the same with finite differences of the positions only (no spline derivatives);
    # central-difference truncation is O(dt^2) (common practice), allow 1 %
    _, v, a, j = dense_fd(ref, dt)
    for fd, bound in ((v, LIMITS.velocity_max), (a, LIMITS.acceleration_max), (j, LIMITS.jerk_max)):
        assert np.all(np.abs(fd).max(axis=0) <= fraction * bound * 1.01)


def test_two_waypoints_match_quintic_closed_form():
    # Rest-to-rest quintic q = q0 + h (10 s^3 - 15 s^4 + 6 s^5), s = t/T, peaks
    # v = 15 h / (8 T), a = 10 h / (sqrt(3) T^2), j = 60 h / T^3
    # (Biagiotti & Melchiorri 2008, sec. 2.1.5; from memory).
    q0, q1 = np.array([0.1, -0.2, 0.3]), np.array([1.1, 0.4, -0.5])
    fraction = 0.8
    ref = time_parameterise(NAMES, [q0, q1], LIMITS, fraction=fraction)
    h = np.abs(q1 - q0)
    expected_T = max(np.max(15 * h / (8 * fraction * LIMITS.velocity_max)),
                     np.max(np.sqrt(10 * h / (math.sqrt(3) * fraction * LIMITS.acceleration_max))),
                     np.max(np.cbrt(60 * h / (fraction * LIMITS.jerk_max))))
    assert ref.duration == pytest.approx(expected_T, rel=1e-9)
    s = np.linspace(0.0, 1.0, 101)
    closed = q0 + (q1 - q0) * (10 * s**3 - 15 * s**4 + 6 * s**5)[:, None]
    np.testing.assert_allclose(ref.evaluate(s * expected_T), closed, atol=1e-9)
    pk = ref.peaks()
    np.testing.assert_allclose(pk.velocity, 15 * h / (8 * expected_T), rtol=1e-7)
    np.testing.assert_allclose(pk.acceleration, 10 * h / (math.sqrt(3) * expected_T**2), rtol=1e-7)
    np.testing.assert_allclose(pk.jerk, 60 * h / expected_T**3, rtol=1e-7)


def test_periodic_waypoints_loop_continuously():
    w = [[0.0, 0.0, 0.0], [0.5, -0.3, 0.4], [0.9, 0.2, 0.1], [0.0, 0.0, 0.0]]
    ref = time_parameterise(NAMES, w, LIMITS, ends="periodic")
    for order in range(4):  # position..jerk match across the seam
        np.testing.assert_allclose(ref.evaluate(0.0, order), ref.evaluate(ref.duration, order),
                                   atol=1e-7)
    assert check_feasibility(ref, LIMITS).peak_ratio == pytest.approx(0.8, rel=1e-6)


@pytest.mark.parametrize("waypoints, fragment", [
    ([[0.0, 0.0, 0.0]], "at least 2 waypoints"),
    ([[0.0, 0.0, 0.0], [0.0, 0.0, 0.0], [1.0, 0.0, 0.0]], "waypoint 1 repeats waypoint 0"),
    ([[0.0, 0.0, 0.0], [0.1, math.nan, 0.0]], "waypoint 1: joint 'j2' position is nan"),
    ([[0.0, 0.0], [1.0, 1.0]], "expected rows of 3 positions"),
])
def test_time_parameterisation_refuses_bad_waypoints(waypoints, fragment):
    with pytest.raises(TimingError, match=fragment):
        time_parameterise(NAMES, waypoints, LIMITS)


def test_time_parameterisation_refuses_overshoot_outside_position_limits():
    tight = JointLimits(NAMES, [-1.0, -1.0, -1.0], [1.0, 1.0, 1.0], LIMITS.velocity_max,
                        LIMITS.acceleration_max, LIMITS.jerk_max)
    # waypoints near the limit with a sharp turn: the spline overshoots past 1.0 (to ~1.03)
    with pytest.raises(TimingError, match=r"joint 'j1'.*reaches \[0, 1.03.*outside the position"):
        time_parameterise(NAMES, [[0.0, 0, 0], [0.9, 0, 0], [1.0, 0, 0], [0.0, 0, 0]], tight)


# ---------------------------------------------------------------- reference, resampling
def test_time_scaling_divides_derivatives_by_powers_of_lambda():
    # Time scaling q(t / lam): v / lam, a / lam^2, j / lam^3 (Biagiotti & Melchiorri 2008,
    # ch. 5; from memory).
    t = np.linspace(0.0, 4.0, 41)
    ref = ReferenceTrajectory(["j1"], t, smooth(t)[0][:, None])
    lam = 2.5
    slow = ref.time_scaled(lam)
    assert slow.duration == pytest.approx(lam * ref.duration)
    tt = np.linspace(0.0, ref.duration, 333)
    for order in range(4):
        np.testing.assert_allclose(slow.evaluate(lam * tt, order),
                                   ref.evaluate(tt, order) / lam**order, rtol=1e-9, atol=1e-12)


def test_resampling_against_cubic_spline_and_closed_form():
    # Clamped cubic spline interpolation error (Hall & Meyer, J. Approx. Theory 16, 1976;
    # from memory): |f - s| <= 5/384 h^4 max|f''''|, |f' - s'| <= (sqrt(3)/216 + 1/24) h^3 max|f''''|.
    h = 0.1
    t = np.arange(0.0, 4.0 + h / 2, h)
    f, f1, f2, _, f4 = smooth(t)
    ref = ReferenceTrajectory(["j1"], t, f[:, None])
    out = ref.resample(PERIOD)
    np.testing.assert_allclose(out.times, np.arange(81) * PERIOD, atol=1e-12)
    fine = np.linspace(0.0, 4.0, 4001)
    m4 = np.abs(smooth(fine)[4]).max()
    bound0 = 5 / 384 * h**4 * m4
    bound1 = (math.sqrt(3) / 216 + 1 / 24) * h**3 * m4
    cubic = CubicSpline(t, f, bc_type="clamped")
    g, g1, g2, _, _ = smooth(out.times)
    # the independent cubic spline meets its published bound (sanity of the check itself)
    assert np.abs(cubic(out.times) - g).max() <= bound0
    # our quintic resampler is within the same bound of the truth and of the cubic spline
    assert np.abs(out.positions[:, 0] - g).max() <= bound0
    assert np.abs(out.positions[:, 0] - cubic(out.times)).max() <= 2 * bound0
    assert np.abs(out.velocities[:, 0] - g1).max() <= bound1
    assert np.abs(out.velocities[:, 0] - cubic(out.times, 1)).max() <= 2 * bound1
    # acceleration: second derivative of the same spline, close to the closed form
    assert np.abs(out.accelerations[:, 0] - g2).max() <= 0.01 * np.abs(g2).max()


def test_resampling_holds_the_final_point_on_the_last_grid_time():
    t = np.array([0.0, 0.5, 1.02])
    ref = ReferenceTrajectory(["j1"], t, [[0.0], [0.3], [0.4]])
    out = ref.resample(PERIOD)
    assert out.times[-1] >= ref.duration and out.times[-2] < ref.duration
    np.testing.assert_allclose(np.diff(out.times), PERIOD)
    assert out.positions[-1, 0] == pytest.approx(0.4)
    assert out.velocities[-1, 0] == pytest.approx(0.0, abs=1e-9)
    assert out.accelerations[-1, 0] == pytest.approx(0.0, abs=1e-9)


def test_exact_peaks_bound_dense_samples():
    t = np.linspace(0.0, 3.0, 7)
    pos = np.array([[0, 0.2, 0.9, 0.4, 0.8, 0.1, 0.0]]).T
    ref = ReferenceTrajectory(["j1"], t, pos)
    pk = ref.peaks()
    fine = np.linspace(0.0, 3.0, 60001)
    for order, peak in ((1, pk.velocity), (2, pk.acceleration), (3, pk.jerk)):
        dense = np.abs(ref.evaluate(fine, order)).max()
        assert peak[0] >= dense * (1 - 1e-12)
        assert peak[0] <= dense * (1 + 1e-6)
    assert pk.position_max[0] >= pos.max() and pk.position_min[0] <= pos.min()


@pytest.mark.parametrize("times, positions, fragment", [
    ([0.0, 1.0, 1.0], [[0], [1], [2]], "sample 2: time 1.0 is not after"),
    ([0.0, 1.0], [[0], [math.nan]], "sample 1: joint 'j1' position is nan"),
    ([0.0], [[0]], "at least 2 samples"),
    ([0.0, 1.0], [[0, 1], [1, 2]], r"expected shape \(2, 1\)"),
])
def test_reference_refuses_bad_samples(times, positions, fragment):
    with pytest.raises(TrajectoryError, match=fragment):
        ReferenceTrajectory(["j1"], times, positions)


def test_periodic_reference_needs_closed_samples():
    with pytest.raises(TrajectoryError, match="refused, not blended.*'j1' starts at 0 and ends at 1"):
        ReferenceTrajectory(["j1"], [0, 1, 2], [[0], [2], [1]], ends="periodic")


# ---------------------------------------------------------------- feasibility
def test_feasibility_refuses_or_slows_down_by_the_closed_form_factor():
    t = np.array([0.0, 0.1, 0.2])
    ref = ReferenceTrajectory(NAMES, t, [[0, 0, 0], [0.5, 0, 0], [1.0, 0, 0]])
    report = check_feasibility(ref, LIMITS)
    assert not report.feasible
    with pytest.raises(FeasibilityError, match=r"joint 'j1' velocity reaches [\d.]+ x its limit.*"
                                               r"slow-down by [\d.]+x would fit"):
        ensure_feasible(ref, LIMITS)
    slowed, lam, after = ensure_feasible(ref, LIMITS, slow_down=True, fraction=0.8)
    # time scaling (Biagiotti & Melchiorri 2008, ch. 5): ratios fall as 1/lam, 1/lam^2, 1/lam^3
    expected = max(report.velocity_ratio.max() / 0.8, math.sqrt(report.acceleration_ratio.max() / 0.8),
                   math.cbrt(report.jerk_ratio.max() / 0.8))
    assert lam == pytest.approx(expected)
    assert slowed.duration == pytest.approx(lam * ref.duration)
    np.testing.assert_allclose(after.velocity_ratio, report.velocity_ratio / lam, rtol=1e-9)
    np.testing.assert_allclose(after.acceleration_ratio, report.acceleration_ratio / lam**2, rtol=1e-9)
    np.testing.assert_allclose(after.jerk_ratio, report.jerk_ratio / lam**3, rtol=1e-9)
    assert after.feasible and after.peak_ratio == pytest.approx(0.8)
    # dense re-check of the slowed reference, 20x oversampled
    fine = np.arange(0.0, slowed.duration, PERIOD / 20)
    assert np.all(np.abs(slowed.evaluate(fine, 1)).max(axis=0) <= 0.8 * LIMITS.velocity_max * (1 + 1e-9))


def test_feasibility_never_slows_down_past_position_limits():
    tight = JointLimits(NAMES, [-1.0] * 3, [1.0] * 3, LIMITS.velocity_max, LIMITS.acceleration_max,
                        LIMITS.jerk_max)
    # samples within the limits, but the spline through them overshoots 1.0 between them
    ref = ReferenceTrajectory(NAMES, [0.0, 0.9, 1.0, 2.0],
                              [[0, 0, 0], [0.9, 0, 0], [1.0, 0, 0], [0, 0, 0]])
    with pytest.raises(FeasibilityError, match="position limits.*joint 'j1' position sweeps"):
        ensure_feasible(ref, tight, slow_down=True)


# ---------------------------------------------------------------- override ramp
@settings(max_examples=25, deadline=None)
@given(st.lists(st.tuples(st.floats(0.0, 1.5), st.floats(0.0, 1.0)), min_size=1, max_size=6))
@example([(0.5, 0.0), (0.30859375, 0.0), (1.0308133700597095, 0.0)])  # a short ramp end
def test_override_stays_within_targets_and_is_smooth(commands):
    ramp = OverrideRamp(1.0, 0.5)
    t, targets = 0.0, [1.0]
    for dt, value in commands:
        t += dt
        ramp.set_target(value, t)
        targets.append(value)
    grid = np.linspace(0.0, t + 1.0, 5001)
    s = ramp.value(grid)
    assert s.min() >= min(targets) - 1e-12 and s.max() <= max(targets) + 1e-12
    assert s[-1] == pytest.approx(targets[-1])
    # rate is the derivative of the value (central differences, common practice)
    ds = np.gradient(s, grid)
    assert np.abs(ds[1:-1] - ramp.rate(grid)[1:-1]).max() <= 1e-3 * max(1.0, np.abs(ds).max())
    # rate bounded by the smoothstep peak 1.875 |step| / D per overlapping ramp
    assert np.abs(ramp.rate(grid)).max() <= 1.875 * sum(
        abs(b - a) for a, b in zip(targets, targets[1:])) / 0.5 + 1e-12
    # elapsed reference time equals numerical quadrature of s (scipy.integrate.quad), told
    # where s is not smooth (ramp starts and ends), else it can miss a short ramp's end
    starts = np.cumsum([dt for dt, _ in commands])
    kinks = np.unique(np.clip(np.concatenate([starts, starts + 0.5]), 0.0, t + 1.0))
    expected, _ = quad(lambda x: float(ramp.value(x)), 0.0, t + 1.0, limit=200,
                       points=kinks[(kinks > 0.0) & (kinks < t + 1.0)])
    assert float(ramp.integral(0.0, t + 1.0)) == pytest.approx(expected, rel=1e-8, abs=1e-10)


def test_override_refuses_out_of_range_values():
    with pytest.raises(OverrideError, match=r"in \[0, 1\], got 1.5"):
        OverrideRamp(1.0, 0.5).set_target(1.5, 0.0)
    with pytest.raises(OverrideError, match="ramp time must be positive"):
        OverrideRamp(1.0, 0.0)


# ---------------------------------------------------------------- playback
def reference_smooth() -> ReferenceTrajectory:
    t = np.linspace(0.0, 4.0, 41)
    f = smooth(t)[0]
    return ReferenceTrajectory(NAMES, t, np.stack([f + 0.1, -0.6 * f + 0.2, 0.7 * f - 0.3], axis=1))


def test_window_chain_rule_during_ramps():
    """Fine windows: finite differences of window positions match its velocities and
    accelerations (v = s v_ref, a = s^2 a_ref + s_dot v_ref), through start, override and
    pause ramps."""
    ref = reference_smooth()
    dt = 0.001
    pb = Playback(ref, dt, 6000, override=1.0, ramp_time=0.4)
    pb.start(0.0)
    pb.set_override(0.5, 0.2)
    pb.pause(1.0)
    pb.resume(1.9)
    w = pb.window(1.9)
    fd_v = np.gradient(w.positions, dt, axis=0)
    fd_a = np.gradient(w.velocities, dt, axis=0)
    scale_v, scale_a = np.abs(w.velocities).max(), np.abs(w.accelerations).max()
    assert np.abs(fd_v[1:-1] - w.velocities[1:-1]).max() <= 1e-3 * scale_v
    assert np.abs(fd_a[1:-1] - w.accelerations[1:-1]).max() <= 1e-2 * scale_a
    np.testing.assert_allclose(w.times, np.arange(6000) * dt)


def test_window_values_and_override_chain_rule_exactly():
    ref = reference_smooth()
    pb = Playback(ref, PERIOD, 8, ramp_time=0.5)
    pb.start(10.0)
    w = pb.window(12.0)  # ramp done at 10.5: tau = 2.0 - 0.25 (half the ramp duration lost)
    tau = 12.0 - 10.0 - 0.5 * 0.5 + np.arange(8) * PERIOD
    p, v, a = ref.sample(tau)
    np.testing.assert_allclose(w.positions, p, atol=1e-12)
    np.testing.assert_allclose(w.velocities, v, atol=1e-12)
    np.testing.assert_allclose(w.accelerations, a, atol=1e-12)
    assert w.stamp == 12.0 and w.names == NAMES
    pb.set_override(0.25, 12.0)
    w2 = pb.window(13.0)  # after the ramp: v = 0.25 v_ref, a = 0.0625 a_ref
    tau2 = float(pb.status().reference_time)
    p2, v2, a2 = ref.sample(tau2)
    np.testing.assert_allclose(w2.positions[0], p2, atol=1e-12)
    np.testing.assert_allclose(w2.velocities[0], 0.25 * v2, atol=1e-12)
    np.testing.assert_allclose(w2.accelerations[0], 0.0625 * a2, atol=1e-12)
    # reference time elapsed 12 -> 13: 1 s at mean of the ramp (0.625) for 0.5 s, then 0.25
    assert tau2 - 1.75 == pytest.approx(0.5 * (1.0 + 0.25) / 2 + 0.5 * 0.25, rel=1e-12)


def test_pause_stops_along_the_ramp_and_resume_continues():
    ref = reference_smooth()
    pb = Playback(ref, PERIOD, 10, ramp_time=0.5)
    pb.start(0.0)
    pb.window(1.0)
    assert pb.pause(1.0).startswith("pausing")
    assert pb.state == "pausing"
    w = pb.window(1.2)
    assert np.abs(w.velocities[0]).max() > 0  # still moving along the ramp
    w = pb.window(2.0)
    assert pb.state == "paused"
    assert np.all(w.velocities == 0.0) and np.all(w.accelerations == 0.0)
    np.testing.assert_allclose(w.positions, np.repeat(w.positions[:1], 10, axis=0))
    # stopped 0.25 s of reference time after the pause request (integral of the ramp, s D / 2)
    assert pb.status().reference_time == pytest.approx(1.0 - 0.25 + 0.25)
    with pytest.raises(PlaybackError, match="cannot pause: not running"):
        pb.pause(2.0)
    pb.resume(2.0)
    assert pb.state == "running"
    with pytest.raises(PlaybackError, match="cannot resume: not paused"):
        pb.resume(2.1)


def test_hold_at_end_is_at_rest_and_finished():
    ref = reference_smooth()
    pb = Playback(ref, PERIOD, 10)
    pb.start(0.0)
    w = pb.window(4.3)  # 4.5 s of reference time needed (0.5 s lost on the start ramp)
    assert pb.state == "running"
    assert np.all(w.velocities[-1] == 0.0)
    np.testing.assert_allclose(w.positions[-1], ref.positions[-1])
    w = pb.window(10.0)
    assert pb.state == "finished" and pb.status().progress == 1.0
    np.testing.assert_allclose(w.positions, np.repeat(ref.positions[-1:], 10, axis=0))
    assert np.all(w.velocities == 0.0) and np.all(w.accelerations == 0.0)
    with pytest.raises(PlaybackError, match="already started"):
        pb.start(10.0)


def test_waiting_holds_the_first_point():
    ref = reference_smooth()
    pb = Playback(ref, PERIOD, 5)
    w = pb.window(3.0)
    assert pb.state == "waiting"
    np.testing.assert_allclose(w.positions, np.repeat(ref.positions[:1], 5, axis=0))
    assert np.all(w.velocities == 0.0)


def test_loop_is_continuous_across_the_seam():
    w = [[0.0, 0.0, 0.0], [0.5, -0.3, 0.4], [0.9, 0.2, 0.1], [0.0, 0.0, 0.0]]
    ref = time_parameterise(NAMES, w, LIMITS, ends="periodic")
    dt = 0.001
    pb = Playback(ref, dt, int(3 * ref.duration / dt), end_mode="loop", ramp_time=0.2)
    pb.start(0.0)
    win = pb.window(0.5)
    assert np.max(np.abs(np.diff(win.positions, axis=0))) <= np.abs(win.velocities).max() * dt * 1.01
    fd_v = np.gradient(win.positions, dt, axis=0)[1:-1]
    assert np.abs(fd_v - win.velocities[1:-1]).max() <= 1e-3 * np.abs(win.velocities).max()
    pb.window(0.5 + 2.5 * ref.duration)
    assert pb.status().laps == 2 and pb.state == "running"


def test_playback_refusals():
    ref = reference_smooth()
    points = ReferenceTrajectory(NAMES, [0, 1, 2], [[0, 0, 0], [0.1, 0.1, 0.1], [0.2, 0.2, 0.2]])
    with pytest.raises(PlaybackError, match="loop refuses, it does not blend.*'j1' starts at 0 and ends at 0.2"):
        Playback(points, PERIOD, 5, end_mode="loop")
    with pytest.raises(PlaybackError, match=r"speed override must be in \[0.05, 1.0\], got 0.01"):
        Playback(ref, PERIOD, 5, override=0.01)
    with pytest.raises(PlaybackError, match="horizon must be a positive integer"):
        Playback(ref, PERIOD, 0)
    periodic = ReferenceTrajectory(NAMES, [0, 1, 2], [[0, 0, 0], [0.1, 0.1, 0.1], [0, 0, 0]],
                                   ends="periodic")
    with pytest.raises(PlaybackError, match="'hold' needs a reference that ends at rest"):
        Playback(periodic, PERIOD, 5)
    pb = Playback(ref, PERIOD, 5)
    with pytest.raises(PlaybackError, match="cannot pause: not running \\(state: waiting\\)"):
        pb.pause(1.0)
    with pytest.raises(PlaybackError, match="speed override must be in"):
        pb.set_override(1.2, 1.0)
    with pytest.raises(PlaybackError, match="time went backwards"):
        pb.window(0.5)


def test_playback_is_deterministic_given_call_times():
    """Windows depend on the commands and their times, not on how often windows were taken."""
    ref = reference_smooth()
    dense, sparse = Playback(ref, PERIOD, 10), Playback(ref, PERIOD, 10)
    for pb, calls in ((dense, np.arange(1, 60) * PERIOD), (sparse, [0.77, 2.95])):
        pb.start(0.0)
        for t in calls:
            if t > 1.3 and pb.override == 1.0:
                pb.set_override(0.3, 1.3)
            pb.window(float(t))
    wd, ws = dense.window(3.0), sparse.window(3.0)
    np.testing.assert_allclose(wd.positions, ws.positions, atol=1e-12)
    np.testing.assert_allclose(wd.velocities, ws.velocities, atol=1e-12)
    np.testing.assert_allclose(wd.accelerations, ws.accelerations, atol=1e-12)
