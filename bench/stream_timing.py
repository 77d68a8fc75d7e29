# SPDX-License-Identifier: Apache-2.0
"""Timing of the adapter's setpoint stream under load, measured from another process.

Three processes on one machine:

* cell: reference_server (the demo pass there and back, looped), sim_driver, edge_sensor and
  sensor_bridge in one executor (the load);
* adapter: ``make_executor()`` + `AdapterNode` (autostart, ``stream_priority`` SCHED_FIFO
  priority, default 10; needs root or CAP_SYS_NICE, otherwise the adapter says so);
* this process: a subscriber recording every ``setpoints`` message (arrival time on the
  monotonic clock, nominal stamp, p, v, a), and the adapter's /diagnostics.

For each stream rate (default 250 Hz and 1000 Hz) the adapter streams for ``--duration``
seconds while following the looping reference with a tracker policy, then ``--swaps``
policy swaps (tracker <-> an ONNX card computing the same tracking law, so the arm keeps
following) are made 0.25 s apart. Printed figures:

* period error: arrival interval minus the nominal period, p50 / p99 / max of its magnitude;
* skipped ticks counted from the stamps (over the whole run and over the swaps); messages
  are reliable, so a gap in the stamps is a tick the adapter did not publish;
* the independent finite-difference check of every sample
  (``test/adapter_harness.check_stream``: limits and consistency of p, v, a);
* the adapter's own figures: tick_late_ms_p50/p99 (wake-up lateness), skipped_ticks,
  late_decisions, decision_ms_p99.

``--decision-priority P`` (default 5, as the demo runs) gives the adapter's executor thread
(subscriptions, services, decisions) SCHED_FIFO priority P (0: normal): a thread holding the GIL at normal priority can
be preempted by other processes while the real-time stream thread waits for it.

Run: ``.venv/bin/python bench/stream_timing.py [--duration 60] [--rates 250 1000]
[--decision-priority 5]`` (the defaults).
No assertions: figures only (the machine is shared).
"""
from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "test"))
os.environ.setdefault("ROS_DOMAIN_ID", str(101 + os.getpid() % 100))
os.environ.setdefault("ROS_AUTOMATIC_DISCOVERY_RANGE", "LOCALHOST")

import numpy as np  # noqa: E402

DEMO = REPO / "config" / "demo"
LIMITS_FILE = DEMO / "limits.yaml"
PERIOD = 0.05  # decision period, common practice


# ---------------------------------------------------------------------------- files
PROBE_PRIORITY = 20   # SCHED_FIFO of the measuring subscriber's thread


def write_files(folder: Path) -> dict[str, Path]:
    """The looping reference (demo pass there and back) and the two policy cards."""
    import adapter_harness as h
    rows = [line.split(",") for line in (DEMO / "reference.csv").read_text().split()]
    header, data = rows[0], np.array(rows[1:], float)
    t, q = data[:, 0], data[:, 1:]
    back_t = t[-1] + (t[-1] - t[::-1])[1:]
    loop = np.vstack([np.column_stack([t, q]), np.column_stack([back_t, q[::-1][1:]])])
    ref = folder / "reference_loop.csv"
    ref.write_text(",".join(header) + "\n" + "\n".join(
        ",".join(f"{x:.10f}" for x in row) for row in loop) + "\n")
    return {"reference": ref, "tracker": h.write_card(folder, "tracker", "tracker"),
            "onnx": h.write_tracking_onnx(folder, "onnx_tracker")}


# ---------------------------------------------------------------------------- roles
def run_cell(folder: Path) -> None:
    """The cell nodes in one process (spins until SIGINT/SIGTERM)."""
    from rclpy.parameter import Parameter

    from adaptive_streamer.nodes.common import run_nodes
    from adaptive_streamer.nodes.edge_sensor import EdgeSensor
    from adaptive_streamer.nodes.reference_server import ReferenceServer
    from adaptive_streamer.nodes.sensor_bridge import SensorBridge
    from adaptive_streamer.nodes.sim_driver import SimDriver
    P = Parameter
    start = [float(x) for x in (DEMO / "reference.csv").read_text().split()[1].split(",")[1:]]
    factories = [
        lambda: ReferenceServer(parameter_overrides=[
            P("reference_file", value=str(folder / "reference_loop.csv")),
            P("limits_file", value=str(LIMITS_FILE)), P("end_mode", value="loop"),
            P("horizon", value=12), P("start_mode", value="service")]),
        lambda: SimDriver(parameter_overrides=[P("initial_positions", value=start)]),
        lambda: EdgeSensor(parameter_overrides=[P("scenario", value=str(DEMO / "scenario.yaml"))]),
        lambda: SensorBridge(parameter_overrides=[
            P("inputs", value=["edge"]), P("edge.topic", value="edge_sensor/offset"),
            P("edge.type", value="geometry_msgs/msg/PointStamped"),
            P("edge.fields", value=["point.y", "point.z"]),
            P("edge.features", value=["edge_offset", "edge_angle"]),
            P("edge.max_age", value=0.2), P("edge.qos", value="reliable")]),
    ]
    raise SystemExit(run_nodes(factories))


