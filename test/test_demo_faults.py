# SPDX-License-Identifier: Apache-2.0
"""`adaptive-streamer demo --inject FAULT@S`: every fault kind, with the demo's limits and
with tighter ones (the demo then runs another policy and builds its fault policies for
those limits), ends in the watchdog stop expected for it, and the summary says so; faults
that could not stop the run are refused before the pass, with the reason.

The expected stop per fault is the watchdog trigger for what the fault does (the trigger
table in adaptive_streamer/core/watchdog.py): readings stop -> feedback_stale, joint_states
stop -> joint_states_stale, a reference 0.2 rad off the plan (deviation_joint 0.07 rad in
the demo params) -> deviation, NaN actions -> policy_fault, decisions later than the
period -> overruns.

The adapter's own process faults (``adapter_stall``, ``adapter_crash``) run once each with
the stream output (test_plan_bag.py runs both with the plan output) and are checked from the
recorded bag, read with rosbags: what the simulated driver followed (``driver/followed``)
against the commands it was sent (``driver/position_command``) and what the adapter streamed
(``setpoints``). The driver holds where the arm is once no command came for
``command_timeout`` (0.1 s in the demo params). They run the tracker policy: the faults do
not depend on the policy, and a policy that reads no feedback cannot be stopped by a late
sensor reading on a loaded machine before the injection.
"""
import json
import math
from pathlib import Path

import numpy as np
import pytest
import yaml
from rosbags.highlevel import AnyReader
from rosbags.typesys import Stores, get_typestore

from adaptive_streamer.share import demo_file
from test_demo import run_demo

pytestmark = pytest.mark.ros

EXPECTED = {"feedback_dropout": "feedback_stale", "reference_jump": "deviation",
            "joint_state_stall": "joint_states_stale", "nan_policy": "policy_fault",
            "slow_policy": "overruns"}
INJECT_AT = 1.0   # the demo reference starts moving at about 0.9 s
DURATION = 3.5


@pytest.fixture(scope="module")
def tight_limits(tmp_path_factory):
    """The demo's limits with velocity, acceleration and jerk at 60 %."""
    lim = yaml.safe_load(demo_file("limits.yaml").read_text())
    for entry in lim["joints"].values():
        for key in ("velocity", "acceleration", "jerk"):
            entry[key] = round(0.6 * entry[key], 6)
    path = tmp_path_factory.mktemp("limits") / "tight.yaml"
    path.write_text(yaml.safe_dump(lim))
    return path


@pytest.mark.parametrize("limits", ["demo", "tight"])
@pytest.mark.parametrize("kind", sorted(EXPECTED))
def test_each_fault_ends_in_its_expected_stop(tmp_path, tight_limits, kind, limits):
    extra = ["--limits", str(tight_limits)] if limits == "tight" else []
    rc, out, report = run_demo(tmp_path, "--inject", f"{kind}@{INJECT_AT:g}",
                               "--duration", f"{DURATION:g}", "--no-plots", *extra, timeout=120)
    assert rc == 0, out[-4000:]
    (fault,) = json.loads((report / "summary.json").read_text())["faults"]
    assert fault["fault"] == kind and fault["expected"] == EXPECTED[kind], fault
    assert fault["injected"], (fault, out[-3000:])
    assert fault["stop"] == EXPECTED[kind] and fault["as_expected"], (fault, out[-3000:])
    assert 0.0 <= fault["stop_after"] < DURATION - INJECT_AT, fault
    assert math.isfinite(fault["rest_after"]), fault   # the stop brought the arm to rest
    assert f"{kind} at +{INJECT_AT:g} s (expected stop: {EXPECTED[kind]}): " \
           f"{EXPECTED[kind]} stop" in out
    if limits == "tight" and kind in ("nan_policy", "slow_policy"):
        assert "fault policy built for this run" in out, out[-3000:]


@pytest.mark.parametrize("args, words", [
    (["--policy", "tracker", "--inject", "feedback_dropout@1"], "reads no feedback"),
    (["--inject", "nan_policy@1", "--inject", "slow_policy@2"], "one fault per run"),
    (["--inject", "joint_state_stall@5", "--duration", "3"], "before the injection"),
    (["--inject", "nan_policy@10.6"], "the reference stands still"),  # it ends at 10.8 s
])
def test_a_fault_that_could_not_stop_the_run_is_refused_before_the_pass(tmp_path, args, words):
    rc, out, _ = run_demo(tmp_path, *args, timeout=60)
    assert rc == 2 and words in out and "Traceback" not in out, out[-2000:]
    assert "dispensing pass" not in out


ADAPTER_AT = 4.0        # the demo arm moves at about 0.07 rad/s from 3.5 s on
ADAPTER_DURATION = 6.0
COMMAND_TIMEOUT = 0.1   # sim_driver command_timeout in config/demo/params.yaml
HOLD_MARGIN = 0.2       # s after the timeout before the hold is checked (late deliveries)
LAG = 5e-3              # rad: 0.08 rad/s (the pass's fastest) x 60 ms, twice the plant
                        # lag (8 ms delay + 2 zeta / omega = 23 ms in the demo params)


