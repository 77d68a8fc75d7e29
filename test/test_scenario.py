# SPDX-License-Identifier: Apache-2.0
"""The demo cell core: arm kinematics, panel geometry, line sensor, nominal pass, files."""
import csv
import math
from pathlib import Path

import numpy as np
import pytest
import yaml
from scipy.interpolate import make_interp_spline
from scipy.spatial.transform import Rotation

from adaptive_streamer.sim.arm import DEMO_ARM, KinematicsError
from adaptive_streamer.sim.config import (ScenarioError, load_scenario,
                                                    parse_scenario)
from adaptive_streamer.sim.line_sensor import (LineSensor, SensorConfig,
                                                         true_edge_reading)
from adaptive_streamer.sim.metrics import lateral_error
from adaptive_streamer.sim.nominal_path import (nominal_joint_path, nozzle_poses,
                                                          path_distance)
from adaptive_streamer.sim.panel import Panel, PanelError, draw_placement

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "config" / "demo"
NEAR_PASS = np.array([0.0, 0.72, 0.36, 0.0, 0.5, -1.57])   # a configuration near the pass


def hand_fk(q):
    """Nozzle pose by composing rigid transforms with scipy Rotation (standard DH:
    Rz(theta) Tz(d) Tx(a) Rx(alpha) per joint; Spong et al., Robot Modeling and Control, 2006,
    sec. 3.2), independent of the module's matrix code."""
    r, p = Rotation.identity(), np.zeros(3)
    for i in range(6):
        r = r * Rotation.from_rotvec([0, 0, q[i] + DEMO_ARM.theta_offset[i]])
        p = p + r.apply([DEMO_ARM.a[i], 0, DEMO_ARM.d[i]])
        r = r * Rotation.from_rotvec([DEMO_ARM.alpha[i], 0, 0])
    return r.as_matrix(), p + r.apply(DEMO_ARM.tool[:3, 3])


# ---------------------------------------------------------------------------- arm
def test_forward_kinematics_hand_worked_configurations():
    # Worked by hand from the DH table: at q = 0 the upper arm is vertical, the elbow offset
    # points up, forearm + flange + nozzle point along +x, the nozzle offset along -y.
    x0 = 0.125 + 0.505 + 0.085 + 0.135
    np.testing.assert_allclose(DEMO_ARM.forward(np.zeros(6))[:3, 3],
                               [x0, -0.025, 0.415 + 0.545 + 0.095], atol=1e-12)
    # j1 = 90 deg turns everything about +z
    np.testing.assert_allclose(DEMO_ARM.forward([math.pi / 2, 0, 0, 0, 0, 0])[:3, 3],
                               [0.025, x0, 1.055], atol=1e-12)
    # j2 = 90 deg: upper arm forward (elbow at x = 0.67, z = 0.415), elbow offset along +x,
    # forearm, flange and nozzle pointing down
    np.testing.assert_allclose(DEMO_ARM.forward([0, math.pi / 2, 0, 0, 0, 0])[:3, 3],
                               [0.125 + 0.545 + 0.095, -0.025, 0.415 - 0.505 - 0.085 - 0.135],
                               atol=1e-12)


def test_forward_kinematics_matches_composed_rotations_vectorised():
    rng = np.random.default_rng(1)
    qs = rng.uniform(-2.5, 2.5, (20, 6))
    poses = DEMO_ARM.forward(qs)
    assert poses.shape == (20, 4, 4)
    for q, pose in zip(qs, poses):
        rot, pos = hand_fk(q)
        np.testing.assert_allclose(pose[:3, :3], rot, atol=1e-12)
        np.testing.assert_allclose(pose[:3, 3], pos, atol=1e-12)
        np.testing.assert_array_equal(pose[3], [0, 0, 0, 1])


def test_jacobian_matches_central_finite_differences():
    rng = np.random.default_rng(2)
    h = 1e-6
    for q in rng.uniform(-2.0, 2.0, (5, 6)):
        jac = DEMO_ARM.jacobian(q)
        base = DEMO_ARM.forward(q)
        for i in range(6):
            dq = np.zeros(6)
            dq[i] = h
            plus, minus = DEMO_ARM.forward(q + dq), DEMO_ARM.forward(q - dq)
            # central difference of the position; angular velocity from the rotation
            # log of R(q + h) R(q - h)^T (common practice)
            lin = (plus[:3, 3] - minus[:3, 3]) / (2 * h)
            ang = Rotation.from_matrix(plus[:3, :3] @ minus[:3, :3].T).as_rotvec() / (2 * h)
            np.testing.assert_allclose(jac[:3, i], lin, atol=1e-8)
            np.testing.assert_allclose(jac[3:, i], ang, atol=1e-8)
        assert base.shape == (4, 4)
    assert DEMO_ARM.jacobian(rng.uniform(-1, 1, (3, 6))).shape == (3, 6, 6)