def run_adapter(folder: Path, rate: float, priority: int, decision_priority: int) -> None:
    """The adapter alone in its process (autostart), as its executable runs it."""
    from adaptive_streamer.nodes.adapter import AdapterNode
    from adaptive_streamer.nodes.threads import make_executor, prepare_process
    from adaptive_streamer.nodes.common import run_nodes
    from rclpy.parameter import Parameter as P
    params = [P("policy", value=str(folder / "tracker.card.yaml")),
              P("limits_file", value=str(LIMITS_FILE)), P("stream_rate", value=rate),
              P("decision_period", value=PERIOD), P("autostart", value=True),
              P("stream_priority", value=priority),
              P("decision_priority", value=decision_priority)]

    def stop(nodes: list, executor: object) -> None:  # noqa: ARG001
        for node in nodes:
            node.stop_at_rest()
    prepare_process()
    raise SystemExit(run_nodes([lambda: AdapterNode(parameter_overrides=params)],
                               executor=make_executor, before_shutdown=stop))


def spawn(role: str, folder: Path, *extra: str) -> subprocess.Popen:
    """Start this script in another process with ``--role`` (output to ``<role>.log``)."""
    log = open(folder / f"{role}.log", "ab")
    return subprocess.Popen([sys.executable, __file__, "--role", role, "--folder", str(folder),
                             *extra], stdout=log, stderr=subprocess.STDOUT)


def log_tail(folder: Path, role: str, lines: int = 15) -> str:
    """The last lines a role's process wrote."""
    path = folder / f"{role}.log"
    text = path.read_text(errors="replace").splitlines() if path.exists() else []
    return "\n".join(text[-lines:])


def stop_process(proc: subprocess.Popen) -> None:
    """SIGINT (clean shutdown, the adapter brings the arm to rest), then wait."""
    proc.send_signal(signal.SIGINT)
    try:
        proc.wait(15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


# ---------------------------------------------------------------------------- measuring
def measure(folder: Path, cards: dict[str, Path], rate: float, duration: float, swaps: int,
            priority: int, decision_priority: int) -> None:
    """One run at ``rate``: stream for ``duration`` s, then ``swaps`` policy swaps."""
    from diagnostic_msgs.msg import DiagnosticArray
    from rclpy.executors import SingleThreadedExecutor
    from rclpy.node import Node
    from rclpy.parameter import Parameter
    from rclpy.parameter_client import AsyncParameterClient
    from std_srvs.srv import Trigger
    from trajectory_msgs.msg import JointTrajectory

    import adapter_harness as h
    from adaptive_streamer.nodes.common import reliable_qos

    from rclpy.serialization import deserialize_message

    node = Node("stream_timing_probe")
    raw: list[tuple[float, bytes]] = []
    diag: dict[str, str] = {}

    def on_setpoint(data: bytes) -> None:
        raw.append((time.monotonic(), data))   # the instrument does no work while measuring

    def decoded(rows: list[tuple[float, bytes]]) -> list[h.Sample]:
        out = []
        for arrival, data in rows:
            msg = deserialize_message(data, JointTrajectory)
            pt = msg.points[0]
            out.append(h.Sample(msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec,
                                np.array(pt.positions), np.array(pt.velocities),
                                np.array(pt.accelerations), arrival))
        return out

    def on_diag(msg: DiagnosticArray) -> None:
        for st in msg.status:
            if st.name == "adapter":
                diag.clear()
                diag.update({kv.key: kv.value for kv in st.values})

    node.create_subscription(JointTrajectory, "setpoints", on_setpoint, reliable_qos(1000),
                             raw=True)
    node.create_subscription(DiagnosticArray, "/diagnostics", on_diag, 50)
    ex = SingleThreadedExecutor()
    ex.add_node(node)

    def spin() -> None:  # the measuring thread above the adapter's priorities
        try:
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(PROBE_PRIORITY))
        except (OSError, AttributeError):
            print("note: probe runs at normal priority (SCHED_FIFO refused)", file=sys.stderr)
        ex.spin()

    spinner = threading.Thread(target=spin, daemon=True)
    spinner.start()
    adapter = spawn("adapter", folder, "--rate", str(rate), "--priority", str(priority),
                    "--decision-priority", str(decision_priority))
    try:
        try:
            _wait(lambda: diag.get("mode") == "following", "adapter following", 60.0)
        except RuntimeError:
            print(log_tail(folder, "adapter"), "\n", log_tail(folder, "cell"), file=sys.stderr)
            raise
        start = node.create_client(Trigger, "/reference_server/start")
        _wait(start.service_is_ready, "reference_server/start", 20.0)
        start.call_async(Trigger.Request())   # refused ('already started') after the 1st run
        time.sleep(1.0)
        t_begin = len(raw)
        time.sleep(duration)
        t_swaps = len(raw)
        params = AsyncParameterClient(node, "adapter")
        _wait(params.services_are_ready, "adapter parameters", 20.0)
        for k in range(swaps):
            card = cards["onnx"] if k % 2 == 0 else cards["tracker"]
            fut = params.set_parameters([Parameter("policy", value=str(card))])
            _wait(fut.done, "set_parameters", 10.0)
            time.sleep(0.25)
        time.sleep(0.5)
        t_end = len(raw)
        time.sleep(1.2)  # one more /diagnostics
        report(rate, duration, swaps, decoded(raw[t_begin:t_swaps]),
               decoded(raw[t_swaps:t_end]), dict(diag))
    finally:
        stop_process(adapter)
        ex.remove_node(node)
        node.destroy_node()
        ex.shutdown()


