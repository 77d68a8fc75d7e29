# SPDX-License-Identifier: Apache-2.0
"""`make soak`: the demo stack for a long run with random actions, faults and resets.

What runs (real processes over DDS, as ``adaptive-streamer demo`` runs them): the cell
(reference_server, sim_driver, edge_sensor, sensor_bridge) in one process, the adapter in
its own, and this process, which observes and operates (`SoakOperator`). The params are
``config/soak/params.yaml``: the adapter streams at ``--rate`` (default 500 Hz) to a
sim_driver ticking at ``--driver-rate`` (default 250 Hz: it takes the latest command each
tick), the reference is the demo pass there and back in a loop, and the policy is
``config/soak/random_policy.yaml``: pseudo-random normalised actions around a tracking law
(scripts/make_soak_policy.py), so the limit stage decides every value and is driven to
its bounds all the time.

Every ``--fault-every`` seconds one fault of `FAULTS` is injected, in turn; each should end
in a watchdog stop (`EXPECTED_TRIP`). The operator then clears the cause, waits for the arm
to be at rest, calls ``adapter/reset`` (retried while refused), resumes the reference
(the adapter paused it when it stopped) and waits until the adapter follows again (a
recovery).

An independent check of every setpoint runs here, in another process than the adapter:
`adaptive_streamer.core.stream_metrics.check_stream` (finite differences against the
position/velocity/acceleration/jerk limits and the constant-jerk consistency of p, v, a
between consecutive samples) on consecutive chunks of the stream (each chunk starts with the
previous chunk's last sample, so no pair is skipped), plus the tick grid: stamps must be
``2 ms`` multiples apart at 500 Hz (a gap is a missed period). The adapter process's
resident memory (VmRSS) is sampled every few seconds.

Figures printed and written to ``--json`` (default ``soak_report.json``): setpoints
checked, limit violations by kind (must be 0), missed periods, stops by reason with their
timings, recoveries, the adapter's own counters (stream/decision errors, late decisions,
skipped ticks), and the adapter's RSS at activation, after ``--warmup`` seconds and at the
end (growth after warm-up must stay under 5 MB; the warm-up covers two rounds of faults, after
which the heap has reached its high-water mark: the second run of the slow fault policy
raises it by a few MB once, later rounds do not). Exit code 0 when all of that holds.

    .venv/bin/python bench/soak.py --duration 600          # make soak
    .venv/bin/python bench/soak.py --duration 60 --fault-every 7 --warmup 20
"""
from __future__ import annotations

import argparse
import json
import math
import shutil
import subprocess
import tempfile
import threading
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import yaml

from adaptive_streamer.bringup import NodeEntry, Processes, read_params
from adaptive_streamer.core import decision_record
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.stream_metrics import check_stream, time_resolution_of
from adaptive_streamer.share import share_dir

ROOT = Path(__file__).resolve().parents[1]
CELL_NODES = ["reference_server", "sim_driver", "edge_sensor", "sensor_bridge"]
FAULTS = ("reference_jump", "joint_state_stall", "feedback_dropout", "nan_policy",
          "slow_policy", "external_stop", "stop_topic")
EXPECTED_TRIP = {"reference_jump": "deviation", "joint_state_stall": "joint_states_stale",
                 "feedback_dropout": "feedback_stale", "nan_policy": "policy_fault",
                 "slow_policy": "overruns", "external_stop": "external_stop",
                 "stop_topic": "external_stop"}
FAULT_CARDS = {"nan_policy": "config/demo/faults/nan_policy.yaml",
               "slow_policy": "config/demo/faults/slow_policy.yaml"}
JUMP_OFFSET = 0.5       # rad added to one joint of the jumped window (deviation_joint: 0.2)
JUMP_JOINT = 1
HOLD_FAULT = 1.0        # s a persistent cause is kept after the stop (resets are refused)
TRIP_TIMEOUT = 6.0      # s to wait for the stop after an injection
RECOVERY_TIMEOUT = 20.0  # s to wait for rest, reset and following again
RSS_EVERY = 2.0         # s between RSS samples
CHECK_CHUNK = 5000      # setpoints per stream check
RSS_LIMIT_MB = 5.0
RECOVERY_ATTEMPTS = 3
WARMUP_ROUNDS = 2       # the adapter's heap reaches its high-water mark once the slow fault
                        # policy (a loop of 512x512 products) has been loaded and run twice
