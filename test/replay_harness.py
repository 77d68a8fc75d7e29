# SPDX-License-Identifier: Apache-2.0
"""A short live run of the real stack, recorded to a bag, for the record/replay tests.

Processes (real nodes over DDS, wall-clock ROS time):

* cell: reference_server (the demo reference, started once the adapter is active),
  sim_driver (the demo arm, position interface), edge_sensor (the demo line sensor) and
  sensor_bridge (its offset and angle as the ``feedback`` features ``edge_offset`` /
  ``edge_angle``) in one process;
* adapter (own process), configured and activated from here through its lifecycle
  services once the recorder records its outputs, deactivated at the end (a controlled
  stop), with a linear-feedback policy card written here (the demo limits; a small gain
  from ``edge_offset`` onto j1, so feedback changes the decisions), suspended for a moment
  halfway (`STALL_S`) so that some decisions come late;
* recorder (own process, `adaptive_streamer.replay.recorder.Recorder`).

`live_recording` runs it once per test process and caches the bag.
"""
from __future__ import annotations

import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import yaml

from adaptive_streamer.replay.recorder import Recorder
from adaptive_streamer.share import demo_file

JOINTS = ["j1", "j2", "j3", "j4", "j5", "j6"]
FOLLOW_S = 4.0       # seconds of recording once the adapter follows (short: shared cores)
STALL_S = 0.12       # the adapter process is suspended this long mid-run: late decisions
START_WAIT_S = 60.0  # upper bound for process start and DDS discovery; not a speed check

CELL = """
import sys
from adaptive_streamer.nodes.common import run_nodes
from adaptive_streamer.nodes.edge_sensor import EdgeSensor
from adaptive_streamer.nodes.reference_server import ReferenceServer
from adaptive_streamer.nodes.sensor_bridge import SensorBridge
from adaptive_streamer.nodes.sim_driver import SimDriver
sys.exit(run_nodes([ReferenceServer, SimDriver, EdgeSensor, SensorBridge], sys.argv[1:]))
"""

_CACHE: dict[str, Path | Exception] = {}


class _NoAliases(yaml.SafeDumper):
    """YAML without anchors/aliases (rcl's params parser refuses them)."""

    def ignore_aliases(self, data: object) -> bool:
        return True


def start_positions() -> list[float]:
    """The first row of the demo reference (the arm starts there, at rest)."""
    with demo_file("reference.csv").open() as f:
        for line in f:
            if line[:1].isdigit() or line[:1] == "-":
                return [float(x) for x in line.split(",")[1:]]
    raise RuntimeError("demo reference has no rows")


def write_card(folder: Path, gain: float = 2.0) -> Path:
    """A linear-feedback card for the demo arm (edge_offset -> j1)."""
    card = {"policy_card": 1, "name": "replay_test_feedback", "kind": "linear_feedback",
            "joints": JOINTS, "decision_period": 0.05,
            "limits": str(demo_file("limits.yaml")),
            "feedback_gain": {"features": ["edge_offset"],
                              "matrix": [[gain]] + [[0.0]] * (len(JOINTS) - 1)}}
    path = folder / "feedback.card.yaml"
    path.write_text(yaml.safe_dump(card, sort_keys=False))
    return path