def _wait(cond, what: str, timeout: float) -> None:
    end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > end:
            raise RuntimeError(f"timed out waiting for {what}")
        time.sleep(0.02)


def report(rate: float, duration: float, swaps: int, run: list, swapping: list,
           diag: dict[str, str]) -> None:
    """Print the figures of one run."""
    import adapter_harness as h
    arrival = np.array([s.arrival for s in run])
    err = np.abs(np.diff(arrival) - 1.0 / rate) * 1e3
    check = h.check_stream(run, rate=rate)
    swap_check = h.check_stream(swapping, rate=rate)
    print(f"--- stream {rate:g} Hz, {duration:g} s under load (cell in another process), "
          f"{diag.get('stream_thread', '?')}; {diag.get('decision_thread', '')}")
    print(f"  samples {len(run)}; period error |arrival interval - {1e3 / rate:g} ms| "
          f"p50 {np.percentile(err, 50):.3f} ms, p99 {np.percentile(err, 99):.3f} ms, "
          f"max {err.max():.3f} ms")
    print(f"  skipped ticks (stamps): {check.skipped_ticks}; off the tick grid: "
          f"{check.off_grid}; finite-difference check: "
          f"{'ok' if check.ok else check.violations}")
    print(f"  {swaps} policy swaps: {len(swapping)} samples, skipped ticks (stamps) "
          f"{swap_check.skipped_ticks}, check {'ok' if swap_check.ok else swap_check.violations}")
    keys = ("tick_late_ms_p50", "tick_late_ms_p99", "skipped_ticks", "late_decisions",
            "decision_ms_p50", "decision_ms_p99", "policy_swaps", "trip")
    print("  adapter diagnostics: " + ", ".join(f"{k} {diag.get(k, '?')}" for k in keys))


def main() -> None:
    """Parse arguments; run a role, or the whole measurement."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--duration", type=float, default=60.0, help="seconds per rate (default 60)")
    ap.add_argument("--rates", type=float, nargs="+", default=[250.0, 1000.0])
    ap.add_argument("--swaps", type=int, default=20)
    ap.add_argument("--priority", type=int, default=10, help="adapter stream_priority")
    ap.add_argument("--decision-priority", type=int, default=5,
                    help="adapter decision_priority (SCHED_FIFO of the executor thread; "
                         "default 5, as in the demo)")
    ap.add_argument("--role", choices=("cell", "adapter"), help=argparse.SUPPRESS)
    ap.add_argument("--folder", type=Path, help=argparse.SUPPRESS)
    ap.add_argument("--rate", type=float, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.role == "cell":
        run_cell(args.folder)
    elif args.role == "adapter":
        run_adapter(args.folder, args.rate, args.priority, args.decision_priority)
    import rclpy
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        cards = write_files(folder)
        try:  # the instrument (and its middleware threads) above everything it measures
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(PROBE_PRIORITY))
        except (OSError, AttributeError):
            print("note: probe runs at normal priority (SCHED_FIFO refused)", file=sys.stderr)
        rclpy.init()
        cell = spawn("cell", folder)
        try:
            for rate in args.rates:
                measure(folder, cards, rate, args.duration, args.swaps, args.priority,
                        args.decision_priority)
        finally:
            stop_process(cell)
            rclpy.shutdown()


if __name__ == "__main__":
    main()
