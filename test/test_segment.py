# SPDX-License-Identifier: Apache-2.0
"""Constant-jerk segment math, checked against closed forms and dense sampling.

Closed forms: Biagiotti & Melchiorri, Trajectory Planning for Automatic Machines and
Robots, Springer 2008, ch. 3 (constant-jerk motion; formulas from memory).
"""
import numpy as np
from hypothesis import given, settings, strategies as st

from adaptive_streamer.core import segment as sg

finite = st.floats(-50, 50, allow_nan=False)
period = st.floats(0.001, 0.2)


def test_integrate_matches_the_closed_form_worked_example():
    # p(T) = p + vT + aT^2/2 + jT^3/6 with j = (u - a)/T; here p=1, v=2, a=3, u=-1, T=0.5:
    # j = -8, p(T) = 1 + 1 + 0.375 - 0.16667 = 2.208333..., v(T) = 2 + 1.5 - 1 = 2.5
    end = sg.integrate(np.array([1.0]), np.array([2.0]), np.array([3.0]), np.array([-1.0]), 0.5)
    assert np.isclose(end.position[0], 2.0 + 0.375 - 1.0 / 6.0, rtol=0, atol=1e-15)
    assert np.isclose(end.velocity[0], 2.5, rtol=0, atol=1e-15)
    assert end.acceleration[0] == -1.0


@settings(max_examples=200, deadline=None)
@given(p=finite, v=finite, a=finite, u=finite, T=period)
def test_sample_is_the_cubic_and_its_derivatives(p, v, a, u, T):
    t = np.linspace(0.0, T, 7)
    s = sg.sample(np.array([p]), np.array([v]), np.array([a]), np.array([u]), T, t)
    j = (u - a) / T
    assert np.allclose(s.position[:, 0], p + v * t + a * t**2 / 2 + j * t**3 / 6, atol=1e-9)
    assert np.allclose(s.velocity[:, 0], v + a * t + j * t**2 / 2, atol=1e-9)
    assert np.allclose(s.acceleration[:, 0], a + j * t, atol=1e-9)
    end = sg.integrate(p, v, a, u, T)
    assert np.isclose(s.position[-1, 0], end.position, atol=1e-9)
    assert np.isclose(s.velocity[-1, 0], end.velocity, atol=1e-9)


@settings(max_examples=300, deadline=None)
@given(p=finite, v=finite, a=finite, u=finite, T=period)
def test_exact_extrema_bound_dense_samples_and_are_attained(p, v, a, u, T):
    P, V, A, U = (np.array([x]) for x in (p, v, a, u))
    t = np.linspace(0.0, T, 20001)
    s = sg.sample(P, V, A, U, T, t)
    vlo, vhi = sg.velocity_extrema(V, A, U, T)
    plo, phi = sg.position_extrema(P, V, A, U, T)
    scale = 1e-9 * (1 + abs(p) + abs(v) + abs(a) + abs(u))
    # never tighter than the dense samples ...
    assert vlo[0] <= s.velocity.min() + scale and vhi[0] >= s.velocity.max() - scale
    assert plo[0] <= s.position.min() + scale and phi[0] >= s.position.max() - scale
    # ... and attained (the sampled extreme is within the spacing's curvature error)
    dt = T / 20000
    slack_v = abs(u - a) / T * dt * dt + scale
    slack_p = (abs(v) + abs(a) * T + abs(u - a) * T) * dt * dt + scale
    assert vhi[0] - s.velocity.max() <= slack_v and s.velocity.min() - vlo[0] <= slack_v
    assert phi[0] - s.position.max() <= slack_p and s.position.min() - plo[0] <= slack_p


def test_velocity_peak_where_the_acceleration_crosses_zero():
    # a goes from +4 to -4 over 0.1 s: the peak is at t = 0.05 s, v + a t/2 = 1 + 0.1
    lo, hi = sg.velocity_extrema(np.array([1.0]), np.array([4.0]), np.array([-4.0]), 0.1)
    assert np.isclose(hi[0], 1.1) and np.isclose(lo[0], 1.0)


def test_position_peak_when_the_velocity_reverses_inside():
    # v = 0.1 rad/s braking at a = -4 (u = -4): v(t) = 0.1 - 4t -> 0 at t = 0.025 s,
    # peak p = 0.1 * 0.025 - 2 * 0.025^2 = 0.00125 (constant deceleration, closed form)
    lo, hi = sg.position_extrema(np.array([0.0]), np.array([0.1]), np.array([-4.0]),
                                 np.array([-4.0]), 0.1)
    assert np.isclose(hi[0], 0.00125, rtol=0, atol=1e-15)


def test_vectorised_over_joints():
    n = 5
    p, v, a, u = (np.linspace(-1, 1, n) * k for k in (1.0, 2.0, 3.0, -4.0))
    end = sg.integrate(p, v, a, u, 0.05)
    one = [sg.integrate(p[i], v[i], a[i], u[i], 0.05).position for i in range(n)]
    assert np.allclose(end.position, np.array(one).ravel())
    assert sg.sample(p, v, a, u, 0.05, np.linspace(0, 0.05, 3)).position.shape == (3, n)
