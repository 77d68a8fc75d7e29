# SPDX-License-Identifier: Apache-2.0
"""`adaptive-streamer demo` end to end: the live cell over DDS, its report, and the recorded
stream checked here, independently of the demo's own claim."""
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
from rosbags.highlevel import AnyReader
from rosbags.typesys import Stores, get_typestore

from adaptive_streamer.share import demo_file

pytestmark = pytest.mark.ros


def run_demo(tmp_path: Path, *extra: str, timeout: float = 240.0) -> tuple[int, str, Path]:
    report = tmp_path / "report"
    cmd = [sys.executable, "-m", "adaptive_streamer.cli", "demo", "--report", str(report),
           "--no-progress", *extra]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout,
                          env=dict(os.environ, PYTHONUNBUFFERED="1"))
    return proc.returncode, proc.stdout + proc.stderr, report


def read_setpoints(bag_dir: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(stamps, positions, velocities, accelerations) of `setpoints`, read with rosbags
    (an independent reader of the bag the recorder wrote)."""
    store = get_typestore(Stores.ROS2_JAZZY)
    rows = []
    with AnyReader([bag_dir], default_typestore=store) as reader:
        conns = [c for c in reader.connections if c.topic == "/setpoints"]
        assert conns, f"no /setpoints in {bag_dir}: {[c.topic for c in reader.connections]}"
        for conn, _, raw in reader.messages(connections=conns):
            msg = reader.deserialize(raw, conn.msgtype)
            pt = msg.points[0]
            rows.append((msg.header.stamp.sec + msg.header.stamp.nanosec * 1e-9,
                         pt.positions, pt.velocities, pt.accelerations))
    rows.sort(key=lambda r: r[0])
    return (np.array([r[0] for r in rows]), np.array([r[1] for r in rows]),
            np.array([r[2] for r in rows]), np.array([r[3] for r in rows]))


def assert_within_limits(t, p, v, a, limits_file: Path) -> None:
    """Finite-difference checks written here, not taken from the package."""
    lim = yaml.safe_load(limits_file.read_text())["joints"]
    names = ["j1", "j2", "j3", "j4", "j5", "j6"]
    pmin = np.array([lim[n]["position"][0] for n in names])
    pmax = np.array([lim[n]["position"][1] for n in names])
    V = np.array([lim[n]["velocity"] for n in names])
    A = np.array([lim[n]["acceleration"] for n in names])
    J = np.array([lim[n]["jerk"] for n in names])
    tol = 1e-6
    assert np.all(np.isfinite(p)) and np.all(np.isfinite(v)) and np.all(np.isfinite(a))
    assert np.all(p >= pmin - tol) and np.all(p <= pmax + tol)
    assert np.all(np.abs(v) <= V * (1 + tol)), np.abs(v).max(axis=0) / V
    assert np.all(np.abs(a) <= A * (1 + tol)), np.abs(a).max(axis=0) / A
    dt = np.diff(t)[:, None]
    assert np.all(dt > 0)
    # velocity and acceleration from finite differences of the streamed positions and
    # velocities (a sampled constant-jerk motion: trapezoid rules, common practice)
    fd_v = np.diff(p, axis=0) / dt
    fd_a = np.diff(v, axis=0) / dt
    assert np.all(np.abs(fd_v) <= V * (1 + tol) + J * dt * dt), "position steps exceed vmax"
    assert np.all(np.abs(fd_a) <= A * (1 + tol) + J * dt), "velocity steps exceed amax"
    # the plan's ticks are float64 absolute ROS times, resolved to their spacing (0.24 us at
    # today's epoch), and the stamps round them to the nanosecond: a step of the
    # acceleration may span up to 2 such spacings more than the stamps say
    res = np.spacing(np.abs(t).max())
    jerk = np.diff(a, axis=0) / (dt + 2 * res + 1e-9)
    assert np.all(np.abs(jerk) <= J * (1 + tol)), np.abs(jerk).max(axis=0) / J
    # the streamed velocity is the derivative of the streamed position (mid-point rule)
    mid_v = 0.5 * (v[1:] + v[:-1])
    assert np.all(np.abs(fd_v - mid_v) <= J * dt * dt / 6 + 1e-9)


def test_demo_adapts_within_limits_and_writes_its_report(tmp_path):
    rc, out, report = run_demo(tmp_path, "--record", str(tmp_path / "bags"))
    assert rc == 0, out[-4000:]
    assert "NOT a safety function" in out and "ISO 10218" in out   # cautions at start
    assert "locked on: edge_offset within 0.001 for 0.5 s" in out   # the pass's start condition
    summary = json.loads((report / "summary.json").read_text())
    assert summary["violations"] == 0
    assert summary["watchdog_events"] == []
    # adaptation cuts the lateral placement error well below half the reference-only error
    assert summary["lateral_rms_mm"] < 0.5 * summary["reference_only_rms_mm"], summary
    for name in ("position", "velocity", "acceleration", "jerk", "deviation", "lateral_error",
                 "timing"):
        assert (report / f"{name}.png").stat().st_size > 1000
    assert "lateral_error.png" in (report / "summary.md").read_text()
    assert (report / "summary.html").is_file()
    (bag,) = [d for d in (tmp_path / "bags").iterdir() if d.is_dir()]
    t, p, v, a = read_setpoints(bag)
    assert t.size > 1000
    assert_within_limits(t, p, v, a, demo_file("limits.yaml"))
    assert_inputs_recorded_before_motion(bag)


def assert_inputs_recorded_before_motion(
        bag: Path, inputs: tuple[str, ...] = ("/joint_states", "/feedback", "/reference/window")
) -> None:
    """Motion started only once the recorder recorded the adapter's inputs: every input
    topic has a message in the bag before the first decision record and before the first
    setpoint (read with rosbags, not the package)."""
    first: dict[str, int] = {}
    with AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
        for conn, t, _ in reader.messages():
            first.setdefault(conn.topic, t)
    start = min(first["/adapter/decisions"], first["/setpoints"])
    for topic in inputs:
        assert topic in first and first[topic] < start, (topic, first)


def test_feedback_dropout_ends_in_a_controlled_stop(tmp_path):
    rc, out, report = run_demo(tmp_path, "--inject", "feedback_dropout@3", "--record",
                               str(tmp_path / "bags"))
    assert rc == 0, out[-4000:]
    summary = json.loads((report / "summary.json").read_text())
    kinds = [e["kind"] for e in summary["watchdog_events"]]
    assert kinds and kinds[0] == "feedback_stale", kinds
    (bag,) = [d for d in (tmp_path / "bags").iterdir() if d.is_dir()]
    t, p, v, a = read_setpoints(bag)
    assert_within_limits(t, p, v, a, demo_file("limits.yaml"))
    assert np.abs(v[-1]).max() < 1e-6   # at rest at the end


def test_tighter_limits_slow_the_reference_down(tmp_path):
    lim = yaml.safe_load(demo_file("limits.yaml").read_text())
    for entry in lim["joints"].values():  # far below what the pass demands of j1 (~0.08 rad/s)
        entry["velocity"] = 0.05
        entry["acceleration"] = 0.25
        entry["jerk"] = 2.5
    path = tmp_path / "tight.yaml"
    path.write_text(yaml.safe_dump(lim))
    rc, out, report = run_demo(tmp_path, "--limits", str(path), "--duration", "12",
                               "--record", str(tmp_path / "bags"))
    assert rc == 0, out[-4000:]
    assert "slowed down" in out and "linear_feedback" in out
    (bag,) = [d for d in (tmp_path / "bags").iterdir() if d.is_dir()]
    t, p, v, a = read_setpoints(bag)
    assert_within_limits(t, p, v, a, path)


@pytest.mark.parametrize("args, words", [
    (["--inject", "meteor@2"], "expected FAULT@SECONDS"),
    (["--inject", "nan_policy@soon"], "is not a number"),
    (["--policy", "/nope/card.yaml"], "no such card file"),
])
def test_bad_demo_options_are_refused_with_a_reason(tmp_path, args, words):
    rc, out, _ = run_demo(tmp_path, *args, timeout=60)
    assert rc == 2 and words in out and "Traceback" not in out, out[-2000:]