def test_inverse_kinematics_round_trip_stays_on_the_branch():
    rng = np.random.default_rng(3)
    qs = NEAR_PASS + rng.uniform(-0.3, 0.3, (30, 6))
    targets = DEMO_ARM.forward(qs)
    solved = DEMO_ARM.inverse(targets, qs + rng.uniform(-0.05, 0.05, qs.shape))
    np.testing.assert_allclose(DEMO_ARM.forward(solved), targets, atol=1e-9)
    np.testing.assert_allclose(solved, qs, atol=1e-6)
    with pytest.raises(KinematicsError, match="did not converge for target 0"):
        far = np.eye(4)
        far[:3, 3] = (3.0, 0.0, 0.5)                           # out of reach
        DEMO_ARM.inverse(far, NEAR_PASS, max_iterations=50)
    with pytest.raises(KinematicsError, match=r"expected shape \(6,\)"):
        DEMO_ARM.forward(np.zeros(5))


# ---------------------------------------------------------------------------- panel
def demo_panel(offset=0.0, angle=0.0):
    return Panel(np.array([0.8, -0.3]), np.array([0.8, 0.3]), np.array([1.0, 0.0]), 0.203,
                 offset, angle)


def test_panel_offset_and_angle_hand_examples():
    # shift only: the edge (x = 0.8, direction +y, left normal -x) moves 4 mm along -x
    p = demo_panel(offset=0.004)
    np.testing.assert_allclose(p.real_edge[0], [0.796, -0.3], atol=1e-15)
    assert p.lateral_offset([0.79, 0.1, 0.2])[0] == pytest.approx(0.006, abs=1e-15)
    assert p.lateral_offset([0.80, 0.0])[0] == pytest.approx(-0.004, abs=1e-15)
    # rotation only, by a about the centre c = (1, 0): the real edge keeps its distance 0.2
    # from c, its direction is d = (-sin a, cos a) and its left normal n = (-cos a, -sin a),
    # so by plane geometry the offset of p is (p - c) . n - 0.2 and the distance along the
    # edge is (p - c) . d + 0.3 (half the edge length)
    a = math.radians(1.0)
    p = demo_panel(angle=a)
    for y in (0.0, 0.2, -0.25):
        by_hand = -(0.8 - 1.0) * math.cos(a) - y * math.sin(a) - 0.2
        assert p.lateral_offset([0.8, y])[0] == pytest.approx(by_hand, abs=1e-15)
    assert p.edge_angle([0.0, 1.0])[0] == pytest.approx(a, abs=1e-15)
    assert p.edge_angle([0.0, 1.0, -5.0])[0] == pytest.approx(a, abs=1e-15)   # z ignored
    assert p.edge_angle([1.0, 0.0])[0] == pytest.approx(a + math.pi / 2, abs=1e-15)
    assert p.along_edge([0.8, 0.0])[0] == pytest.approx(0.2 * math.sin(a) + 0.3, abs=1e-15)
    with pytest.raises(PanelError, match="nominal edge start"):
        Panel(np.array([0.8]), np.array([0.8, 0.3]), np.array([1.0, 0.0]), 0.2)


def test_placement_draw_ranges_and_signs():
    rng = np.random.default_rng(5)
    draws = np.array([draw_placement(rng, (2.0, 6.0), (0.5, 1.5)) for _ in range(400)])
    mag_mm, mag_deg = np.abs(draws[:, 0]) * 1e3, np.degrees(np.abs(draws[:, 1]))
    assert mag_mm.min() >= 2.0 and mag_mm.max() <= 6.0
    assert mag_deg.min() >= 0.5 and mag_deg.max() <= 1.5
    assert 0.35 < (draws[:, 0] > 0).mean() < 0.65 and 0.35 < (draws[:, 1] > 0).mean() < 0.65
    with pytest.raises(PanelError, match="offset_mm"):
        draw_placement(rng, (6.0, 2.0), (0.5, 1.5))


