# SPDX-License-Identifier: Apache-2.0
"""The simulated driver plant: exact lag discretisation, delay, noise, timeout hold."""
import math

import numpy as np
import pytest
from scipy.linalg import expm

from adaptive_streamer.sim.plant import PlantConfig, PlantError, SimPlant, discretise_lag


def underdamped_step(t, wn, zeta):
    """Unit step response of wn^2 / (s^2 + 2 zeta wn s + wn^2) and its derivative, 0 < zeta < 1.

    Ogata, Modern Control Engineering (5th ed.), sec. 5-3: c(t) = 1 - e^(-zeta wn t)
    (cos wd t + zeta / sqrt(1 - zeta^2) sin wd t), c'(t) = wn / sqrt(1 - zeta^2)
    e^(-zeta wn t) sin wd t, wd = wn sqrt(1 - zeta^2). From memory.
    """
    r = math.sqrt(1.0 - zeta ** 2)
    wd = wn * r
    e = np.exp(-zeta * wn * t)
    return 1.0 - e * (np.cos(wd * t) + zeta / r * np.sin(wd * t)), wn / r * e * np.sin(wd * t)


def quiet(**kw):
    base = dict(dt=0.004, position_noise=0.0, velocity_noise=0.0)
    base.update(kw)
    return PlantConfig(**base)


def run(plant, commands, dt, t0=0.0):
    """Feed one command per tick (received just before the tick) and collect the samples."""
    out = []
    for k, cmd in enumerate(commands):
        t = t0 + (k + 1) * dt
        if cmd is not None:
            plant.command(cmd, t - dt)
        out.append(plant.step(t))
    return out


@pytest.mark.parametrize("wn,zeta,dt", [(60.0, 0.7, 0.004), (25.0, 0.3, 0.001),
                                         (120.0, 0.9, 0.002)])
def test_step_response_equals_the_closed_form_at_every_tick(wn, zeta, dt):
    plant = SimPlant(quiet(dt=dt, natural_frequency=wn, damping=zeta, delay_ticks=0),
                     [0.0, 1.0])
    samples = run(plant, [[2.0, 1.5]] * 300, dt)
    t = dt * np.arange(1, 301)
    c, dc = underdamped_step(t, wn, zeta)      # Ogata closed form (from memory)
    pos = np.array([s.position for s in samples])
    vel = np.array([s.velocity for s in samples])
    np.testing.assert_allclose(pos[:, 0], 2.0 * c, atol=1e-12)
    np.testing.assert_allclose(pos[:, 1], 1.0 + 0.5 * c, atol=1e-12)
    np.testing.assert_allclose(vel[:, 0], 2.0 * dc, atol=1e-9)


