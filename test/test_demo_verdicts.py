# SPDX-License-Identifier: Apache-2.0
"""`adaptive-streamer demo` judged from outside: the figures compare like with like (the
tracker, which adapts nothing, scores ~1 against the reference-only figure over a short
``--duration``, and the adapted figure is that of the recorded joint_states in the window
the summary names), a stop nobody injected fails the run with its reason, a failed run
keeps its logs in the report folder, and ``--limits`` errors name the user's file."""
import json
from pathlib import Path

import numpy as np
import pytest
import yaml
from rosbags.highlevel import AnyReader
from rosbags.typesys import Stores, get_typestore

from adaptive_streamer.share import demo_file
from test_demo import run_demo

pytestmark = pytest.mark.ros

JOINTS = ["j1", "j2", "j3", "j4", "j5", "j6"]


def read_joint_states(bag: Path) -> tuple[np.ndarray, np.ndarray]:
    """(header stamps [s], positions (N, 6) in JOINTS order) of /joint_states, read with
    rosbags (an independent reader of the bag the recorder wrote)."""
    rows = []
    with AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
        conns = [c for c in reader.connections if c.topic == "/joint_states"]
        for conn, _, raw in reader.messages(connections=conns):
            msg = reader.deserialize(raw, conn.msgtype)
            names = list(msg.name)
            if all(j in names for j in JOINTS):
                rows.append((msg.header.stamp.sec + msg.header.stamp.nanosec * 1e-9,
                             [msg.position[names.index(j)] for j in JOINTS]))
    rows.sort(key=lambda r: r[0])
    return np.array([r[0] for r in rows]), np.array([r[1] for r in rows])


def test_the_tracker_over_a_short_duration_scores_about_one(tmp_path):
    from adaptive_streamer.sim.config import load_scenario
    from adaptive_streamer.sim.metrics import lateral_error
    rc, out, report = run_demo(tmp_path, "--policy", "tracker", "--duration", "3",
                               "--no-plots", "--record", str(tmp_path / "bags"), timeout=120)
    assert rc == 0, out[-4000:]
    s = json.loads((report / "summary.json").read_text())
    t0, t1 = s["pass_window"]
    assert 2.9 <= t1 - t0 <= 3.1, s["pass_window"]
    # the tracker is the reference-only policy: adapted and reference-only must agree
    ratio = s["lateral_rms_mm"] / s["reference_only_rms_mm"]
    assert 0.8 <= ratio <= 1.25, (ratio, s)
    # both figures cover the same stretch: as many driver ticks (within 5 %)
    assert abs(s["reference_only_samples"] - s["lateral_samples"]) \
        <= 0.05 * s["lateral_samples"], s
    # the adapted figure is the recorded joint_states' in the window the summary names
    (bag,) = [d for d in (tmp_path / "bags").iterdir() if d.is_dir()]
    t, q = read_joint_states(bag)
    inside = (t >= t0) & (t <= t1)
    panel = load_scenario(demo_file("scenario.yaml")).panel(s["seed"])
    e = np.abs(lateral_error(q[inside], panel)) * 1e3
    assert abs(inside.sum() - s["lateral_samples"]) <= 0.02 * s["lateral_samples"], \
        (int(inside.sum()), s["lateral_samples"])
    assert np.sqrt(np.mean(e * e)) == pytest.approx(s["lateral_rms_mm"], rel=0.02)


def test_a_stop_nobody_injected_fails_the_run_with_its_reason(tmp_path):
    # the hold policy stays put while the reference moves on: a deviation stop at ~2.4 s
    rc, out, report = run_demo(tmp_path, "--policy", "hold", "--duration", "4", "--no-plots",
                               timeout=120)
    assert rc == 1, out[-4000:]
    s = json.loads((report / "summary.json").read_text())
    (event,) = s["watchdog_events"]
    assert event["kind"] == "deviation" and "exceeds deviation_" in event["message"], event
    assert "rad" in event["message"], event
    line = s["outcome"]["line"]
    assert line.startswith("outcome: FAILED: a deviation stop at +") and \
        "that was not injected (no fault was injected)" in line, line
    assert line in out
    assert f"logs of the failed run: {(report / 'logs').resolve()}" in out, out[-2000:]
    assert (report / "logs" / "adapter.log").is_file()


def test_a_card_the_adapter_would_refuse_fails_before_any_process_starts(tmp_path):
    # a card for another decision period: the adapter's configure step (50 ms) refuses it,
    # run by the demo first: the error names the card and why, nothing started
    card = yaml.safe_load(demo_file("policy_feedback.yaml").read_text())
    card["limits"] = str(demo_file("limits.yaml"))
    card["decision_period"] = 0.04
    path = tmp_path / "card_40ms.yaml"
    path.write_text(yaml.safe_dump(card))
    rc, out, report = run_demo(tmp_path, "--policy", str(path), "--no-plots", timeout=120)
    assert rc == 2 and "Traceback" not in out, out[-3000:]
    assert "the adapter would not configure" in out and "decision_period" in out, out[-2000:]
    assert str(path) in out and "0.04" in out, out[-2000:]
    assert "logs of the failed run" not in out and not (report / "logs").exists()


def test_limits_errors_name_the_users_file_and_line(tmp_path):
    lim = yaml.safe_load(demo_file("limits.yaml").read_text())
    lim["joints"].pop("j6")
    path = tmp_path / "five_joints.yaml"
    path.write_text("# five of the six joints\n" + yaml.safe_dump(lim))
    rc, out, _ = run_demo(tmp_path, "--limits", str(path), timeout=60)
    assert rc == 2 and "Traceback" not in out, out[-2000:]
    assert f"{path}:2: joints:" in out and "'j6'" in out, out[-2000:]
    assert "card_" not in out and "adaptive_streamer_demo_" not in out, out[-2000:]