# ---------------------------------------------------------------------------- sensor
def test_line_sensor_noise_latency_and_range():
    cfg = SensorConfig(rate=100.0, latency=0.03, offset_noise=0.2e-3,
                       angle_noise=math.radians(0.1), range=0.01)
    sensor = LineSensor(cfg, length=0.6, seed=[7, 1])
    n = 4000
    for k in range(n):
        sensor.sample(0.01 * k, 0.003, 0.02, 0.3)
    got = sensor.due(0.01 * (n - 1) + 0.03)
    assert len(got) == n and all(r.valid for r in got)
    off = np.array([r.offset for r in got]) - 0.003
    ang = np.array([r.angle for r in got]) - 0.02
    # sample std within 5/sqrt(2n) relative; mean within 5 sigma/sqrt(n) (common practice)
    assert abs(off.std() / 0.2e-3 - 1) < 5 / math.sqrt(2 * n)
    assert abs(ang.std() / math.radians(0.1) - 1) < 5 / math.sqrt(2 * n)
    assert abs(off.mean()) < 5 * 0.2e-3 / math.sqrt(n)
    # latency: a sample stamped t is delivered at t + latency, not before
    sensor.sample(100.0, 0.0, 0.0, 0.3)
    assert sensor.due(100.029) == []
    late = sensor.due(100.030)
    assert len(late) == 1 and late[0].stamp == 100.0
    # range: |offset| beyond 10 mm or off the edge's ends -> no reading
    for offset, along in ((0.0101, 0.3), (-0.011, 0.3), (0.0, -0.001), (0.0, 0.601)):
        assert not sensor.sample(200.0, offset, 0.0, along).valid
    assert sensor.out_of_range == 4


def test_true_reading_and_lateral_error_on_the_nominal_pass():
    scenario = load_scenario(DEMO / "scenario.yaml")
    cfg, top = scenario.nominal_pass, scenario.nominal_panel.top_height
    times = np.linspace(0.0, cfg.duration, 41)
    q = nominal_joint_path(cfg, DEMO_ARM, top, times)
    nominal = scenario.nominal_panel
    np.testing.assert_allclose(lateral_error(q, nominal), 0.0, atol=1e-9)
    shifted = nominal.placed(0.004, 0.0)
    np.testing.assert_allclose(lateral_error(q, shifted), -0.004, atol=1e-9)
    a = math.radians(-1.2)
    turned = nominal.placed(0.0, a)
    y = DEMO_ARM.forward(q)[:, 1, 3]
    by_hand = 0.2 * math.cos(a) - y * math.sin(a) - 0.2      # see the panel hand example
    np.testing.assert_allclose(lateral_error(q, turned), by_hand, atol=1e-9)
    offset, angle, along = true_edge_reading(DEMO_ARM, turned, q)
    np.testing.assert_allclose(offset, by_hand, atol=1e-9)
    np.testing.assert_allclose(angle, a, atol=1e-9)          # travel axis along +y
    assert along.min() > 0.0 and along.max() < turned.length


# ---------------------------------------------------------------------------- pass, files
def test_pass_profile_rest_to_rest_with_cruise():
    cfg = load_scenario(DEMO / "scenario.yaml").nominal_pass
    t = np.linspace(0.0, cfg.duration, 20001)
    s, v = path_distance(cfg, t)
    assert s[0] == 0.0 and s[-1] == pytest.approx(cfg.length, abs=1e-15)
    assert v[0] == 0.0 and v[-1] == 0.0 and v.max() == pytest.approx(cfg.cruise_speed)
    np.testing.assert_allclose(np.gradient(s, t), v, atol=1e-6)   # v is s' (central diff.)
    assert np.all(np.diff(s) >= 0)
    pose = nozzle_poses(cfg, 0.203, np.array([0.1]))[0]
    np.testing.assert_allclose(pose[:3, :3] @ pose[:3, :3].T, np.eye(3), atol=1e-15)
    assert np.linalg.det(pose[:3, :3]) == pytest.approx(1.0)


def read_reference_csv(path):
    with open(path) as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["time", "j1", "j2", "j3", "j4", "j5", "j6"]
    data = np.array(rows[1:], dtype=float)
    return data[:, 0], data[:, 1:]


