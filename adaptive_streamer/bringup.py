# SPDX-License-Identifier: Apache-2.0
"""``adaptive-streamer bringup``: start the nodes of a ROS 2 params file, as a launch file would.

Each top-level key of the params file names a node (``adapter``, ``/cell/adapter``...; the
last path element must be one of `NODE_KINDS`, the package's node names). By default every
node runs in its own process (``--one-process`` shares one, for small machines). Paths in
the file may use ``$(share)`` for the package's share folder.

The adapter is configured and activated through its lifecycle services (unless its
``autostart`` parameter does it), retried until ``joint_states`` is fresh. On Ctrl-C (or
SIGTERM) the adapter is deactivated first, which brings the arm to rest while the stream and
the driver keep running; then the adapters' processes are stopped and, once they exited,
every other child, cleanly, without a traceback.

Before anything starts, the params file is checked against the nodes' parameter tables
(`adaptive_streamer.io.param_specs`). Each child's output goes to a log file (in a folder
bringup names when it starts) and is copied to bringup's output; a child that exits while
the cell starts stops the bringup at once, quoting the child's last lines.

With ``--record`` the adapter is activated (motion starts) only once the recorder records
every configured topic that has a publisher (`adaptive_streamer.nodes.recording_ready`).
An adapter that activates itself (``autostart``), or ``--one-process``, cannot wait for
the recorder: bringup says so when it starts.
"""
from __future__ import annotations

import ctypes
import importlib
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from .core.text_files import yaml_problem
from .io.param_specs import ParamsCheckError, check_params_file
from .share import expand

NODE_KINDS = {
    "adapter": ("adaptive_streamer.nodes.adapter", "AdapterNode"),
    "reference_server": ("adaptive_streamer.nodes.reference_server", "ReferenceServer"),
    "sensor_bridge": ("adaptive_streamer.nodes.sensor_bridge", "SensorBridge"),
    "sim_driver": ("adaptive_streamer.nodes.sim_driver", "SimDriver"),
    "edge_sensor": ("adaptive_streamer.nodes.edge_sensor", "EdgeSensor"),
    "watchdog": ("adaptive_streamer.nodes.watchdog_monitor", "WatchdogMonitor"),
    "recorder": ("adaptive_streamer.nodes.recorder", "RecorderNode"),
}
STOP_TIMEOUT = 10.0
LOG_TAIL = 20          # lines of a child's output shown when it exits during startup
PR_SET_PDEATHSIG = 1   # linux/prctl.h
SIMULATED_HARDWARE = {"sim_driver", "edge_sensor"}   # nodes that stand in for real-time devices


class BringupError(ValueError):
    """The params file cannot be brought up."""


@dataclass(frozen=True)
class NodeEntry:
    """One node of a params file."""

    kind: str        # key of NODE_KINDS
    namespace: str   # '' or '/cell'
    params: dict[str, Any]

    @property
    def fqn(self) -> str:
        """Fully qualified node name."""
        return f"{self.namespace}/{self.kind}"