def test_zoh_discretisation_matches_the_augmented_matrix_exponential():
    # ZOH of x' = A x + B u: expm([[A, B], [0, 0]] dt) = [[Ad, Bd], [0, I]]
    # (Franklin, Powell & Workman, Digital Control of Dynamic Systems, ch. 4; from memory).
    wn, zeta, dt = 60.0, 0.7, 0.004
    m = np.zeros((3, 3))
    m[:2, :2] = [[0.0, 1.0], [-wn ** 2, -2 * zeta * wn]]
    m[1, 2] = wn ** 2
    e = expm(m * dt)
    ad, bd = discretise_lag(wn, zeta, dt)
    np.testing.assert_allclose(ad, e[:2, :2], rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(bd[:, 0], e[:2, 2], rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("delay", [1, 2, 5])
def test_transport_delay_is_exactly_n_ticks(delay):
    rng = np.random.default_rng(3)
    commands = list(rng.uniform(-1, 1, (120, 3)))
    ref = run(SimPlant(quiet(delay_ticks=0), np.zeros(3)), commands, 0.004)
    late = run(SimPlant(quiet(delay_ticks=delay), np.zeros(3)), commands, 0.004)
    for k in range(delay):
        np.testing.assert_array_equal(late[k].position, np.zeros(3))
    for k in range(delay, 120):
        np.testing.assert_allclose(late[k].position, ref[k - delay].position, atol=1e-15)
        np.testing.assert_allclose(late[k].velocity, ref[k - delay].velocity, atol=1e-12)


def test_velocity_commands_are_integrated_and_followed_with_the_ramp_lag():
    wn, zeta, dt, v = 60.0, 0.7, 0.004, 0.3
    cfg = dict(natural_frequency=wn, damping=zeta, delay_ticks=2)
    plant = SimPlant(quiet(interface="velocity", **cfg), [0.5])
    samples = run(plant, [[v]] * 500, dt)
    # integration: the same as position commands 0.5 + v (k + 1) dt
    twin = SimPlant(quiet(**cfg), [0.5])
    ramp = run(twin, [[0.5 + v * (k + 1) * dt] for k in range(500)], dt)
    np.testing.assert_allclose([s.position[0] for s in samples], [s.position[0] for s in ramp],
                               atol=1e-12)
    # tracking: a unity-gain 2nd-order lag follows a ramp with the steady error 2 zeta v / wn
    # (Ogata, Modern Control Engineering, sec. 5-8; from memory); the held (staircase) input
    # lags the ramp by half a tick on average (zero-order hold, common practice), plus the
    # transport delay. Residual O(v dt (wn dt)^2) from the staircase ripple.
    k = 499
    t = (k + 1) * dt
    expected = 0.5 + v * (t - (2 - 1) * dt - dt / 2) - 2 * zeta * v / wn
    assert samples[k].position[0] == pytest.approx(expected, abs=v * dt * (wn * dt) ** 2)
    # in steady state every tick advances by exactly v dt (unity DC gain)
    assert samples[k].position[0] - samples[k - 1].position[0] == pytest.approx(v * dt, abs=1e-12)
    assert samples[k].velocity[0] == pytest.approx(v, rel=wn * dt / 10)   # ripple at ticks


def test_reach_in_moves_the_target_linearly_to_the_command():
    dt = 0.004
    plant = SimPlant(quiet(delay_ticks=1), [0.0, 1.0])
    plant.step(0.0)
    plant.command([0.4, 0.0], 0.0, reach_in=4 * dt)
    got = [plant.step(k * dt) for k in range(1, 9)]
    # the same plant fed the linear interpolation explicitly (ramp over four ticks, then hold)
    twin = SimPlant(quiet(delay_ticks=1), [0.0, 1.0])
    twin.step(0.0)
    share = np.minimum(np.arange(1, 9) / 4, 1.0)
    ref = []
    for k, f in enumerate(share, start=1):
        twin.command([0.4 * f, 1.0 - f], k * dt - dt / 2)
        ref.append(twin.step(k * dt))
    np.testing.assert_allclose([g.position for g in got], [r.position for r in ref], atol=1e-15)
    with pytest.raises(PlantError, match="position commands only"):
        SimPlant(quiet(interface="velocity"), [0.0]).command([0.1], 0.0, reach_in=0.01)


def test_timeout_holds_still_then_resumes_from_the_held_position():
    dt, timeout = 0.004, 0.098                 # timeout not a multiple of dt: no borderline
    plant = SimPlant(quiet(delay_ticks=2, command_timeout=timeout), [0.0])
    assert plant.step(0.0).holding and plant.timeouts == 0       # nothing commanded yet
    run(plant, [[1.0]] * 40, dt)                                  # ticks 1..40, commands until
    tc = 39 * dt                                                  # the last at tick 39's time
    assert plant.following
    follow = [plant.step(tc + m * dt) for m in range(2, 25)]      # t - tc <= 0.096: follows
    assert not any(s.holding for s in follow) and follow[0].velocity[0] != 0.0
    s1, s2 = plant.step(tc + 25 * dt), plant.step(tc + 26 * dt)   # t - tc = 0.1 > timeout
    assert s1.holding and s2.holding and plant.timeouts == 1
    assert s1.velocity[0] == 0.0 and s2.velocity[0] == 0.0
    assert s1.position[0] == s2.position[0] == follow[-1].position[0]
    # resume: the delay line starts at the held position, so two ticks pass before it moves
    plant.command([2.0], tc + 26 * dt)
    r = [plant.step(tc + (27 + i) * dt) for i in range(3)]
    assert not r[0].holding
    assert r[0].position[0] == r[1].position[0] == s2.position[0]
    assert r[2].position[0] > s2.position[0] and plant.timeouts == 1


def test_noise_is_gaussian_with_the_configured_spread_and_seeded():
    cfg = PlantConfig(dt=0.004, position_noise=1e-4, velocity_noise=3e-3)
    plant = SimPlant(cfg, np.zeros(6), seed=42)
    s = [plant.step(0.004 * k) for k in range(4000)]            # holding: true state is 0
    pos = np.array([x.position for x in s]).ravel()
    vel = np.array([x.velocity for x in s]).ravel()
    n = pos.size
    # sample mean ~ N(0, sigma^2/n); sample std ~ sigma (1 +- 1/sqrt(2n)) (common practice)
    assert abs(pos.mean()) < 5 * 1e-4 / math.sqrt(n)
    assert abs(pos.std() / 1e-4 - 1) < 5 / math.sqrt(2 * n)
    assert abs(vel.std() / 3e-3 - 1) < 5 / math.sqrt(2 * n)
    assert abs(np.corrcoef(pos, vel)[0, 1]) < 5 / math.sqrt(n)
    again = SimPlant(cfg, np.zeros(6), seed=42)
    np.testing.assert_array_equal(again.step(0.0).position, s[0].position)
    other = SimPlant(cfg, np.zeros(6), seed=43)
    assert not np.array_equal(other.step(0.0).position, s[0].position)


def test_bad_settings_and_commands_are_refused_by_name():
    with pytest.raises(PlantError, match="natural_frequency"):
        PlantConfig(dt=0.004, natural_frequency=0.0)
    with pytest.raises(PlantError, match="delay_ticks"):
        PlantConfig(dt=0.004, delay_ticks=-1)
    with pytest.raises(PlantError, match="interface"):
        PlantConfig(dt=0.004, interface="torque")
    with pytest.raises(PlantError, match="initial_positions"):
        SimPlant(quiet(), [0.0, math.nan])
    plant = SimPlant(quiet(), [0.0, 0.0])
    with pytest.raises(PlantError, match="expected 2 values, got 3"):
        plant.command([1.0, 2.0, 3.0], 0.0)
    with pytest.raises(PlantError, match="finite"):
        plant.command([1.0, math.inf], 0.0)
