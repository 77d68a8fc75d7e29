# SPDX-License-Identifier: Apache-2.0
"""`adaptive-streamer preflight` over DDS: it passes on a running cell (the simulated driver,
a real rclpy node in this process) and each problem injected on its own fails its own row.

The pre-flight runs its own node in its own context; the driver's ``joint_states`` and
command subscription are all it sees of the cell. Waits are bounded (`TIMEOUT`): a passing
check ends the wait as soon as everything was seen for the observation window.
"""
import subprocess
import sys
import threading
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pytest
import rclpy
import yaml
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.parameter import Parameter

from adapter_harness import JOINTS, LIMITS_FILE, P0, write_card, write_reference
from adaptive_streamer.nodes.sim_driver import SimDriver
from adaptive_streamer.preflight.checks import Status
from adaptive_streamer.preflight.run import format_table, preflight

pytestmark = pytest.mark.ros
ROOT = Path(__file__).resolve().parents[1]
TIMEOUT = 10.0  # upper bound for DDS discovery and the observation window; not a speed figure


@contextmanager
def driver(**params):
    """The simulated driver at P0 (250 Hz, position commands), spinning in a thread."""
    ctx = Context()
    rclpy.init(context=ctx)
    overrides = {"joints": JOINTS, "initial_positions": P0.tolist(), "rate": 250.0,
                 "command_timeout": 0.1, **params}
    node = SimDriver(context=ctx, parameter_overrides=[Parameter(k, value=v)
                                                       for k, v in overrides.items()])
    ex = SingleThreadedExecutor(context=ctx)
    ex.add_node(node)
    thread = threading.Thread(target=ex.spin, daemon=True)
    thread.start()
    try:
        yield node
    finally:
        ex.shutdown()
        thread.join(5.0)
        node.destroy_node()
        rclpy.shutdown(context=ctx)


def cell_params(folder: Path, reference: Path | None = None, card: Path | None = None,
                topic: str = "driver/position_command") -> Path:
    """A cell's params file: the adapter, the reference server and the driver's timeout."""
    reference = reference or write_reference(folder)
    card = card or write_card(folder, "tracker", "tracker")
    data = {
        "reference_server": {"ros__parameters": {
            "reference_file": str(reference), "limits_file": str(LIMITS_FILE),
            "end_mode": "loop"}},  # the harness reference is one lap of a periodic path
        "sim_driver": {"ros__parameters": {"command_timeout": 0.1}},
        "adapter": {"ros__parameters": {
            "policy": str(card), "limits_file": str(LIMITS_FILE), "stream_rate": 250.0,
            "outputs": ["position"], "position": {"type": "position", "topic": topic},
            "watchdog": {"joint_states_timeout": 0.25}}},
    }
    path = folder / "cell.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def rows_of(path: Path) -> dict:
    rows = preflight(str(path), timeout=TIMEOUT)
    print(format_table(rows))
    return {r.name: r for r in rows}


def assert_only_failure(rows: dict, name: str, words: str) -> None:
    bad = sorted(n for n, r in rows.items() if r.failed)
    assert bad == [name], f"expected only '{name}' to fail, failed: {bad}"
    assert words in rows[name].detail and rows[name].fix


def test_passes_on_the_running_cell_from_the_command_line(tmp_path):
    params = cell_params(tmp_path)
    with driver():
        proc = subprocess.run(
            [sys.executable, "-m", "adaptive_streamer.cli", "preflight", "--params",
             str(params), "--timeout", str(TIMEOUT)],
            cwd=ROOT, capture_output=True, text=True, timeout=120)
    print(proc.stdout, proc.stderr)
    assert proc.returncode == 0
    assert "preflight: passed" in proc.stdout and "FAIL" not in proc.stdout
    for name in ("limits", "policy", "reference", "joint_states names", "joint_states fresh",
                 "reference start", "output position", "stream rate"):
        assert any(line.startswith(name) and " pass " in line for line in
                   proc.stdout.splitlines()), name


def test_a_joint_missing_from_joint_states_fails_the_names(tmp_path):
    params = cell_params(tmp_path)
    with driver(joints=JOINTS[:5], initial_positions=P0[:5].tolist()):
        rows = rows_of(params)
    assert_only_failure(rows, "joint_states names", "'j6'")
    assert rows["joint_states fresh"].status is Status.SKIP


def test_stale_joint_states_fail_freshness(tmp_path):
    params = cell_params(tmp_path)
    with driver(stall=True):  # subscribes to commands, publishes no joint_states
        rows = rows_of(params)
    assert rows["joint_states fresh"].failed and rows["joint_states names"].failed
    assert rows["output position"].status is Status.PASS
    assert rows["policy"].status is Status.PASS and rows["reference"].status is Status.PASS


def test_a_reference_beyond_the_limits_fails(tmp_path):
    # peak speed pi * 0.5 / 0.3 = 5.2 rad/s on j6, over its 3.0 rad/s limit
    params = cell_params(tmp_path, reference=write_reference(tmp_path, lap=0.3))
    with driver():
        rows = rows_of(params)
    assert_only_failure(rows, "reference", "exceeds the joint limits")


def test_a_reference_far_from_the_arm_fails(tmp_path):
    far = P0 + np.array([0.0, 0.0, 0.0, 0.5, 0.0, 0.0])
    params = cell_params(tmp_path, reference=write_reference(tmp_path, p0=far))
    with driver():
        rows = rows_of(params)
    assert_only_failure(rows, "reference start", "'j4': 0.5")


def test_a_command_topic_without_subscriber_fails(tmp_path):
    params = cell_params(tmp_path, topic="driver/nobody_listens")
    with driver():
        rows = rows_of(params)
    assert_only_failure(rows, "output position", "/driver/nobody_listens: no subscriber")


def test_a_bad_policy_card_fails(tmp_path):
    card = write_card(tmp_path, "wrong_joints", "tracker", joints=JOINTS[:5])
    params = cell_params(tmp_path, card=card)
    with driver():
        rows = rows_of(params)
    assert_only_failure(rows, "policy", "j")
