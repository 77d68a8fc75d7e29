# SPDX-License-Identifier: Apache-2.0
"""The plan-ahead output over DDS, checked from outside: a demo run with ``--output plan`` is
recorded, the plan messages are read back from the bag with their receive times by an
independent reader (rosbags), and followed with the message semantics implemented in the
test (test/plan_follower.py, not the simulated driver's code).

Checked, for a crash of the adapter process (SIGKILL) and for a 0.3 s stall (SIGSTOP /
SIGCONT): the followed motion sampled at 1 kHz stays within every limit of the demo's
limits file (read here with yaml); position, velocity and acceleration are continuous at
every switch from one message to the next (within 1e-9 at the switch time; after a plan
that had ended, whose last knot is at rest within 1e-6 rad/s and 1e-5 rad/s^2, within
those); the last plan ends at rest, so the arm comes to rest after the crash and after the
stall's latched stop.
Then a replay of the bag regenerates the plan messages, and they agree with the recorded
ones. The demo runs the tracker policy: these checks do not depend on the policy, and one
that reads no feedback cannot be stopped by a late sensor reading on a loaded machine
before the fault is injected (the summary must say it was).
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import yaml
from rosbags.highlevel import AnyReader
from rosbags.typesys import Stores, get_typestore

from adaptive_streamer.replay.run import replay
from adaptive_streamer.share import demo_file
from plan_follower import PlanMessage, follow, late, switch_differences
from test_demo import run_demo

pytestmark = pytest.mark.ros

INJECT_AT = 4.0     # the arm moves at about 0.07 rad/s from 3.5 s on (below 0.01 before 3 s)
DURATION = 6.0


def demo_limits() -> dict[str, np.ndarray]:
    """The demo's limits file, read directly (yaml), per joint in file order."""
    joints = yaml.safe_load(demo_file("limits.yaml").read_text())["joints"]
    names = list(joints)
    return {"names": names,
            "pmin": np.array([joints[j]["position"][0] for j in names]),
            "pmax": np.array([joints[j]["position"][1] for j in names]),
            "v": np.array([joints[j]["velocity"] for j in names]),
            "a": np.array([joints[j]["acceleration"] for j in names]),
            "j": np.array([joints[j]["jerk"] for j in names])}


def read_plans(bag_dir: Path, names: list[str]) -> list[PlanMessage]:
    """Every ``/driver/plan`` message with its receive (log) time, joints in ``names`` order."""
    store = get_typestore(Stores.ROS2_JAZZY)
    out = []
    with AnyReader([bag_dir], default_typestore=store) as reader:
        conns = [c for c in reader.connections if c.topic == "/driver/plan"]
        assert conns, f"no /driver/plan in {bag_dir}: {[c.topic for c in reader.connections]}"
        for conn, log_ns, raw in reader.messages(connections=conns):
            msg = reader.deserialize(raw, conn.msgtype)
            order = [list(msg.joint_names).index(j) for j in names]
            stamp = msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec
            times = np.array([stamp + p.time_from_start.sec * 1_000_000_000
                              + p.time_from_start.nanosec for p in msg.points], np.int64)
            p, v, a = (np.array([np.asarray(getattr(pt, f))[order] for pt in msg.points])
                       for f in ("positions", "velocities", "accelerations"))
            out.append(PlanMessage(int(log_ns), times, p, v, a))
    return out


def _bag(folder: Path) -> Path:
    (meta,) = folder.rglob("metadata.yaml")
    return meta.parent


@pytest.mark.parametrize("fault", ["adapter_crash", "adapter_stall:0.3"])
def test_recorded_plans_are_smooth_within_limits_and_end_at_rest(tmp_path, fault):
    rec = tmp_path / "rec"
    rc, out, report = run_demo(tmp_path, "--output", "plan", "--policy", "tracker",
                               "--record", str(rec), "--inject", f"{fault}@{INJECT_AT:g}",
                               "--duration", f"{DURATION:g}", "--no-plots", timeout=180)
    assert rc == 0, out[-4000:]
    (injected,) = json.loads((report / "summary.json").read_text())["faults"]
    assert injected["injected"], (injected, out[-3000:])
    lim = demo_limits()
    bag = _bag(rec)
    plans = read_plans(bag, lim["names"])
    assert len(plans) > 20, out[-2000:]
    # every knot sequence: strictly increasing times, the last knot at rest
    for m in plans:
        assert np.all(np.diff(m.times_ns) > 0)
        assert np.all(np.abs(m.v[-1]) <= 1e-6) and np.all(np.abs(m.a[-1]) <= 1e-5)
    t0 = min(m.start_ns for m in plans)
    t1 = max(int(m.times_ns[-1]) for m in plans) + 200_000_000
    f = follow(plans, t0, t1)
    assert (f["msg"] >= 0).all()
    tol = 1e-9
    for key in ("v", "a", "j"):
        peak = np.max(np.abs(f[key]), axis=0)
        assert np.all(peak <= lim[key] * (1 + tol) + tol), (key, peak, lim[key])
    assert np.all(f["p"] >= lim["pmin"] - tol) and np.all(f["p"] <= lim["pmax"] + tol)
    assert np.max(np.abs(f["v"])) > 0.05, \
        f"the arm never moved: the run says nothing\n{out[-3000:]}"
    # continuous at every switch; after an outgoing plan ended (the arm holding at its last
    # knot), within the rest tolerances its last knot is checked with above
    rest_tol = np.array([1e-9, 1e-6, 1e-5])
    for diff, ended in switch_differences(plans):
        assert np.all(diff <= (rest_tol if ended else 1e-9)), \
            (diff, ended, f"{late(plans[1:])} plan(s) received after their start")
    # the followed motion ends at rest: after the crash, and after the stall's stop
    assert np.all(np.abs(f["v"][-100:]) <= 1e-6) and np.all(np.abs(f["a"][-100:]) <= 1e-5)
    if fault == "adapter_crash":
        crash_ns = plans[-1].received_ns
        assert plans[-1].times_ns[-1] - crash_ns < 2_000_000_000  # the sent tail ends it
    # replay regenerates the plan messages: the same knots, bit for bit
    regenerated = {p.knots.stamp_ns: p.knots for p in replay(bag).plans}
    matched = 0
    for m in plans:
        k = regenerated.get(m.start_ns)
        if k is None:
            continue
        matched += 1
        for got, want in ((m.p, k.positions), (m.v, k.velocities), (m.a, k.accelerations)):
            np.testing.assert_array_equal(got, want)
    assert matched >= len(plans) - 1, (matched, len(plans))