GRID_TOL = 1e-6         # s: a stamp off the tick grid by more than this is counted


class SoakError(RuntimeError):
    """The soak could not run (a process died, the stack did not come up)."""


# ---------------------------------------------------------------------------- the checker
class StreamChecker:
    """Checks every received setpoint against the limits, chunk by chunk (see the module
    docstring); thread-safe `add`, `check` from the main thread."""

    def __init__(self, limits: JointLimits, rate: float, keep: bool = False) -> None:
        self.limits = limits
        self.rate = rate
        self.kept: list[tuple[np.ndarray, ...]] | None = [] if keep else None
        self._lock = threading.Lock()
        self._pending: list[tuple[int, float, tuple, tuple, tuple]] = []
        self._last: tuple[int, float, tuple, tuple, tuple] | None = None
        self.checked = 0
        self.violations: dict[str, int] = {}
        self.worst: dict[str, float] = {}
        self.missed_periods = 0
        self.off_grid = 0
        self.peak = {"velocity": 0.0, "acceleration": 0.0, "jerk": 0.0}
        self.arrival_err_ms: list[float] = []   # |arrival period - nominal|, per sample
        self._t0_ns: int | None = None

    def add(self, stamp_ns: int, arrival: float, p: Any, v: Any, a: Any) -> None:
        """Store one received setpoint (called from the subscription)."""
        with self._lock:
            self._pending.append((stamp_ns, arrival, tuple(p), tuple(v), tuple(a)))

    def check(self, final: bool = False) -> None:
        """Check the stored samples once a chunk is full (or all of them when ``final``)."""
        with self._lock:
            if not self._pending or (len(self._pending) < CHECK_CHUNK and not final):
                return
            chunk, self._pending = self._pending, []
        rows = ([self._last] if self._last is not None else []) + chunk
        self._last = chunk[-1]
        ns = np.array([r[0] for r in rows], np.int64)
        if self._t0_ns is None:
            self._t0_ns = int(ns[0])
        t = (ns - self._t0_ns) * 1e-9      # exact to the nanosecond, relative to the start
        p, v, a = (np.array([r[k] for r in rows]) for k in (2, 3, 4))
        rep = check_stream(t, p, v, a, self.limits, self.rate,
                           time_resolution=time_resolution_of(ns[-1:] * 1e-9))
        for kind, count in rep.violations.items():
            self.violations[kind] = self.violations.get(kind, 0) + count
        for kind, value in rep.worst.items():
            self.worst[kind] = max(self.worst.get(kind, -math.inf), value)
        self.missed_periods += rep.skipped_ticks
        ticks = (ns - self._t0_ns) * 1e-9 * self.rate
        self.off_grid += int(np.sum(np.abs(ticks - np.round(ticks)) > GRID_TOL * self.rate))
        for key, peak in (("velocity", rep.peak_velocity), ("acceleration", rep.peak_acceleration),
                          ("jerk", rep.peak_jerk)):
            if peak is not None:
                self.peak[key] = max(self.peak[key], float(np.max(peak)))
        arrivals = np.array([r[1] for r in rows])
        if arrivals.shape[0] > 1:
            err = np.abs(np.diff(arrivals) - np.diff(t)) * 1e3
            self.arrival_err_ms.extend(err.tolist())
        self.checked += len(chunk)
        if self.kept is not None:
            skip = len(rows) - len(chunk)
            self.kept.append((ns[skip:], p[skip:], v[skip:], a[skip:]))

    def save(self, path: str) -> None:
        """Write the kept stream (stamps [ns], p, v, a) to an ``.npz`` file."""
        parts = self.kept or []
        np.savez_compressed(path, **{k: np.concatenate([x[i] for x in parts]) if parts
                                     else np.zeros(0) for i, k in enumerate(
                                         ("stamps_ns", "position", "velocity", "acceleration"))})

    def figures(self) -> dict[str, Any]:
        """The checker's figures (call after ``check(final=True)``)."""
        err = np.array(self.arrival_err_ms) if self.arrival_err_ms else np.array([math.nan])
        return {"setpoints_checked": self.checked,
                "violations": dict(self.violations),
                "violations_total": int(sum(self.violations.values())),
                "worst_ratio": {k: round(v, 6) for k, v in self.worst.items()},
                "missed_periods": self.missed_periods, "off_grid_stamps": self.off_grid,
                "peak_use": {k: round(v, 4) for k, v in self.peak.items()},
                "arrival_jitter_ms": {"p50": float(np.percentile(err, 50)),
                                      "p99": float(np.percentile(err, 99)),
                                      "max": float(np.max(err))}}