def read_params(path: str | Path) -> tuple[list[NodeEntry], str]:
    """Nodes of a params file and its text with ``$(share)`` expanded; every node's
    parameters are checked against its table (`adaptive_streamer.io.param_specs`)."""
    path = Path(path)
    try:
        text = expand(path.read_text())
    except OSError as exc:
        raise BringupError(f"cannot read params file '{path}': {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise BringupError(f"{path}: not a UTF-8 text file ({exc.reason} at byte "
                           f"{exc.start})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise BringupError(f"{path}: not valid YAML: {yaml_problem(exc)}") from None
    if not isinstance(data, dict) or not data:
        raise BringupError(f"{path}: expected a ROS 2 params file (node: ros__parameters: ...)")
    nodes = []
    for key, body in data.items():
        key = str(key)
        if key in ("/**", "**"):
            continue
        if not isinstance(body, dict) or "ros__parameters" not in body:
            raise BringupError(f"{path}: '{key}' has no 'ros__parameters' mapping")
        params = body["ros__parameters"]
        if params is not None and not isinstance(params, dict):
            raise BringupError(f"{path}: '{key}': ros__parameters must be a mapping of "
                               f"parameter names to values, got {params!r}")
        parts = [p for p in key.split("/") if p]
        if not parts:
            raise BringupError(f"{path}: '{key}' names no node")
        kind = parts[-1]
        if kind not in NODE_KINDS:
            raise BringupError(f"{path}: unknown node '{kind}' (from '{key}'); this package's "
                               f"nodes are {sorted(NODE_KINDS)}")
        ns = "/" + "/".join(parts[:-1]) if len(parts) > 1 else ""
        nodes.append(NodeEntry(kind, ns, dict(params or {})))
    if not nodes:
        raise BringupError(f"{path}: names no node")
    try:
        check_params_file(path, text)
    except ParamsCheckError as exc:
        raise BringupError(str(exc)) from None
    return nodes, text


def ros_args(params_file: str, namespace: str, remaps: dict[str, str] | None = None
             ) -> list[str]:
    """rclpy arguments for a node reading ``params_file`` in ``namespace``; ``remaps`` are
    remapping rules ``{from: to}`` (``from`` may be prefixed ``node_name:``)."""
    args = ["--ros-args", "--params-file", params_file]
    if namespace:
        args += ["-r", f"__ns:={namespace}"]
    for src, dst in (remaps or {}).items():
        args += ["-r", f"{src}:={dst}"]
    return args


def child_command(kinds: list[str], params_file: str, namespace: str = "",
                  remaps: dict[str, str] | None = None) -> list[str]:
    """Command line of a child process running the nodes ``kinds`` (one executor)."""
    return [sys.executable, "-m", "adaptive_streamer.bringup", "--child", ",".join(kinds), "--",
            *ros_args(params_file, namespace, remaps)]


def end_with_parent() -> None:
    """Ask Linux to send this process SIGINT when its parent ends, so a bringup killed
    outright leaves no node running: the adapter brings the arm to rest and exits as on
    Ctrl-C. Elsewhere (no prctl) nothing happens."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGINT))
    except (OSError, AttributeError):
        pass


def run_child(kinds: list[str], args: list[str]) -> int:
    """Entry of a child process: run one node (or several in one executor) until SIGINT
    (also sent when the parent ends, see `end_with_parent`). A process that holds simulated
    hardware (`SIMULATED_HARDWARE`) asks for SCHED_FIFO priority first, as a real driver
    runs real-time (common practice): unrelated load on the PC must not make the simulated
    arm's joint_states late."""
    end_with_parent()
    if SIMULATED_HARDWARE & set(kinds):
        from .nodes.threads import MIDDLEWARE_PRIORITY, set_thread_priority
        print("bringup child: " + set_thread_priority(
            MIDDLEWARE_PRIORITY, "simulated hardware process"), flush=True)
    if len(kinds) == 1:
        module, _ = NODE_KINDS[kinds[0]]
        return int(importlib.import_module(module).main(args) or 0)
    from .nodes import common
    factories = []
    for kind in kinds:
        module, cls = NODE_KINDS[kind]
        factories.append(getattr(importlib.import_module(module), cls))
    return common.run_nodes(factories, args)


def run_one_process(entries: list[NodeEntry], params_file: str) -> int:
    """All nodes in this process (one executor; the adapter keeps its stream thread)."""
    from .nodes import common
    from .nodes.adapter import AdapterNode, bring_to_rest
    from .nodes.threads import make_executor

    namespaces = {e.namespace for e in entries}
    if len(namespaces) > 1:
        raise BringupError("--one-process needs all nodes in one namespace, got "
                           f"{sorted(namespaces)}")
    ns = namespaces.pop()
    factories = []
    for e in entries:
        module, cls = NODE_KINDS[e.kind]
        klass = getattr(importlib.import_module(module), cls)
        factories.append(lambda k=klass: k())

    def activate(nodes: list) -> None:
        for node in nodes:
            if isinstance(node, AdapterNode):
                node.start_autostart()

    return common.run_nodes(factories, ros_args(params_file, ns), executor=make_executor,
                            before_shutdown=bring_to_rest, after_start=activate)


class Processes:
    """Child processes of a bringup, stopped in order: the adapters first."""

    def __init__(self) -> None:
        self.children: list[tuple[NodeEntry, subprocess.Popen]] = []
        self._killed: set[int] = set()     # pids this object killed with SIGKILL
        self._adapters: set[int] = set()   # pids of children that run an adapter

    def start(self, entry: NodeEntry, params_file: str, group: list[str] | None = None,
              remaps: dict[str, str] | None = None, **popen: Any) -> None:
        """Start ``entry`` (with the nodes ``group`` sharing its process) in its own session,
        so a terminal Ctrl-C reaches only the parent; ``remaps`` as in `ros_args`."""
        kinds = group or [entry.kind]
        proc = subprocess.Popen(child_command(kinds, params_file, entry.namespace, remaps),
                                start_new_session=True, **popen)
        self.add(entry, proc, kinds)

    def add(self, entry: NodeEntry, proc: subprocess.Popen, kinds: list[str]) -> None:
        """Track a started child process running the nodes ``kinds``."""
        self.children.append((entry, proc))
        if "adapter" in kinds:
            self._adapters.add(proc.pid)

    def send_signal(self, kind: str, sig: int) -> int:
        """Send ``sig`` to the running child whose entry is the node ``kind`` (SIGSTOP and
        SIGCONT suspend and resume it, SIGKILL kills it) and return its pid. A child killed
        with SIGKILL here is left out of `dead` and `stop`'s notes: it did not end on its
        own. `BringupError` when no child of that node runs."""
        for entry, proc in self.children:
            if entry.kind == kind and proc.poll() is None:
                proc.send_signal(sig)
                if sig == signal.SIGKILL:
                    self._killed.add(proc.pid)
                return proc.pid
        raise BringupError(f"no running process of node '{kind}'")

    def dead(self) -> list[tuple[NodeEntry, int]]:
        """Children that exited on their own (not killed by `send_signal`), with their exit
        codes."""
        return [(e, p.returncode) for e, p in self.children
                if p.pid not in self._killed and p.poll() is not None]

    def stop(self, timeout: float = STOP_TIMEOUT) -> list[str]:
        """Stop the children; returns notes on those that did not stop cleanly.

        The adapters first: SIGINT, and wait until they exited (each brings its arm to rest
        with the controlled stop, which needs the driver still running), SIGKILL after
        ``timeout``; only then SIGINT every other child (reverse start order), SIGKILL after
        another ``timeout``. A suspended child is resumed so that it can take the SIGINT; a
        child killed by `send_signal` is only reaped."""
        adapters = [c for c in self.children if c[1].pid in self._adapters]
        others = [c for c in reversed(self.children) if c[1].pid not in self._adapters]
        return self._stop_group(adapters, timeout) + self._stop_group(others, timeout)

    def _stop_group(self, children: list[tuple[NodeEntry, subprocess.Popen]], timeout: float
                    ) -> list[str]:
        """SIGINT ``children`` and wait for them (SIGKILL after ``timeout``); notes on those
        that were killed or exited with an error."""
        for _, proc in children:
            if proc.poll() is None:
                proc.send_signal(signal.SIGINT)
                proc.send_signal(signal.SIGCONT)
        deadline = time.monotonic() + timeout
        notes = []
        for entry, proc in children:
            if proc.pid in self._killed:
                proc.wait()
                continue
            try:
                proc.wait(max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
                notes.append(f"{entry.fqn} did not stop within {timeout:g} s and was killed")
            else:
                if proc.returncode not in (0, -signal.SIGINT):
                    notes.append(f"{entry.fqn} exited with code {proc.returncode}")
        return notes


class ChildOutput:
    """A child's output (stdout and stderr) goes to a log file, which stays writable if
    bringup itself ends abruptly (the child still brings the arm to rest and logs it); a
    thread follows the file, copies it to this process's stdout and keeps the last
    `LOG_TAIL` lines, to show why a child exited."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.file = path.open("w")
        self.lines: deque[str] = deque(maxlen=LOG_TAIL)
        self._done = threading.Event()
        self._thread = threading.Thread(target=self._follow, daemon=True)
        self._thread.start()

    def _follow(self) -> None:
        with self.path.open() as stream:
            while True:
                line = stream.readline()
                if line:
                    self.lines.append(line.rstrip("\n"))
                    sys.stdout.write(line)
                    sys.stdout.flush()
                elif self._done.is_set():
                    return
                else:
                    time.sleep(0.05)

    def close(self) -> None:
        """Copy what is left (the child has ended) and stop following."""
        self._done.set()
        self._thread.join(2.0)
        self.file.close()

    def tail(self) -> str:
        """The last lines of the log, indented."""
        self._done.set()
        self._thread.join(2.0)
        return "\n".join(f"    {line}" for line in self.lines)


def bringup(params: str | Path, one_process: bool = False, record: str | None = None,
            activate_timeout: float = 30.0, ready: Any = None) -> int:
    """Run the nodes of ``params`` until Ctrl-C/SIGTERM; returns an exit code."""
    entries, text = read_params(params)
    tmp = tempfile.NamedTemporaryFile("w", suffix=".yaml", prefix="adaptive_streamer_params_",
                                      delete=False)
    tmp.write(text)
    tmp.close()
    try:
        if record:
            entries = entries + [recorder_entry(entries, record)]
            tmp_text = text + "\n" + yaml.safe_dump({_key(entries[-1]): {
                "ros__parameters": entries[-1].params}})
            Path(tmp.name).write_text(tmp_text)
        if record and (one_process or any(e.kind == "adapter" and e.params.get("autostart")
                                          for e in entries)):
            print("bringup: warning: the adapter starts motion without waiting for the "
                  "recorder (autostart or --one-process); the first decisions may lack their "
                  "recorded inputs (replay skips them)", file=sys.stderr)
        if one_process:
            return run_one_process(entries, tmp.name)
        return _run_processes(entries, tmp.name, activate_timeout, ready, bool(record))
    finally:
        os.unlink(tmp.name)


def recorder_entry(entries: list[NodeEntry], out: str, label: str = "bringup") -> NodeEntry:
    """The recorder node writing a new bag ``<out>/<label>_<UTC time>`` (in the nodes'
    namespace)."""
    ns = entries[0].namespace if entries else ""
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
    return NodeEntry("recorder", ns, {"output": str(Path(out).resolve() / f"{label}_{stamp}")})


def _key(entry: NodeEntry) -> str:
    return f"{entry.namespace}/{entry.kind}" if entry.namespace else entry.kind


def _run_processes(entries: list[NodeEntry], params_file: str, activate_timeout: float,
                   ready: Any, record: bool = False) -> int:
    import rclpy
    from rclpy.node import Node

    from .nodes.lifecycle_client import LifecycleClient, LifecycleClientError
    from .nodes.recording_ready import RecordingNotReady, RecordingWatch

    stop = {"flag": False}

    def _handler(signum: int, frame: Any) -> None:  # noqa: ARG001
        stop["flag"] = True

    old = {s: signal.signal(s, _handler) for s in (signal.SIGINT, signal.SIGTERM)}
    procs = Processes()
    outputs: dict[str, ChildOutput] = {}
    code = 0
    rclpy.init(signal_handler_options=rclpy.signals.SignalHandlerOptions.NO)
    node = Node("bringup")
    adapters = [e for e in entries if e.kind == "adapter"]
    clients = [LifecycleClient(node, e.fqn) for e in adapters
               if not e.params.get("autostart", False)]
    watch = RecordingWatch(node, entries[-1].fqn) if record else None
    try:
        names = NameWatch(node, [e.fqn for e in entries])
        names.refuse_taken(lambda t: rclpy.spin_once(node, timeout_sec=t))
        logs = Path(tempfile.mkdtemp(prefix="adaptive_streamer_bringup_"))
        print(f"bringup: each node's output is also in {logs}", flush=True)
        for entry in entries:
            out = ChildOutput(logs / f"{entry.fqn.strip('/').replace('/', '_')}.log")
            outputs[entry.fqn] = out
            procs.start(entry, params_file, stdout=out.file, stderr=subprocess.STDOUT,
                        env=dict(os.environ, PYTHONUNBUFFERED="1"))
            print(f"bringup: started {entry.fqn} (pid {procs.children[-1][1].pid})", flush=True)

        def alive() -> None:
            _refuse_dead(procs, outputs)

        for client in clients:
            _configure(client, activate_timeout, alive)
        if watch is not None:
            watch.wait(activate_timeout, lambda s: rclpy.spin_once(node, timeout_sec=s),
                       alive=lambda: not procs.dead() and not stop["flag"])
        for client in clients:
            _activate(client, activate_timeout, stop, alive)
        if ready is not None:
            ready()
        while not stop["flag"]:
            dead = procs.dead()
            if dead:
                for entry, rc in dead:
                    print(f"bringup: {entry.fqn} exited (code {rc}); stopping the rest",
                          file=sys.stderr)
                code = 1
                break
            twins = names.twins()
            if twins:
                print(f"bringup: {twins}; stopping this cell", file=sys.stderr)
                code = 1
                break
            rclpy.spin_once(node, timeout_sec=0.2)
        for client in clients:  # bring the arm to rest while the driver still runs
            try:
                if client.state(2.0) == "active":
                    print(f"bringup: deactivating {client.target} (controlled stop)", flush=True)
                    client.deactivate()
            except LifecycleClientError as exc:
                print(f"bringup: {exc}", file=sys.stderr)
    except (LifecycleClientError, RecordingNotReady, BringupError) as exc:
        print(f"bringup: {exc}", file=sys.stderr)
        code = 1
    finally:
        notes = procs.stop()
        for out in outputs.values():
            out.close()
        for note in notes:
            print(f"bringup: {note}", file=sys.stderr)
        node.destroy_node()
        rclpy.shutdown()
        for s, h in old.items():
            signal.signal(s, h)
    print("bringup: stopped" + ("" if code == 0 and not notes else " (with errors)"), flush=True)
    return code or (1 if notes else 0)


class NameWatch:
    """The cell's node names against the ROS graph: two nodes with one name on a domain
    take each other's topics and services (a second cell started with the same names would
    command the first cell's driver), so bringup refuses to start when one of its names is
    taken, and stops its cell when a second node with one of them appears later."""

    DISCOVERY = 1.0      # [s] spent discovering the nodes already running before starting
    PERIOD = 1.0         # [s] between checks of the graph while running

    def __init__(self, node: Any, fqns: list[str]) -> None:
        self.node = node
        self.fqns = fqns
        self._next = 0.0

    def _running(self) -> list[str]:
        return [(ns.rstrip("/") + "/" + name) for name, ns in
                self.node.get_node_names_and_namespaces()]

    def refuse_taken(self, spin: Any) -> None:
        """Discover the graph for `DISCOVERY` seconds; raise `BringupError` naming the
        cell's names that are already in use."""
        end = time.monotonic() + self.DISCOVERY
        while time.monotonic() < end:
            spin(0.05)
        taken = sorted(set(self.fqns) & set(self._running()))
        if taken:
            raise BringupError(
                f"node name(s) {', '.join(taken)} already in use on ROS_DOMAIN_ID "
                f"{os.environ.get('ROS_DOMAIN_ID', '0')}: two nodes with one name share its "
                "topics and services; stop the other cell, or give this one its own "
                "namespace (params file keys '/ns/node') or its own ROS_DOMAIN_ID")

    def twins(self) -> str:
        """At most every `PERIOD`: a note naming the cell's nodes that now exist more than
        once in the graph ('' when none, or not checked this time)."""
        now = time.monotonic()
        if now < self._next:
            return ""
        self._next = now + self.PERIOD
        running = self._running()
        twice = sorted(f for f in set(self.fqns) if running.count(f) > 1)
        return (f"a second node named {', '.join(twice)} appeared on the ROS domain"
                if twice else "")


def _refuse_dead(procs: Processes, outputs: dict[str, ChildOutput]) -> None:
    """Raise `BringupError` naming the children that exited, with their last output lines."""
    dead = procs.dead()
    if dead:
        raise BringupError("\n".join(
            f"{entry.fqn} exited during startup (code {rc}); its last output:\n"
            f"{outputs[entry.fqn].tail() if entry.fqn in outputs else '    (none)'}"
            for entry, rc in dead))


def _configure(client: Any, timeout: float, alive: Any) -> None:
    """Wait for the adapter's lifecycle services and configure it (if unconfigured);
    ``alive()`` raises as soon as a child has exited."""
    from .nodes.lifecycle_client import LifecycleClientError

    deadline = time.monotonic() + timeout
    while not client.wait(0.5):
        alive()
        if time.monotonic() > deadline:
            raise LifecycleClientError(f"{client.target}: lifecycle services did not appear")
    alive()
    state = client.state()
    if state == "unconfigured" and not client.configure():
        raise LifecycleClientError(f"{client.target}: configure refused (see its log)")


def _activate(client: Any, timeout: float, stop: dict, alive: Any) -> None:
    """Activate with retries (activation waits for fresh joint_states); ``alive()`` raises
    as soon as a child has exited."""
    from .nodes.lifecycle_client import LifecycleClientError

    deadline = time.monotonic() + timeout
    while not stop["flag"]:
        alive()
        if client.state() == "active" or client.activate():
            print(f"bringup: {client.target} active", flush=True)
            return
        if time.monotonic() > deadline:
            raise LifecycleClientError(f"{client.target}: activate refused for {timeout:g} s "
                                       "(joint_states missing or the arm moving; see its log)")
        time.sleep(0.5)


def _child_main() -> int:
    argv = sys.argv[1:]
    if len(argv) < 2 or argv[0] != "--child":
        print("usage: python -m adaptive_streamer.bringup --child KIND[,KIND...] -- ROS_ARGS",
              file=sys.stderr)
        return 2
    kinds = argv[1].split(",")
    unknown = [k for k in kinds if k not in NODE_KINDS]
    if unknown:
        print(f"unknown node kind(s) {unknown}; known: {sorted(NODE_KINDS)}", file=sys.stderr)
        return 2
    rest = argv[3:] if len(argv) > 2 and argv[2] == "--" else argv[2:]
    return run_child(kinds, rest)


if __name__ == "__main__":
    raise SystemExit(_child_main())