def write_params(folder: Path, card: Path) -> Path:
    """A params file for the cell and the adapter."""
    params = {
        "reference_server": {"ros__parameters": {
            "reference_file": str(demo_file("reference.csv")), "joint_names": JOINTS,
            "limits_file": str(demo_file("limits.yaml")), "horizon": 10,
            "decision_period": 0.05, "start_mode": "service", "end_mode": "hold"}},
        "sim_driver": {"ros__parameters": {
            "joints": JOINTS, "initial_positions": start_positions(), "rate": 250.0,
            "command_interface": "position"}},
        "edge_sensor": {"ros__parameters": {"scenario": str(demo_file("scenario.yaml"))}},
        "sensor_bridge": {"ros__parameters": {
            "inputs": ["edge"], "publish_rate": 0.0, "feedback_qos": "reliable",
            "edge": {"topic": "edge_sensor/offset", "type": "geometry_msgs/msg/PointStamped",
                     "fields": ["point.y", "point.z"],
                     "features": ["edge_offset", "edge_angle"], "max_age": 0.2}}},
        "adapter": {"ros__parameters": {
            "policy": str(card), "limits_file": str(demo_file("limits.yaml")),
            "decision_period": 0.05, "stream_rate": 250.0, "horizon": 10,
            "autostart": False, "outputs": ["position"], "stream_priority": 0,
            # the stall must make decisions late, the case replay reproduces: a stream_jitter
            # longer than the stall keeps the stream from being re-timed instead (which it
            # is when the stall lands between sampling and sending a setpoint; replay does
            # not reproduce a re-timed stream, see README "Limits of this version")
            "stream_jitter": 0.5}},
    }
    path = folder / "params.yaml"
    path.write_text(yaml.dump(params, Dumper=_NoAliases, sort_keys=False))
    return path


def _stop(proc: subprocess.Popen, timeout: float = 20.0) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def record_live_run(folder: Path, follow_s: float = FOLLOW_S, compression: str = "zstd",
                    chunk_size: int = 64 * 1024, stall_s: float = STALL_S) -> Path:
    """Run the stack, record it, stop it; returns the bag folder. Halfway through, the
    adapter process is suspended for ``stall_s`` (SIGSTOP/SIGCONT), so the recording holds
    decisions that came late, as real recordings do (two or three periods: fewer than the
    watchdog's max_overruns, so the run goes on)."""
    folder.mkdir(parents=True, exist_ok=True)
    card = write_card(folder)
    params = write_params(folder, card)
    ros = ["--ros-args", "--params-file", str(params)]
    logs = (folder / "cell.log").open("w"), (folder / "adapter.log").open("w")
    cell = subprocess.Popen([sys.executable, "-c", CELL, *ros], stdout=logs[0],
                            stderr=subprocess.STDOUT)
    rec = Recorder(folder / "bag", compression=compression, chunk_size=chunk_size)
    adapter = None
    try:
        rec.start(START_WAIT_S)
        if not rec.wait_for(["joint_states", "reference/window", "feedback"], START_WAIT_S):
            raise RuntimeError(f"the cell did not come up: {rec.recording}; see {folder}")
        adapter = subprocess.Popen([sys.executable, "-m", "adaptive_streamer.nodes.adapter",
                                    *ros], stdout=logs[1], stderr=subprocess.STDOUT)
        with _Operator() as op:
            if not op.client.wait(START_WAIT_S) or not op.client.configure():
                raise RuntimeError(f"the adapter did not configure; see {folder}")
            # activate only once the recorder has the adapter's outputs: the bag then holds
            # every decision from the start at rest
            if not rec.wait_for(["adapter/decisions", "setpoints"], START_WAIT_S):
                raise RuntimeError(f"the recorder missed the adapter: {rec.recording}")
            rec.wait_run_info(START_WAIT_S)
            end = time.monotonic() + START_WAIT_S
            while not op.client.activate():  # refused until joint_states are fresh
                if time.monotonic() > end:
                    raise RuntimeError(f"the adapter did not activate; see {folder}")
                time.sleep(0.2)
            if not op.start_reference():  # the reference waits at its start until now
                raise RuntimeError(f"the reference did not start; see {folder}")
            time.sleep(follow_s / 2)
            if stall_s > 0:
                adapter.send_signal(signal.SIGSTOP)
                try:
                    time.sleep(stall_s)
                finally:
                    adapter.send_signal(signal.SIGCONT)
            time.sleep(follow_s / 2)
            op.client.deactivate()  # a controlled stop, recorded
    finally:
        try:
            if adapter is not None:
                _stop(adapter)
            rec.stop()
        finally:  # the cell goes even when the recorder fails to stop
            _stop(cell)
            for f in logs:
                f.close()
    return rec.bag


