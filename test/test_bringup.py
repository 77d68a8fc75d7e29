"""`adaptive-streamer bringup`: params-file parsing, a real multi-process bring-up of the demo
cell with a tracking policy, the controlled stop on Ctrl-C, and the one-process mode."""
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import rclpy
import yaml
from rclpy.node import Node
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.bringup import BringupError, read_params
from adaptive_streamer.share import demo_file
from test_demo import assert_inputs_recorded_before_motion

ROOT = Path(__file__).resolve().parents[1]


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


@pytest.mark.parametrize("text, words", [
    ("[1, 2]", "expected a ROS 2 params file"),
    ("robot:\n  ros__parameters: {}\n", "unknown node 'robot'"),
    ("adapter:\n  policy: x\n", "'adapter' has no 'ros__parameters'"),
    ("adapter: {ros__parameters: {a: [1,}\n", "not valid YAML"),
])
def test_bad_params_files_are_refused_with_a_reason(tmp_path, text, words):
    with pytest.raises(BringupError, match=words):
        read_params(write(tmp_path, "bad.yaml", text))


def test_missing_params_file_is_named(tmp_path):
    with pytest.raises(BringupError, match="cannot read params file .*nope.yaml"):
        read_params(tmp_path / "nope.yaml")


def test_namespaces_and_share_token_are_read(tmp_path):
    path = write(tmp_path, "p.yaml", "/cell/adapter:\n  ros__parameters:\n"
                 "    limits_file: $(share)/config/demo/limits.yaml\n")
    (entry,), text = read_params(path)
    assert entry.kind == "adapter" and entry.namespace == "/cell"
    assert "$(share)" not in text and str(demo_file("limits.yaml")) in text


def cell_params(tmp_path: Path, rate: float = 250.0) -> Path:
    """The demo params with a plain tracking card (no feedback needed)."""
    card = write(tmp_path, "tracker.yaml", yaml.safe_dump({
        "policy_card": 1, "name": "bringup test tracker", "kind": "tracker",
        "joints": ["j1", "j2", "j3", "j4", "j5", "j6"], "decision_period": 0.05,
        "limits": str(demo_file("limits.yaml"))}))
    data = yaml.safe_load(demo_file("params.yaml").read_text())
    data["adapter"]["ros__parameters"]["policy"] = str(card)
    data["adapter"]["ros__parameters"]["stream_rate"] = rate
    return write(tmp_path, "params.yaml", yaml.safe_dump(data))


class Listener:
    """An independent subscriber to `setpoints` in the test process."""

    def __init__(self) -> None:
        rclpy.init()
        self.node = Node("bringup_test_listener")
        self.samples: list[tuple[float, list[float]]] = []
        self.node.create_subscription(JointTrajectory, "setpoints", self._on, 50)

    def _on(self, msg: JointTrajectory) -> None:
        st = msg.header.stamp
        self.samples.append((st.sec + st.nanosec * 1e-9, list(msg.points[0].velocities)))

    def spin_until(self, cond, timeout: float, proc: subprocess.Popen) -> bool:
        end = time.monotonic() + timeout
        while time.monotonic() < end and proc.poll() is None:
            rclpy.spin_once(self.node, timeout_sec=0.05)
            if cond():
                return True
        return cond()

    def close(self) -> None:
        self.node.destroy_node()
        rclpy.shutdown()


@pytest.mark.ros
@pytest.mark.parametrize("one_process, record", [(False, True), (True, False)])
def test_bringup_streams_and_stops_cleanly_on_ctrl_c(tmp_path, one_process, record):
    params = cell_params(tmp_path)
    cmd = [sys.executable, "-m", "adaptive_streamer.cli", "bringup", "--params", str(params)]
    if one_process:
        cmd.append("--one-process")
    if record:
        cmd += ["--record", str(tmp_path / "bags")]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            env=dict(os.environ, PYTHONUNBUFFERED="1"))
    listener = Listener()
    try:
        assert listener.spin_until(lambda: len(listener.samples) > 250, 60.0, proc), \
            "no setpoint stream within 60 s"
        proc.send_signal(signal.SIGINT)   # what Ctrl-C does
        listener.spin_until(lambda: proc.poll() is not None, 40.0, proc)
        out, _ = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
        listener.close()
    assert proc.returncode == 0, out[-3000:]
    assert "Traceback" not in out, out[-3000:]
    # the stream was brought to rest before the processes stopped
    last = np.abs(np.array(listener.samples[-1][1]))
    assert last.max() < 1e-6, last
    if record:   # motion started only once the recorder recorded the inputs
        (bag,) = [d for d in (tmp_path / "bags").iterdir() if d.is_dir()]
        assert_inputs_recorded_before_motion(bag, ("/joint_states", "/reference/window"))


@pytest.mark.ros
def test_a_child_that_exits_during_startup_stops_bringup_at_once_with_its_last_lines(tmp_path):
    data = yaml.safe_load(cell_params(tmp_path).read_text())
    data["sim_driver"]["ros__parameters"]["initial_positions"] = [0.0] * 5   # 6 joints
    params = write(tmp_path, "dies.yaml", yaml.safe_dump(data))
    out = subprocess.run([sys.executable, "-m", "adaptive_streamer.cli", "bringup", "--params",
                          str(params)], capture_output=True, text=True, timeout=120)
    assert out.returncode == 1, out.stdout[-3000:] + out.stderr[-3000:]
    # the child's own error, quoted under the notice (not 30 s of "services did not appear")
    notice = "bringup: /sim_driver exited during startup (code 1); its last output:\n"
    assert notice in out.stderr, out.stderr[-3000:]
    quoted = out.stderr.split(notice)[1]
    assert "    error: parameter 'initial_positions': expected 6 finite numbers" in quoted, \
        out.stderr[-3000:]
    assert "lifecycle services did not appear" not in out.stderr   # no 30 s wait first
    assert "Traceback" not in out.stdout + out.stderr
