# SPDX-License-Identifier: Apache-2.0
"""`adaptive-streamer bringup`: params-file parsing, a real multi-process bring-up of the demo
cell with a tracking policy, the controlled stop on Ctrl-C, the one-process mode, and the
stop order of the child processes (stand-in children: the adapter's exits before the
driver's is asked to stop; a hanging adapter is killed after the timeout)."""
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


class ProbeNode:
    """A node of the test process that watches a bringup child process."""

    def __init__(self, name: str) -> None:
        rclpy.init()
        self.node = Node(name)

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


class Listener(ProbeNode):
    """An independent subscriber to `setpoints` in the test process."""

    def __init__(self) -> None:
        super().__init__("bringup_test_listener")
        self.samples: list[tuple[float, list[float]]] = []
        self.node.create_subscription(JointTrajectory, "setpoints", self._on, 50)

    def _on(self, msg: JointTrajectory) -> None:
        st = msg.header.stamp
        self.samples.append((st.sec + st.nanosec * 1e-9, list(msg.points[0].velocities)))


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
    assert "    error: SimDriverError: parameter 'initial_positions': expected 6 finite " \
           "numbers" in quoted, out.stderr[-3000:]
    assert "lifecycle services did not appear" not in out.stderr   # no 30 s wait first
    assert "Traceback" not in out.stdout + out.stderr


@pytest.mark.ros
def test_a_cell_whose_node_names_are_taken_is_refused_and_a_late_twin_stops_it(tmp_path):
    params = cell_params(tmp_path)
    cmd = [sys.executable, "-m", "adaptive_streamer.cli", "bringup", "--params", str(params)]
    # a node named like one of the cell's before it starts: refused (or, when discovery
    # was slower than bringup's look at the graph, stopped as soon as it is seen)
    twin = ProbeNode("sim_driver")
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=120,
                             env=dict(os.environ, PYTHONUNBUFFERED="1"))
    finally:
        twin.close()
    assert out.returncode == 1, out.stdout[-3000:] + out.stderr[-3000:]
    assert ("node name(s) /sim_driver already in use on ROS_DOMAIN_ID" in out.stderr
            or "a second node named /sim_driver appeared" in out.stderr), out.stderr[-3000:]
    # a second node with a cell's name while the cell moves: a controlled stop, exit 1
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            env=dict(os.environ, PYTHONUNBUFFERED="1"))
    listener = Listener()
    late = None
    try:
        assert listener.spin_until(lambda: len(listener.samples) > 250, 60.0, proc), \
            "no setpoint stream within 60 s"
        late = Node("reference_server")
        listener.spin_until(lambda: proc.poll() is not None, 40.0, proc)
        out, _ = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
        if late is not None:
            late.destroy_node()
        listener.close()
    assert proc.returncode == 1, out[-3000:]
    assert "a second node named /reference_server appeared on the ROS domain; stopping " \
           "this cell" in out, out[-3000:]
    assert "deactivating /adapter (controlled stop)" in out, out[-3000:]
    assert np.abs(np.array(listener.samples[-1][1])).max() < 1e-6   # brought to rest


STAND_IN = """
import signal, sys, time
out, delay = sys.argv[1], float(sys.argv[2])
def on_int(signum, frame):
    with open(out, "a") as f:
        f.write(f"sigint {time.monotonic()}\\n")
    time.sleep(delay)
    with open(out, "a") as f:
        f.write(f"exit {time.monotonic()}\\n")
    sys.exit(0)
signal.signal(signal.SIGINT, on_int if delay >= 0 else signal.SIG_IGN)
print("ready", flush=True)
while True:
    time.sleep(0.01)
"""


def stand_in(tmp_path: Path, name: str, delay: float) -> tuple[subprocess.Popen, Path]:
    """A child process that, on SIGINT, notes the time, takes ``delay`` seconds to stop and
    notes its exit (delay < 0: ignores SIGINT)."""
    out = tmp_path / f"{name}.log"
    proc = subprocess.Popen([sys.executable, "-c", STAND_IN, str(out), str(delay)],
                            stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "ready"
    return proc, out


def events(path: Path) -> dict[str, float]:
    return {k: float(v) for k, v in (line.split() for line in path.read_text().splitlines())}


@pytest.fixture
def stand_ins(tmp_path):
    """Start stand-in children (see `stand_in`); any still running at the end is killed."""
    started: list[subprocess.Popen] = []

    def start(name: str, delay: float) -> tuple[subprocess.Popen, Path]:
        proc, out = stand_in(tmp_path, name, delay)
        started.append(proc)
        return proc, out
    yield start
    for proc in started:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_stop_ends_the_adapter_before_the_driver(stand_ins):
    from adaptive_streamer.bringup import NodeEntry, Processes
    procs = Processes()
    driver, driver_log = stand_ins("driver", 0.0)
    adapter, adapter_log = stand_ins("adapter", 0.5)   # braking takes a while
    procs.add(NodeEntry("sim_driver", "", {}), driver, ["sim_driver"])
    procs.add(NodeEntry("adapter", "", {}), adapter, ["adapter"])
    assert procs.stop(timeout=5.0) == []
    a, d = events(adapter_log), events(driver_log)
    assert d["sigint"] >= a["exit"], (a, d)   # the driver ran on until the adapter exited


def test_stop_kills_an_adapter_that_hangs_then_stops_the_driver(stand_ins):
    from adaptive_streamer.bringup import NodeEntry, Processes
    procs = Processes()
    driver, driver_log = stand_ins("driver", 0.0)
    adapter, _ = stand_ins("adapter", -1.0)
    procs.add(NodeEntry("sim_driver", "", {}), driver, ["sim_driver"])
    procs.add(NodeEntry("adapter", "", {}), adapter, ["adapter"])
    t0 = time.monotonic()
    notes = procs.stop(timeout=0.5)
    assert notes == ["/adapter did not stop within 0.5 s and was killed"], notes
    assert adapter.returncode == -signal.SIGKILL and driver.returncode == 0
    assert events(driver_log)["sigint"] >= t0 + 0.5
