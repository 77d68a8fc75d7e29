# SPDX-License-Identifier: Apache-2.0
"""Reference alignment (quintic Hermite between window points) against outside references.

* Exactness: a quintic polynomial is reproduced exactly (position, velocity, acceleration),
  evaluated with numpy.polynomial (a quintic Hermite interpolant matching p, v, a at both
  ends of an interval is unique, so it is the polynomial itself).
* scipy.interpolate.BPoly.from_derivatives with (p, v, a) at every breakpoint is the same
  piecewise quintic: both agree on non-polynomial data.
* scipy.interpolate.CubicHermiteSpline is exact on a cubic: both agree there (position and
  velocity).
* Holding outside the window, one-point windows, and the refusals of validate_window.
"""
from __future__ import annotations

import numpy as np
import pytest
from numpy.polynomial import Polynomial
from scipy.interpolate import BPoly, CubicHermiteSpline

from adaptive_streamer.core.alignment import (AlignmentError, align, validate_window,
                                              window_end)
from adaptive_streamer.core.playback import Window

STAMP = 1_796_000_000.0  # an epoch-like stamp: offsets are relative to it


def window_from(funcs, times: np.ndarray, stamp: float = 0.0) -> Window:
    """Window whose points sample (p, v, a) functions at ``stamp + times``."""
    t = stamp + times
    P = np.column_stack([f[0](t - stamp) for f in funcs])
    V = np.column_stack([f[1](t - stamp) for f in funcs])
    A = np.column_stack([f[2](t - stamp) for f in funcs])
    return Window(stamp, times.copy(), P, V, A, tuple(f"j{i}" for i in range(len(funcs))))


def polynomial_funcs(rng: np.random.Generator, degree: int, joints: int):
    out = []
    for _ in range(joints):
        p = Polynomial(rng.uniform(-1.0, 1.0, degree + 1))
        out.append((p, p.deriv(1), p.deriv(2)))
    return out


def test_quintic_polynomial_is_reproduced_exactly():
    rng = np.random.default_rng(5)
    funcs = polynomial_funcs(rng, 5, 7)
    times = np.cumsum(np.r_[0.0, rng.uniform(0.03, 0.07, 9)])  # uneven spacing
    w = window_from(funcs, times)
    q = rng.uniform(times[0], times[-1], 200)
    got = align(w, q)
    # reference: numpy.polynomial evaluation of the same quintic and its derivatives
    for j, (p, v, a) in enumerate(funcs):
        np.testing.assert_allclose(got.positions[:, j], p(q), rtol=0, atol=1e-12)
        np.testing.assert_allclose(got.velocities[:, j], v(q), rtol=0, atol=1e-10)
        np.testing.assert_allclose(got.accelerations[:, j], a(q), rtol=0, atol=1e-8)


def test_matches_scipy_bpoly_from_derivatives_on_smooth_data():
    times = np.arange(10) * 0.05
    funcs = [(lambda t, k=k: np.sin(3 * t + k), lambda t, k=k: 3 * np.cos(3 * t + k),
              lambda t, k=k: -9 * np.sin(3 * t + k)) for k in range(6)]
    w = window_from(funcs, times)
    q = np.linspace(0.0, times[-1], 301)
    got = align(w, q)
    for j in range(6):
        # scipy reference: Bernstein-basis piecewise polynomial matching (p, v, a) at each
        # breakpoint = the piecewise quintic Hermite interpolant
        ref = BPoly.from_derivatives(times, np.column_stack(
            [w.positions[:, j], w.velocities[:, j], w.accelerations[:, j]]))
        np.testing.assert_allclose(got.positions[:, j], ref(q), atol=1e-12)
        np.testing.assert_allclose(got.velocities[:, j], ref.derivative(1)(q), atol=1e-10)
        np.testing.assert_allclose(got.accelerations[:, j], ref.derivative(2)(q), atol=1e-8)


def test_agrees_with_scipy_cubic_hermite_on_a_cubic():
    rng = np.random.default_rng(9)
    funcs = polynomial_funcs(rng, 3, 4)
    times = np.arange(8) * 0.05
    w = window_from(funcs, times)
    q = rng.uniform(0.0, times[-1], 100)
    got = align(w, q)
    for j in range(4):
        # scipy reference: the cubic Hermite spline on (p, v) is exact for a cubic
        ref = CubicHermiteSpline(times, w.positions[:, j], w.velocities[:, j])
        np.testing.assert_allclose(got.positions[:, j], ref(q), atol=1e-12)
        np.testing.assert_allclose(got.velocities[:, j], ref.derivative()(q), atol=1e-10)


def test_window_points_themselves_and_holding_outside():
    rng = np.random.default_rng(2)
    funcs = polynomial_funcs(rng, 4, 3)
    times = np.arange(5) * 0.05
    w = window_from(funcs, times, STAMP)
    at = align(w, STAMP + times)
    np.testing.assert_allclose(at.positions, w.positions, atol=1e-9)
    np.testing.assert_allclose(at.velocities, w.velocities, atol=1e-6)
    outside = align(w, np.array([STAMP - 1.0, STAMP + 10.0]))
    np.testing.assert_array_equal(outside.positions[0], w.positions[0])
    np.testing.assert_allclose(outside.positions[1], w.positions[-1], atol=1e-12)
    np.testing.assert_allclose(outside.velocities[1], w.velocities[-1], atol=1e-9)
    assert window_end(w) == STAMP + times[-1]


def test_one_point_window_is_held():
    w = Window(3.0, np.array([0.0]), np.array([[0.1, 0.2]]), np.array([[1.0, 2.0]]),
               np.array([[0.0, 0.5]]), ("a", "b"))
    got = align(w, np.array([2.0, 3.0, 4.0]))
    assert got.positions.shape == (3, 2)
    np.testing.assert_array_equal(got.positions, np.tile([0.1, 0.2], (3, 1)))
    np.testing.assert_array_equal(got.accelerations, np.tile([0.0, 0.5], (3, 1)))


@pytest.mark.parametrize("change, words", [
    (lambda w: w._replace(times=np.array([])), "no points"),
    (lambda w: w._replace(positions=w.positions[:2]), "positions: expected shape"),
    (lambda w: w._replace(velocities=np.full_like(w.velocities, np.nan)), "NaN"),
    (lambda w: w._replace(stamp=float("inf")), "NaN or infinite"),
    (lambda w: w._replace(times=w.times[::-1].copy()), "strictly increasing"),
])
def test_validate_window_refuses_malformed_windows(change, words):
    times = np.arange(4) * 0.05
    w = Window(0.0, times, np.zeros((4, 2)), np.zeros((4, 2)), np.zeros((4, 2)), ("a", "b"))
    validate_window(w)
    with pytest.raises(AlignmentError, match=words):
        validate_window(change(w))