def read_limits(path):
    joints = yaml.safe_load(Path(path).read_text())["joints"]
    names = [f"j{i}" for i in range(1, 7)]
    assert list(joints) == names
    get = lambda key: np.array([joints[j][key] for j in names], dtype=float)  # noqa: E731
    pos = np.array([joints[j]["position"] for j in names], dtype=float)
    return pos[:, 0], pos[:, 1], get("velocity"), get("acceleration"), get("jerk")


def test_demo_limits_allow_an_exact_limit_stage_at_50_ms():
    _, _, v, a, j = read_limits(DEMO / "limits.yaml")
    assert np.all(a ** 2 / (2 * j) + a * 0.05 <= 0.9 * v)
    assert np.all(j * 0.05 <= a)


def test_reference_csv_is_the_nominal_pass_and_well_within_limits_densely():
    times, q = read_reference_csv(DEMO / "reference.csv")
    lo, hi, vmax, amax, jmax = read_limits(DEMO / "limits.yaml")
    scenario = load_scenario(DEMO / "scenario.yaml")
    assert np.all(np.diff(times) > 0) and 8.0 <= times[-1] <= 15.0
    # the rows place the nozzle on the nominal edge at the nominal height, oriented down
    poses = DEMO_ARM.forward(q)
    np.testing.assert_allclose(lateral_error(q, scenario.nominal_panel), 0.0, atol=1e-8)
    np.testing.assert_allclose(poses[:, 2, 3], 0.203 + 0.004, atol=1e-8)
    np.testing.assert_allclose(poses[:, :3, 2], np.tile([0, 0, -1.0], (len(q), 1)), atol=1e-8)
    travel = np.linalg.norm(poses[-1, :2, 3] - poses[0, :2, 3])
    assert travel == pytest.approx(0.5, abs=1e-8)
    # dense check on the rest-ended quintic interpolating spline (scipy), 1 ms grid
    rest = [(1, np.zeros(6)), (2, np.zeros(6))]
    spline = make_interp_spline(times, q, k=5, bc_type=(rest, rest))
    grid = np.arange(0.0, times[-1], 0.001)
    pos = spline(grid)
    assert np.all(pos >= lo) and np.all(pos <= hi)
    for m, bound in ((1, vmax), (2, amax), (3, jmax)):
        assert np.all(np.abs(spline(grid, m)).max(axis=0) <= 0.5 * bound), f"derivative {m}"
    # and by finite differences of the rows themselves (central differences)
    h = times[1] - times[0]
    v = (q[2:] - q[:-2]) / (2 * h)
    a = (q[2:] - 2 * q[1:-1] + q[:-2]) / h ** 2
    assert np.all(np.abs(v).max(axis=0) <= 0.5 * vmax)
    assert np.all(np.abs(a).max(axis=0) <= 0.5 * amax)
    # Cartesian cruise speed of the pass is 60 mm/s
    speed = np.linalg.norm(np.diff(poses[:, :2, 3], axis=0), axis=1) / np.diff(times)
    assert speed.max() == pytest.approx(0.06, rel=1e-3)


def test_scenario_file_errors_name_the_key(tmp_path):
    data = yaml.safe_load((DEMO / "scenario.yaml").read_text())
    sc = parse_scenario(data)
    assert sc.panel(3).offset == sc.panel(3).offset and sc.panel(3).offset != sc.panel(4).offset
    fixed = sc.panel(offset_mm=-2.5, angle_deg=0.75)
    assert fixed.offset == -0.0025 and fixed.angle == pytest.approx(math.radians(0.75))
    bad = dict(data, sensor=dict(data["sensor"]))
    del bad["sensor"]["latency"]
    with pytest.raises(ScenarioError, match="sensor: missing key 'latency'"):
        parse_scenario(bad)
    bad = dict(data, panel=dict(data["panel"], centre=[1.0]))
    with pytest.raises(ScenarioError, match=r"panel.centre: expected 2 numbers"):
        parse_scenario(bad)
    bad = dict(data, sensor=dict(data["sensor"], rate=-1.0))
    with pytest.raises(ScenarioError, match="sensor rate"):
        parse_scenario(bad)
    path = tmp_path / "broken.yaml"
    path.write_text("seed: [\n")
    with pytest.raises(ScenarioError, match="broken.yaml.*not valid YAML"):
        load_scenario(path)
    with pytest.raises(ScenarioError, match="cannot read"):
        load_scenario(tmp_path / "missing.yaml")