def read_topics(folder: Path) -> dict[str, list[tuple[int, int, np.ndarray, np.ndarray]]]:
    """Per topic (followed, position_command, setpoints): (header stamp or log time [ns],
    log time [ns], positions, velocities), sorted by the first."""
    (meta,) = folder.rglob("metadata.yaml")
    store = get_typestore(Stores.ROS2_JAZZY)
    topics = {"/driver/followed": "followed", "/driver/position_command": "command",
              "/setpoints": "setpoints"}
    out: dict[str, list] = {k: [] for k in topics.values()}
    with AnyReader([meta.parent], default_typestore=store) as reader:
        conns = [c for c in reader.connections if c.topic in topics]
        for conn, log_ns, raw in reader.messages(connections=conns):
            msg = reader.deserialize(raw, conn.msgtype)
            key = topics[conn.topic]
            if key == "command":
                out[key].append((int(log_ns), int(log_ns), np.array(msg.data), np.zeros(0)))
                continue
            stamp = msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec
            pt = msg.points[0]
            out[key].append((stamp, int(log_ns), np.array(pt.positions),
                             np.array(pt.velocities)))
    for rows in out.values():
        rows.sort(key=lambda r: r[0])
    assert all(out.values()), {k: len(v) for k, v in out.items()}
    return out


def held(followed: list, t0_ns: int, t1_ns: int, tol: float = 0.0) -> np.ndarray:
    """The one position (within ``tol`` rad) the driver followed at every tick stamped in
    [t0, t1]."""
    rows = [r[2] for r in followed if t0_ns <= r[0] <= t1_ns]
    assert len(rows) >= 10, f"{len(rows)} followed ticks in {(t1_ns - t0_ns) * 1e-9:.3f} s"
    spread = np.max(np.abs(np.array(rows) - rows[0]))
    assert spread <= tol, f"the followed position moved by {spread:g} rad while holding"
    return rows[0]


def assert_near_the_last_command(position: np.ndarray, commands: list, before_ns: int):
    """The driver holds where its arm is (sim/plant.py: the position freezes), which trails
    the last command by the plant's lag: at most ``LAG`` at the demo's speeds."""
    last = [r[2] for r in commands if r[0] <= before_ns][-1]
    assert np.max(np.abs(position - last)) <= LAG, \
        ("the driver holds away from the last command it was sent", position, last)


def _adapter_run(tmp_path: Path, spec: str) -> tuple[dict, dict]:
    rec = tmp_path / "rec"
    rc, out, report = run_demo(tmp_path, "--output", "stream", "--policy", "tracker",
                               "--record", str(rec),
                               "--inject", f"{spec}@{ADAPTER_AT:g}", "--duration",
                               f"{ADAPTER_DURATION:g}", "--no-plots", timeout=180)
    assert rc == 0, out[-4000:]
    (fault,) = json.loads((report / "summary.json").read_text())["faults"]
    assert fault["injected"] and fault["as_expected"], (fault, out[-3000:])
    return fault, read_topics(rec)


def test_adapter_crash_with_the_stream_output_leaves_the_driver_holding(tmp_path):
    fault, bag = _adapter_run(tmp_path, "adapter_crash")
    assert fault["expected"] == "none" and fault["stop"] == "none", fault
    setpoints, commands, followed = bag["setpoints"], bag["command"], bag["followed"]
    crash_ns = setpoints[-1][0]    # the adapter's last tick (the recorder receives later)
    moved = setpoints[-1][2] - [r[2] for r in setpoints if r[0] <= crash_ns - 100_000_000][-1]
    assert np.max(np.abs(moved)) > 1e-3, "the arm stood still before the crash: says nothing"
    start = crash_ns + int((COMMAND_TIMEOUT + HOLD_MARGIN) * 1e9)
    position = held(followed, start, followed[-1][0])
    assert_near_the_last_command(position, commands, commands[-1][0])
    assert math.isfinite(fault["rest_after"]) and fault["rest_after"] < 0.6, fault


def test_adapter_stall_with_the_stream_output_holds_then_stops_at_rest(tmp_path):
    fault, bag = _adapter_run(tmp_path, "adapter_stall:0.3")
    assert fault["expected"] == "overruns" and fault["stop"] == "overruns", fault
    assert fault["length"] >= 0.3, fault     # SIGSTOP to SIGCONT, as made
    setpoints, commands, followed = bag["setpoints"], bag["command"], bag["followed"]
    # nothing was streamed while the adapter was suspended: the longest gap between the
    # setpoints' stamps (the adapter's tick times) is the stall
    stamps = np.array([r[0] for r in setpoints])
    k = int(np.argmax(np.diff(stamps)))
    gap = (int(stamps[k]), int(stamps[k + 1]))
    assert abs((gap[1] - gap[0]) * 1e-9 - fault["length"]) < 0.1, (gap, fault)
    # the driver held near the last command it had (sent with the setpoint before the gap)
    # until the adapter resumed
    start = gap[0] + int((COMMAND_TIMEOUT + HOLD_MARGIN / 2) * 1e9)
    position = held(followed, start, gap[1] - 20_000_000)
    assert_near_the_last_command(position, commands, setpoints[k][1] + 2_000_000)
    # after the stall the adapter's overruns stop brought its stream, and the arm, to rest
    assert np.all(np.abs(setpoints[-1][3]) <= 1e-9), setpoints[-1][3]
    # at rest on the stop's last segment: its positions are evaluated per tick in float64,
    # equal to the last bits only (seen: 3.3e-16 rad)
    held(followed, followed[-1][0] - 200_000_000, followed[-1][0], tol=1e-12)