# ---------------------------------------------------------------------------- the operator
def _operator_node_class() -> type:
    """The operator node class (rclpy imported only once the soak runs)."""
    from diagnostic_msgs.msg import DiagnosticArray
    from rcl_interfaces.msg import Log
    from rcl_interfaces.msg import Parameter as ParameterMsg
    from rcl_interfaces.msg import ParameterType, ParameterValue
    from rcl_interfaces.srv import GetParameters, SetParameters
    from rclpy.executors import SingleThreadedExecutor
    from rclpy.node import Node
    from std_msgs.msg import Bool, Float64MultiArray
    from std_srvs.srv import Trigger
    from trajectory_msgs.msg import JointTrajectory

    from adaptive_streamer.nodes.common import reliable_qos
    from adaptive_streamer.nodes.lifecycle_client import LifecycleClient
    from adaptive_streamer.io.trajectory_conversions import fill_trajectory, msg_to_window

    class SoakOperator(Node):
        """Feeds the checker, follows the adapter's mode and trips, and acts on the stack."""

        def __init__(self, checker: StreamChecker) -> None:
            super().__init__("soak_operator")
            self.checker = checker
            self.mode = ""
            self.mode_since = time.monotonic()
            self.decisions = 0
            self.trips: list[tuple[float, str, str]] = []   # (monotonic, kind, log line)
            self.adapter_diag: dict[str, str] = {}
            self.last_window: Any = None
            big = reliable_qos(1000)
            self.create_subscription(JointTrajectory, "setpoints", self._on_setpoint, big)
            self.create_subscription(Float64MultiArray, "adapter/decisions", self._on_decision,
                                     big)
            self.create_subscription(DiagnosticArray, "/diagnostics", self._on_diag, 50)
            self.create_subscription(Log, "/rosout", self._on_log, 200)
            self.create_subscription(JointTrajectory, "reference/window", self._on_window, 5)
            self._window_pub = self.create_publisher(JointTrajectory, "reference/window",
                                                     reliable_qos(5))
            self._stop_pub = self.create_publisher(Bool, "stop", reliable_qos(1))
            self.adapter = LifecycleClient(self, "adapter", spun_elsewhere=True)
            self._service_clients: dict[str, Any] = {}
            self._executor = SingleThreadedExecutor()
            self._executor.add_node(self)
            self._thread = threading.Thread(target=self._executor.spin, daemon=True,
                                            name="soak-operator")

        # receiving
        def _on_setpoint(self, msg: Any) -> None:
            if msg.points:
                pt = msg.points[0]
                st = msg.header.stamp
                self.checker.add(st.sec * 1_000_000_000 + st.nanosec, time.monotonic(),
                                 pt.positions, pt.velocities, pt.accelerations)

        def _on_decision(self, msg: Any) -> None:
            try:
                d = decision_record.decode(np.asarray(msg.data))
            except decision_record.DecisionRecordError:
                return
            self.decisions += 1
            if d.next_mode != self.mode:
                self.mode, self.mode_since = d.next_mode, time.monotonic()

        def _on_diag(self, msg: Any) -> None:
            for status in msg.status:
                if status.name == "adapter":
                    self.adapter_diag = {kv.key: kv.value for kv in status.values}

        def _on_log(self, msg: Any) -> None:
            if msg.name.endswith("adapter") and msg.msg.startswith("watchdog: "):
                kind = msg.msg.split()[1]
                self.trips.append((time.monotonic(), kind, msg.msg))

        def _on_window(self, msg: Any) -> None:
            self.last_window = msg

        # acting
        def start(self) -> None:
            """Spin in a background thread."""
            self._thread.start()

        def stop(self) -> None:
            """Stop the background executor."""
            self._executor.shutdown(timeout_sec=2.0)

        def _client(self, srv: Any, name: str) -> Any:
            if name not in self._service_clients:
                self._service_clients[name] = self.create_client(srv, name)
            return self._service_clients[name]

        def _call(self, srv: Any, name: str, request: Any, timeout: float = 5.0) -> Any:
            client = self._client(srv, name)
            if not client.wait_for_service(timeout):
                return None
            future = client.call_async(request)
            end = time.monotonic() + timeout
            while not future.done() and time.monotonic() < end:
                time.sleep(0.005)
            return future.result() if future.done() else None

        def trigger(self, name: str) -> tuple[bool, str]:
            """Call a std_srvs/Trigger service."""
            res = self._call(Trigger, name, Trigger.Request())
            return (False, f"no answer from {name}") if res is None else (res.success,
                                                                          res.message)

        def set_param(self, node: str, name: str, value: bool | str) -> bool:
            """Set one bool or string parameter of ``node``."""
            if isinstance(value, bool):
                pv = ParameterValue(type=ParameterType.PARAMETER_BOOL, bool_value=value)
            else:
                pv = ParameterValue(type=ParameterType.PARAMETER_STRING, string_value=value)
            res = self._call(SetParameters, f"{node}/set_parameters",
                             SetParameters.Request(parameters=[ParameterMsg(name=name,
                                                                            value=pv)]))
            return bool(res is not None and res.results[0].successful)

        def get_param(self, node: str, name: str) -> Any:
            """A string parameter of ``node`` (None without an answer)."""
            res = self._call(GetParameters, f"{node}/get_parameters",
                             GetParameters.Request(names=[name]))
            return None if res is None else res.values[0].string_value

        def stop_topic(self, value: bool) -> None:
            """Publish on the adapter's ``stop`` topic."""
            self._stop_pub.publish(Bool(data=value))

        def jump_window(self, seconds: float = 0.15) -> bool:
            """Publish the latest window with one joint offset, repeatedly for ``seconds``
            (so a decision surely reads it before the server's next window)."""
            msg = self.last_window
            if msg is None:
                return False
            w = msg_to_window(msg)
            pos = w.positions.copy()
            pos[:, JUMP_JOINT] += JUMP_OFFSET
            out = JointTrajectory()
            fill_trajectory(out, w.stamp, w.names, w.times, pos, w.velocities, w.accelerations)
            end = time.monotonic() + seconds
            while time.monotonic() < end:
                self._window_pub.publish(out)
                time.sleep(0.005)
            return True

    return SoakOperator