class _Operator:
    """An rclpy node of this process driving the adapter's lifecycle."""

    def __enter__(self) -> "_Operator":
        import rclpy
        from rclpy.context import Context

        from rclpy.executors import SingleThreadedExecutor

        from adaptive_streamer.nodes.lifecycle_client import LifecycleClient
        self.ctx = Context()
        rclpy.init(context=self.ctx)
        self.node = rclpy.create_node("replay_test_operator", context=self.ctx)
        self.client = LifecycleClient(self.node, "adapter", spun_elsewhere=True)
        self.ex = SingleThreadedExecutor(context=self.ctx)
        self.ex.add_node(self.node)
        self.running = True
        self.thread = threading.Thread(target=self._spin, daemon=True)
        self.thread.start()
        return self

    def _spin(self) -> None:
        while self.running:
            self.ex.spin_once(timeout_sec=0.02)

    def start_reference(self) -> bool:
        """Call ``reference_server/start``; True when it started."""
        from std_srvs.srv import Trigger
        client = self.node.create_client(Trigger, "reference_server/start")
        if not client.wait_for_service(START_WAIT_S):
            return False
        future = client.call_async(Trigger.Request())
        end = time.monotonic() + START_WAIT_S
        while not future.done() and time.monotonic() < end:
            time.sleep(0.01)
        return bool(future.done() and future.result().success)

    def __exit__(self, *exc: object) -> None:
        import rclpy
        self.running = False
        self.thread.join()
        self.ex.shutdown()
        self.node.destroy_node()
        rclpy.shutdown(context=self.ctx)


def live_recording(tmp_root: Path) -> Path:
    """The cached live recording of this test process (recorded on first use; a failed
    recording is not retried, later modules see its error)."""
    if "bag" not in _CACHE:
        try:
            _CACHE["bag"] = record_live_run(tmp_root / "live")
        except Exception as exc:
            _CACHE["bag"] = exc
    if isinstance(_CACHE["bag"], Exception):
        raise RuntimeError(f"the live recording failed: {_CACHE['bag']}") from _CACHE["bag"]
    return _CACHE["bag"]


def late_decisions(bag: Path, period: float = 0.05) -> int:
    """Decisions the live adapter made late in ``bag`` (gaps in its decision records)."""
    from adaptive_streamer.replay.run import replay
    t = np.array([d.time for d in replay(bag).recorded])
    return int(np.sum(np.diff(t) > 1.5 * period))


def copy_bag(src: Path, dst: Path, drop: tuple[str, ...] = (),
             change: dict | None = None, custom_data: bool = True,
             end_ns: int | None = None) -> Path:
    """A copy of the bag ``src`` at ``dst`` without the topics ``drop``; ``change`` maps a
    topic to ``(msgtype, msgdef, digest, function of (receive time, raw bytes))`` giving
    the new bytes (None drops the message); ``custom_data`` keeps the metadata entries;
    ``end_ns`` drops the messages received after it (a closed bag of a shorter run)."""
    from adaptive_streamer.io.bag_io import BagWriter, read_bag

    bag = read_bag(src)
    writer = BagWriter(dst)
    events = []
    for name, data in bag.topics.items():
        if name in drop:
            continue
        msgtype, msgdef, digest, fn = (change or {}).get(
            name, (data.msgtype, None, None, lambda t, raw: raw))
        conn = writer.add_topic(name, msgtype, data.qos, msgdef, digest)
        events += [(int(t), name, conn, fn(int(t), raw)) for t, raw in zip(data.times, data.raw)]
    events = [e for e in events if e[3] is not None and (end_ns is None or e[0] <= end_ns)]
    events.sort(key=lambda e: (e[0], e[1]))
    for t, _, conn, raw in events:
        writer.write(conn, t, raw)
    for key, value in (bag.custom_data.items() if custom_data else ()):
        writer.set_custom_data(key, value)
    writer.close()
    return dst