# ---------------------------------------------------------------------------- faults
@dataclass
class FaultRecord:
    """One injected fault and what followed (times in seconds from the injection)."""

    fault: str
    at: float                           # seconds after the reference started
    expected: str
    trip: str = ""
    trip_message: str = ""
    time_to_stop: float = math.nan      # injection -> watchdog log line
    time_to_rest: float = math.nan      # injection -> mode 'stopped'
    resets_refused: int = 0
    refusals: list[str] = field(default_factory=list)
    recovered: bool = False
    time_to_recover: float = math.nan   # injection -> following again
    notes: list[str] = field(default_factory=list)


def wait_until(cond: Callable[[], Any], timeout: float, alive: Callable[[], None],
               poll: float = 0.02) -> bool:
    """Poll ``cond`` until true or ``timeout``; ``alive`` raises if a process died."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        alive()
        if cond():
            return True
        time.sleep(poll)
    return bool(cond())


class Soak:
    """One soak run (see the module docstring)."""

    def __init__(self, args: argparse.Namespace, workdir: Path) -> None:
        self.args = args
        self.workdir = workdir
        self.procs = Processes()
        self.params_file, self.params = self._params()
        adapter = self.params["adapter"]
        self.limits = JointLimits.from_file(adapter["limits_file"])
        self.rate = float(adapter["stream_rate"])
        self.soak_card = adapter["policy"]
        self.checker = StreamChecker(self.limits, self.rate, keep=bool(args.save_stream))
        self.faults: list[FaultRecord] = []
        self.rss: list[tuple[float, float]] = []      # (seconds since activation, MB)
        self.adapter_pid = 0
        self.op: Any = None
        self.t_start = math.nan
        self.t_act = math.nan
        self.trips_handled = 0

    def _params(self) -> tuple[str, dict[str, dict[str, Any]]]:
        _, text = read_params(self.args.params)
        data = yaml.safe_load(text)
        params = {k: v["ros__parameters"] for k, v in data.items()}
        params["adapter"]["stream_rate"] = float(self.args.rate)
        params["sim_driver"]["rate"] = float(self.args.driver_rate)
        path = self.workdir / "params.yaml"
        path.write_text(yaml.safe_dump({k: {"ros__parameters": v} for k, v in params.items()},
                                       sort_keys=False))
        return str(path), params

    # ------------------------------------------------------------------ processes
    def alive(self) -> None:
        """Raise `SoakError` if a child process exited."""
        dead = self.procs.dead()
        if dead:
            entry, code = dead[0]
            raise SoakError(f"process {entry.kind} exited with code {code}; see "
                            f"{self.workdir / 'logs'}")

    def rss_mb(self) -> float:
        """VmRSS of the adapter process [MB]."""
        try:
            for line in Path(f"/proc/{self.adapter_pid}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024.0
        except OSError:
            pass
        return math.nan

    def start(self) -> None:
        """Start the cell and the adapter, activate it, start the reference."""
        logs = self.workdir / "logs"
        logs.mkdir(exist_ok=True)
        for name, group in (("cell", CELL_NODES), ("adapter", ["adapter"])):
            self.procs.start(NodeEntry(group[0], "", {}), self.params_file, group=group,
                             stdout=(logs / f"{name}.log").open("w"), stderr=subprocess.STDOUT)
        self.adapter_pid = self.procs.children[-1][1].pid
        op = self.op
        if not wait_until(lambda: op.adapter.wait(0.2), 60.0, self.alive):
            raise SoakError("the adapter's lifecycle services did not appear")
        if not op.adapter.configure(timeout=60.0):
            raise SoakError("the adapter refused to configure (see its log)")
        if not wait_until(op.adapter.activate, 60.0, self.alive, poll=0.5):
            raise SoakError("the adapter refused to activate (no fresh joint_states?)")
        self.t_act = time.monotonic()
        if not wait_until(lambda: op.mode == "following", 60.0, self.alive):
            raise SoakError(f"the adapter did not reach the reference (mode '{op.mode}')")
        ok, msg = op.trigger("reference_server/start")
        if not ok:
            raise SoakError(f"reference_server/start refused: {msg}")
        self.t_start = time.monotonic()

    # ------------------------------------------------------------------ faults
    def inject(self, fault: str) -> None:
        """Inject ``fault`` (see `FAULTS`)."""
        op = self.op
        if fault == "reference_jump":
            ok = op.jump_window()
        elif fault == "joint_state_stall":
            ok = op.set_param("sim_driver", "stall", True)
        elif fault == "feedback_dropout":
            ok = op.set_param("edge_sensor", "dropout", True)
        elif fault in FAULT_CARDS:
            ok = op.set_param("adapter", "policy", str(share_dir() / FAULT_CARDS[fault]))
        elif fault == "external_stop":
            ok, _ = op.trigger("adapter/stop")
        else:
            op.stop_topic(True)
            ok = True
        if not ok:
            raise SoakError(f"could not inject {fault}")

    def clear(self, fault: str, rec: FaultRecord) -> None:
        """Remove the cause of ``fault`` (the policy: back to the soak card, loaded)."""
        op = self.op
        if fault == "joint_state_stall":
            op.set_param("sim_driver", "stall", False)
        elif fault == "feedback_dropout":
            op.set_param("edge_sensor", "dropout", False)
        elif fault == "stop_topic":
            op.stop_topic(False)
        elif fault in FAULT_CARDS:
            op.set_param("adapter", "policy", self.soak_card)
            if not wait_until(lambda: op.get_param("adapter", "policy_active") == self.soak_card,
                              10.0, self.alive, poll=0.2):
                rec.notes.append("the soak policy was not active again within 10 s")

    def run_fault(self, fault: str) -> FaultRecord:
        """Inject, stop, clear, then recover (`recover`); returns the record."""
        op = self.op
        t0 = time.monotonic()
        rec = FaultRecord(fault, round(t0 - self.t_start, 3), EXPECTED_TRIP[fault])
        seen = len(op.trips)
        self.inject(fault)
        if wait_until(lambda: len(op.trips) > seen, TRIP_TIMEOUT, self.alive):
            t_trip, rec.trip, rec.trip_message = op.trips[seen]
            rec.time_to_stop = round(t_trip - t0, 4)
        else:
            rec.notes.append(f"no watchdog stop within {TRIP_TIMEOUT:g} s")
        if fault in ("joint_state_stall", "feedback_dropout", "stop_topic"):
            wait_until(lambda: False, HOLD_FAULT, self.alive)   # the cause persists a while
            ok, msg = op.trigger("adapter/reset")
            if ok:
                rec.notes.append(f"reset accepted while the cause persisted: {msg}")
            else:
                rec.resets_refused += 1
                rec.refusals.append(msg)
        self.clear(fault, rec)
        self.recover(rec, t0)
        return rec

    def unprovoked(self) -> FaultRecord:
        """A stop nobody injected (e.g. an input late on a loaded machine): record, recover."""
        op = self.op
        t0 = time.monotonic()
        rec = FaultRecord("none", round(t0 - self.t_start, 3), "")
        if len(op.trips) > self.trips_handled:
            _, rec.trip, rec.trip_message = op.trips[self.trips_handled]
        else:
            rec.trip = f"mode {op.mode}"
        self.recover(rec, t0)
        return rec

    def recover(self, rec: FaultRecord, t0: float) -> None:
        """Wait for rest, reset (retried while refused), resume the reference, wait until
        following; start over (at most `RECOVERY_ATTEMPTS` times) if it stops again."""
        op = self.op
        for attempt in range(RECOVERY_ATTEMPTS):
            if wait_until(lambda: op.mode == "stopped", RECOVERY_TIMEOUT, self.alive) \
                    and attempt == 0:
                rec.time_to_rest = round(op.mode_since - t0, 4)
            deadline = time.monotonic() + RECOVERY_TIMEOUT
            while time.monotonic() < deadline:
                self.alive()
                ok, msg = op.trigger("adapter/reset")
                if ok:
                    break
                rec.resets_refused += 1
                if msg not in rec.refusals:
                    rec.refusals.append(msg)
                time.sleep(0.2)
            else:
                rec.notes.append("every reset was refused")
                return
            seen = len(op.trips)
            ok, msg = op.trigger("reference_server/resume")
            if not ok:
                rec.notes.append(f"reference_server/resume: {msg}")
            if wait_until(lambda: op.mode == "following" or len(op.trips) > seen,
                          RECOVERY_TIMEOUT, self.alive) and op.mode == "following":
                rec.recovered = True
                rec.time_to_recover = round(time.monotonic() - t0, 3)
                self.trips_handled = len(op.trips)
                return
            if len(op.trips) > seen:
                rec.notes.append(f"stopped again during the recovery: {op.trips[seen][2]}")
        self.trips_handled = len(op.trips)

    # ------------------------------------------------------------------ the run
    def run(self) -> dict[str, Any]:
        """Run the whole soak; returns the figures."""
        import rclpy

        from adaptive_streamer.nodes.lifecycle_client import LifecycleClientError
        rclpy.init(signal_handler_options=rclpy.signals.SignalHandlerOptions.NO)
        self.op = _operator_node_class()(self.checker)
        self.op.start()
        error = ""
        final_diag: dict[str, str] = {}
        try:
            self.start()
            print(f"soak: following at {self.rate:g} Hz; {self.args.duration:g} s with a fault "
                  f"every {self.args.fault_every:g} s", flush=True)
            self._loop()
            time.sleep(1.5)                       # one more adapter diagnostics message
            final_diag = dict(self.op.adapter_diag)
            if self.op.adapter.state(5.0) == "active":
                self.op.adapter.deactivate()
        except (SoakError, LifecycleClientError) as exc:
            error = str(exc)
            final_diag = dict(self.op.adapter_diag)
        finally:
            notes = self.procs.stop()
            self.op.stop()
            self.op.destroy_node()
            rclpy.shutdown()
        self.checker.check(final=True)
        if self.args.save_stream:
            self.checker.save(self.args.save_stream)
        return self.figures(final_diag, error, notes)

    def _loop(self) -> None:
        next_rss = 0.0
        next_fault = self.args.fault_every
        k = 0
        op = self.op
        while True:
            self.alive()
            elapsed = time.monotonic() - self.t_start
            if elapsed >= self.args.duration:
                return
            since_act = time.monotonic() - self.t_act
            if since_act >= next_rss:
                self.rss.append((round(since_act, 2), self.rss_mb()))
                next_rss += RSS_EVERY
            self.checker.check()
            rec = None
            if len(op.trips) > self.trips_handled or op.mode in ("stopping", "stopped"):
                rec = self.unprovoked()
            elif elapsed >= next_fault and elapsed + 8.0 < self.args.duration:
                rec = self.run_fault(FAULTS[k % len(FAULTS)])
                k += 1
                next_fault = max(next_fault + self.args.fault_every,
                                 time.monotonic() - self.t_start + 2.0)
            if rec is not None:
                self.trips_handled = max(self.trips_handled, len(op.trips))
                self.faults.append(rec)
                print(_describe(rec), flush=True)
            time.sleep(0.1)

    # ------------------------------------------------------------------ figures
    def figures(self, diag: dict[str, str], error: str, notes: list[str]) -> dict[str, Any]:
        """Everything the soak reports."""
        warm = [mb for t, mb in self.rss if t >= self.args.warmup and math.isfinite(mb)]
        rss = {"at_activation_mb": self.rss[0][1] if self.rss else math.nan,
               "after_warmup_mb": warm[0] if warm else math.nan,
               "end_mb": warm[-1] if warm else math.nan,
               "max_after_warmup_mb": max(warm) if warm else math.nan,
               "warmup_s": self.args.warmup, "samples": len(self.rss)}
        rss["growth_after_warmup_mb"] = rss["end_mb"] - rss["after_warmup_mb"]
        stops: dict[str, int] = {}
        for rec in self.faults:
            stops[rec.trip or "none"] = stops.get(rec.trip or "none", 0) + 1
        counters = {k: diag.get(k, "?") for k in (
            "decisions", "late_decisions", "skipped_ticks", "tick_late_ms_p99",
            "decision_ms_p99", "stream_errors", "decision_errors", "guard_failures",
            "bad_joint_states", "bad_windows", "policy_swaps", "policy_swaps_failed",
            "non_viable_states")}
        injected = [r for r in self.faults if r.fault != "none"]
        out: dict[str, Any] = {
            "duration_s": self.args.duration, "stream_rate_hz": self.rate,
            "driver_rate_hz": float(self.args.driver_rate), "policy": self.soak_card,
            **self.checker.figures(),
            "faults_injected": len(injected),
            "stops_as_expected": sum(r.trip == r.expected for r in injected),
            "unprovoked_stops": len(self.faults) - len(injected),
            "stops_by_reason": stops,
            "stops": len(self.faults),
            "recoveries": sum(r.recovered for r in self.faults),
            "faults": [asdict(r) for r in self.faults],
            "adapter_counters": counters, "adapter_rss": rss,
            "rss_series": self.rss, "error": error, "process_notes": notes,
        }
        out["ok"] = bool(
            not error and out["violations_total"] == 0 and out["setpoints_checked"] > 0
            and out["recoveries"] == len(self.faults)
            and out["stops_as_expected"] == len(injected)
            and counters["stream_errors"] == "0" and counters["decision_errors"] == "0"
            and math.isfinite(rss["growth_after_warmup_mb"])
            and rss["growth_after_warmup_mb"] < RSS_LIMIT_MB)
        return out


def _describe(rec: FaultRecord) -> str:
    """One line per stop, as the soak prints them."""
    what = "unprovoked stop" if rec.fault == "none" else rec.fault
    return (f"soak +{rec.at:7.1f} s {what:18s} -> {rec.trip or 'NO STOP':18s} stop "
            f"{rec.time_to_stop * 1e3:6.0f} ms, rest {rec.time_to_rest:5.2f} s, "
            f"{rec.resets_refused} reset(s) refused, "
            + (f"following again after {rec.time_to_recover:.2f} s" if rec.recovered
               else "NOT RECOVERED") + ("; " + "; ".join(rec.notes) if rec.notes else ""))


def format_figures(f: dict[str, Any]) -> str:
    """The figures as the lines the soak prints."""
    c, r, j = f["adapter_counters"], f["adapter_rss"], f["arrival_jitter_ms"]
    lines = [
        f"soak: {f['duration_s']:g} s, stream {f['stream_rate_hz']:g} Hz, driver "
        f"{f['driver_rate_hz']:g} Hz, policy {Path(f['policy']).name}",
        f"  setpoints checked       {f['setpoints_checked']}",
        f"  limit violations        {f['violations_total']}  "
        + ", ".join(f"{k} {v}" for k, v in f["violations"].items() if v),
        f"  missed periods          {f['missed_periods']} (stamp gaps seen here; adapter "
        f"skipped ticks {c['skipped_ticks']}, late decisions {c['late_decisions']}); "
        f"off-grid stamps {f['off_grid_stamps']}",
        f"  arrival jitter [ms]     p50 {j['p50']:.3f}  p99 {j['p99']:.3f}  max {j['max']:.2f}",
        "  peak use of the limits  " + ", ".join(f"{k} {v:.3f}" for k, v in f["peak_use"].items()),
        f"  faults injected         {f['faults_injected']}, each ended in the expected stop: "
        f"{f['stops_as_expected']}/{f['faults_injected']}; unprovoked stops "
        f"{f['unprovoked_stops']}",
        "  stops by reason         "
        + (", ".join(f"{k} {v}" for k, v in sorted(f["stops_by_reason"].items())) or "none"),
        f"  recoveries              {f['recoveries']}/{f['stops']} stops",
        f"  adapter errors          stream {c['stream_errors']}, decision "
        f"{c['decision_errors']}, guard failures {c['guard_failures']}",
        f"  adapter RSS [MB]        activation {r['at_activation_mb']:.1f}, after "
        f"{r['warmup_s']:g} s warm-up {r['after_warmup_mb']:.1f}, end {r['end_mb']:.1f} "
        f"(growth {r['growth_after_warmup_mb']:+.2f}, limit {RSS_LIMIT_MB:g}), max "
        f"{r['max_after_warmup_mb']:.1f}",
    ]
    if f["error"]:
        lines.append(f"  ERROR: {f['error']}")
    lines.append("  result: " + ("ok" if f["ok"] else "FAILED"))
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """Entry point; see the module docstring."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--duration", type=float, default=600.0, help="seconds of streaming")
    ap.add_argument("--rate", type=float, default=500.0, help="adapter stream_rate [Hz]")
    ap.add_argument("--driver-rate", type=float, default=250.0, help="sim_driver rate [Hz]")
    ap.add_argument("--fault-every", type=float, default=20.0, help="seconds between faults")
    ap.add_argument("--warmup", type=float, default=None,
                    help="seconds after activation before the RSS reference sample "
                         f"(default: {WARMUP_ROUNDS} rounds of every fault kind, capped at "
                         "half the run)")
    ap.add_argument("--params", default=str(share_dir() / "config" / "soak" / "params.yaml"))
    ap.add_argument("--json", default="soak_report.json", help="figures file")
    ap.add_argument("--save-stream", default=None, metavar="FILE.npz",
                    help="also write every received setpoint (stamps, p, v, a) to FILE.npz")
    ap.add_argument("--keep-logs", default=None, metavar="DIR",
                    help="copy the processes' logs into DIR")
    args = ap.parse_args(argv)
    if args.warmup is None:
        args.warmup = min(WARMUP_ROUNDS * len(FAULTS) * args.fault_every + 5.0,
                          args.duration / 2.0)
    workdir = Path(tempfile.mkdtemp(prefix="adaptive_streamer_soak_"))
    try:
        figures = Soak(args, workdir).run()
    finally:
        if args.keep_logs and (workdir / "logs").is_dir():
            shutil.copytree(workdir / "logs", args.keep_logs, dirs_exist_ok=True)
        shutil.rmtree(workdir, ignore_errors=True)
    Path(args.json).write_text(json.dumps(figures, indent=2, default=float))
    print(format_figures(figures))
    print(f"figures written to {Path(args.json).resolve()}")
    return 0 if figures["ok"] else 1


if __name__ == "__main__":
    raise SystemExit(main())
