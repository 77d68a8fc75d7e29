# SPDX-License-Identifier: Apache-2.0
"""``adaptive-streamer demo``: one dispensing pass of the simulated cell over real DDS.

Processes: the cell (reference_server, edge_sensor, sensor_bridge) in one, the simulated
driver in its own (its 4 ms ticks are what ``driver/followed`` shows: sharing an executor
with the cell, it ran a third to a half of them late, as catch-up ticks), the adapter in its
own (so its stream timing is not shared with the simulator's), a recorder with
``--record``; this process observes and operates (`DemoMonitor`). Sequence: wait for
``joint_states``, configure and activate the adapter (it approaches the start point), start
the reference once the adapter follows, inject the requested faults, end when the pass is
done and the arm at rest (or on ``--duration``, or after a watchdog stop, or once the
followed motion is at rest after the adapter was killed), deactivate (not a killed
adapter), stop everything; then compute the figures, write the report and print the
summary. A suspended adapter is always resumed before the processes are stopped.
"""
from __future__ import annotations

import argparse
import math
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from ..bringup import NodeEntry, Processes
from ..core.adapter_setup import SetupError, build_session
from ..io.params_files import load_params_file
from ..sim.config import load_scenario
from ..safety import CAUTIONS
from .config import DemoConfig, DemoError, build_config
from .faults import JUMP_JOINT, JUMP_OFFSET, InjectionRecord, PlannedFault, plan_faults
from ..nodes.recording_ready import RecordingNotReady, RecordingWatch
from .followed import REST_VELOCITY as FOLLOWED_REST
from .options import OptionError, describe, parse_injection
from .process_faults import AdapterProcessFaults, ProcessFaultError

CELL_NODES = ["reference_server", "edge_sensor", "sensor_bridge"]
STARTUP_TIMEOUT = 30.0
SETTLE = 0.5       # seconds at rest after the pass before ending
REST_VELOCITY = 1e-4
LOGS_DIR = "logs"  # the report's folder for the logs of a failed run


def run_demo(args: argparse.Namespace) -> int:
    """Run the demo; returns 0 when the run passed (`adaptive_streamer.demo.outcome`: no
    limit violations, every injected fault led to its expected stop, no stop that was not
    injected), 1 otherwise. When the run fails (that, a `DemoError` once the processes
    started, or any other exception) the processes' logs are copied to the report folder's
    `LOGS_DIR` and their path is printed."""
    print(CAUTIONS, flush=True)
    try:
        injections = sorted((parse_injection(s) for s in args.inject), key=lambda i: i.at)
    except OptionError as exc:
        raise DemoError(str(exc)) from None
    workdir = Path(tempfile.mkdtemp(prefix="adaptive_streamer_demo_"))
    passed = False
    try:
        cfg = build_config(args, workdir)
        for note in cfg.notes:
            print(f"note: {note}", flush=True)
        params_file = cfg.write_params(workdir / "params.yaml")
        faults = _plan(cfg, args, injections, params_file, workdir)
        for f in faults:
            name = f.fault + (f":{f.length:g}" if math.isfinite(f.length) else "")
            print(f"fault to inject at +{f.at:g} s: {name} ({describe(f.fault, f.length)}); "
                  f"expected stop: {f.expected}{'; ' + f.note if f.note else ''}", flush=True)
        code = _run(cfg, args, faults, params_file, workdir)
        passed = code == 0
        return code
    finally:
        if not passed:
            kept = _keep_logs(workdir, Path(args.report))
            if kept is not None:
                print(f"logs of the failed run: {kept}", file=sys.stderr, flush=True)
        shutil.rmtree(workdir, ignore_errors=True)


def _keep_logs(workdir: Path, report: Path) -> Path | None:
    """Copy the processes' logs (``workdir/logs``) to ``report/LOGS_DIR`` (replacing an
    earlier run's); the folder, or None when no process had started."""
    logs = workdir / "logs"
    if not logs.is_dir() or not any(logs.iterdir()):
        return None
    dest = report / LOGS_DIR
    try:
        shutil.rmtree(dest, ignore_errors=True)
        shutil.copytree(logs, dest)
    except OSError as exc:
        print(f"warning: could not copy the logs to {dest}: {exc}", file=sys.stderr)
        return None
    return dest.resolve()


def _plan(cfg: DemoConfig, args: argparse.Namespace, injections: list,
          params_file: Path, workdir: Path) -> list[PlannedFault]:
    """The adapter's configure step run here first (a card or limits the adapter would
    refuse fail the demo before any process starts), and the injections checked against
    the session it makes."""
    try:
        setup = build_session(load_params_file(params_file))
    except SetupError as exc:
        raise DemoError(f"the adapter would not configure: {exc}") from None
    if not injections:
        return []
    run_end = cfg.reference_duration if args.duration is None \
        else min(float(args.duration), cfg.reference_duration)
    return plan_faults(injections, setup, cfg.policy_card, cfg.reference, run_end, workdir,
                       float(cfg.params["sim_driver"].get("command_timeout", 0.1)))


def _run(cfg: DemoConfig, args: argparse.Namespace, faults: list[PlannedFault],
         params_path: Path, workdir: Path) -> int:
    import rclpy

    from ..nodes.lifecycle_client import LifecycleClientError
    from .monitor import RELAY_REMAP, DemoMonitor
    params_file = str(params_path)
    procs = Processes()
    logs = workdir / "logs"
    logs.mkdir()
    rclpy.init(signal_handler_options=rclpy.signals.SignalHandlerOptions.NO)
    joints = list(cfg.params["sim_driver"]["joints"])
    relay = any(f.fault == "reference_jump" for f in faults)
    monitor = DemoMonitor(joints, relay_windows=relay)
    monitor.start()
    process_faults = AdapterProcessFaults(procs, lambda: monitor.get_clock().now().nanoseconds
                                          * 1e-9)
    bar = None
    records = [InjectionRecord(f) for f in faults]
    status: dict[str, str] = {}
    watch: RecordingWatch | None = None
    try:
        if args.record:
            watch = RecordingWatch(monitor, "/recorder")
            _start_recorder(procs, args.record, workdir, logs)
        for name, group in (("cell", CELL_NODES), ("driver", ["sim_driver"]),
                            ("adapter", ["adapter"])):
            procs.start(NodeEntry(group[0], "", {}), params_file, group=group,
                        remaps=RELAY_REMAP if relay and name == "cell" else None,
                        stdout=(logs / f"{name}.log").open("w"), stderr=subprocess.STDOUT)
        _bring_up_adapter(monitor, procs, watch, logs / "adapter.log")
        monitor.recording = True
        if not monitor.wait_for("following", lambda: monitor.last_mode() == "following",
                                STARTUP_TIMEOUT):
            raise DemoError("the adapter did not reach the start of the reference "
                            f"(mode '{monitor.last_mode()}'): {_tail(logs / 'adapter.log')}")
        ok, msg = monitor.trigger("reference_server/start")
        if not ok:
            raise DemoError(f"reference_server/start refused: {msg}")
        _wait_lock_on(monitor, cfg, msg)
        t_start = monitor.get_clock().now().nanoseconds * 1e-9
        limit = cfg.reference_duration + 5.0 if args.duration is None else float(args.duration)
        print(f"dispensing pass: {cfg.reference_duration:.1f} s with policy {cfg.policy_label}",
              flush=True)
        bar = _progress(cfg.reference_duration, args.no_progress)
        t_end = _follow_pass(monitor, procs, cfg, records, t_start, limit, bar,
                             process_faults)
        if bar is not None:
            bar.close()
            bar = None
        process_faults.release()
        if not process_faults.crashed:   # a killed adapter answers nothing
            monitor.wait_fresh_status("adapter")
        status = dict(monitor.adapter_status())   # the latched trip, before deactivating
        if not process_faults.crashed and monitor.adapter.state(5.0) == "active":
            monitor.adapter.deactivate()
        monitor.recording = False
    except LifecycleClientError as exc:
        raise DemoError(f"the adapter did not answer its lifecycle client: {exc}") from None
    finally:
        if bar is not None:
            bar.close()
        process_faults.release()
        procs.stop()
        monitor.stop()
        monitor.destroy_node()
        rclpy.shutdown()
    trip = status.get("trip", "none")
    after = f" after a {trip} stop nobody injected" if trip != "none" else ""
    for rec in records:
        if rec.planned.fault == "adapter_stall" and math.isfinite(rec.time):
            rec.ended = process_faults.resumed_at
        if not math.isfinite(rec.time) and not rec.note:
            rec.note = f"the run ended at +{t_end - t_start:.1f} s{after}, before the injection"
    return _report(cfg, monitor, args, t_start, t_end, records, status)


def _start_recorder(procs: Processes, out: str, workdir: Path, logs: Path) -> Path:
    """Start the recorder in its own process and wait until it is ready; the bag folder."""
    import yaml

    from ..bringup import recorder_entry
    entry = recorder_entry([], out, "demo")
    path = workdir / "recorder.yaml"
    path.write_text(yaml.safe_dump({"recorder": {"ros__parameters": entry.params}}))
    log = logs / "recorder.log"
    procs.start(entry, str(path), stdout=log.open("w"), stderr=subprocess.STDOUT)
    deadline = time.monotonic() + STARTUP_TIMEOUT
    while "recorder: ready" not in log.read_text():
        if time.monotonic() > deadline:
            raise DemoError(f"the recorder did not start: {_tail(log)}")
        _alive(procs)
        time.sleep(0.1)
    bag = Path(entry.params["output"])
    print(f"recording to {bag}", flush=True)
    return bag


def _bring_up_adapter(monitor, procs: Processes, watch: RecordingWatch | None,
                      log: Path) -> None:
    """Configure the adapter, wait (with ``--record``: ``watch``) until the recorder records
    every published topic, then activate it: motion starts there. A refusal quotes the end
    of the adapter's ``log``."""
    adapter = monitor.adapter
    if not monitor.wait_for("joint_states", lambda: adapter.wait(0.2) and _alive(procs),
                            STARTUP_TIMEOUT):
        raise DemoError("the adapter's lifecycle services did not appear")
    if not adapter.configure():
        raise DemoError(f"the adapter refused to configure: {_tail(log)}")
    if watch is not None:
        try:
            watch.wait(STARTUP_TIMEOUT, alive=lambda: _alive(procs))
        except RecordingNotReady as exc:
            raise DemoError(str(exc)) from None
    deadline = time.monotonic() + STARTUP_TIMEOUT
    while not adapter.activate():
        if time.monotonic() > deadline or not _alive(procs):
            raise DemoError("the adapter refused to activate (no fresh joint_states?): "
                            f"{_tail(log)}")
        monitor.spin_for(0.5)


def _wait_lock_on(monitor, cfg: DemoConfig, answer: str) -> None:
    """With the scenario's lock-on, wait until the reference server has started the pass
    (the correction settled) or says it could not (`DemoError` with its reason)."""
    ref = cfg.params["reference_server"]
    if ref.get("start_condition") != "lock_on":
        return
    print(f"lock-on: {answer}", flush=True)
    state = lambda: monitor.reference_status().get("state", "")  # noqa: E731
    timeout = float(ref["lock_on.timeout"]) + STARTUP_TIMEOUT
    monitor.wait_for("lock-on", lambda: state() not in ("", "waiting", "locking"), timeout)
    if state() != "running":
        status = monitor.reference_status()
        raise DemoError(f"the pass did not start: reference_server state '{state()}' "
                        f"({status.get('lock_on', '')})")
    print(f"locked on: {monitor.reference_status().get('lock_on', '')}", flush=True)


def _alive(procs: Processes) -> bool:
    dead = procs.dead()
    if dead:
        entry, code = dead[0]
        raise DemoError(f"process {entry.kind} exited early with code {code}")
    return True


def _progress(total: float, disabled: bool):
    from tqdm import tqdm
    return tqdm(total=round(total, 1), unit="s", desc="pass", disable=disabled,
                bar_format="{desc}: {percentage:3.0f}%|{bar}| {n:.1f}/{total:.1f} s {postfix}")


def _follow_pass(monitor, procs: Processes, cfg: DemoConfig, records: list[InjectionRecord],
                 t_start: float, limit: float, bar, process_faults: AdapterProcessFaults
                 ) -> float:
    pending = list(records)
    rest_since = None
    stopped_at = None
    while True:
        monitor.spin_for(0.05)
        _alive(procs)
        now = monitor.get_clock().now().nanoseconds * 1e-9
        elapsed = now - t_start
        mode = monitor.last_mode()
        while pending and elapsed >= pending[0].planned.at:
            _inject(monitor, pending.pop(0), mode, now, process_faults)
        if bar is not None:
            bar.n = round(min(elapsed, cfg.reference_duration), 1)
            bar.set_postfix_str(mode)
            bar.refresh()
        if process_faults.crashed:   # no setpoints any more: the arm as the driver moves it
            mode = "crashed"
            at_rest = _followed_at_rest(monitor)
            stopped_at = stopped_at or now
        else:
            at_rest = bool(monitor.data.setpoints) and \
                max(abs(x) for x in monitor.data.setpoints[-1][3]) < REST_VELOCITY
        finished = monitor.reference_status().get("state") == "finished"
        if mode in ("stopping", "stopped") and stopped_at is None:
            stopped_at = now
        if (finished or stopped_at is not None) and at_rest and mode != "stopping":
            rest_since = rest_since or now
            if now - rest_since >= SETTLE:
                return now
        else:
            rest_since = None
        if elapsed >= limit:
            return now


def _followed_at_rest(monitor) -> bool:
    """Whether the last two driver/followed ticks are at rest (by their velocities, or by
    their positions with the stream output)."""
    rows = monitor.data.followed[-2:]
    if len(rows) < 2:
        return False
    (t0, p0, _, _), (t1, p1, v1, _) = rows
    if v1:
        return max(abs(x) for x in v1) < FOLLOWED_REST
    dt = (t1 - t0) * 1e-9
    return dt > 0 and max(abs(b - a) for a, b in zip(p0, p1)) / dt < FOLLOWED_REST


def _inject(monitor, rec: InjectionRecord, mode: str, now: float,
            process_faults: AdapterProcessFaults) -> None:
    """Inject ``rec``'s fault unless the adapter has already stopped; note what happened."""
    f = rec.planned
    if mode in ("stopping", "stopped"):
        rec.note = f"the adapter was already {mode} (see the watchdog events)"
        print(f"\nnot injecting {f.fault}: {rec.note}", file=sys.stderr, flush=True)
        return
    print(f"\ninjecting {f.fault} at +{f.at:g} s: {describe(f.fault, f.length)}", flush=True)
    rec.time = now
    if f.fault in ("adapter_stall", "adapter_crash"):
        try:
            rec.time = (process_faults.stall(f.length) if f.fault == "adapter_stall"
                        else process_faults.crash())
        except ProcessFaultError as exc:
            rec.time = math.nan
            rec.note = str(exc)
            print(f"warning: could not inject {f.fault}: {exc}", file=sys.stderr)
        return
    if f.fault == "feedback_dropout":
        ok = monitor.set_param("edge_sensor", "dropout", True)
    elif f.fault == "joint_state_stall":
        ok = monitor.set_param("sim_driver", "stall", True)
    elif f.fault == "reference_jump":
        ok = monitor.start_jump(joint=JUMP_JOINT, offset=JUMP_OFFSET)
    else:
        ok = monitor.set_param("adapter", "policy", str(f.card))
    if not ok:
        rec.time = math.nan
        rec.note = "the injection was not accepted (see the node logs)"
        print(f"warning: could not inject {f.fault}", file=sys.stderr)


def _reference_only(cfg: DemoConfig, length: float) -> tuple[np.ndarray, np.ndarray]:
    """(times from the pass start, lateral error [m]) of at least the first ``length``
    seconds of the same pass without adaptation (the tracker), by the offline closed loop:
    the same core code as the live adapter, the same seed, limits and reference, no DDS."""
    from ..sim.closed_loop import CellSettings, run_closed_loop
    settings = CellSettings()
    duration = None if length >= cfg.reference_duration else \
        settings.start_delay + length + settings.decision_period
    res = run_closed_loop("tracker", seed=cfg.seed, limits=cfg.limits, reference=cfg.reference,
                          settings=settings, duration=duration)
    return res.pass_times, res.pass_lateral_error


def _report(cfg: DemoConfig, monitor, args: argparse.Namespace, t_start: float,
            t_end: float, records: list[InjectionRecord], status: dict[str, str]) -> int:
    """Compute the figures, judge the run (`adaptive_streamer.demo.outcome`), write the
    report and print the summary; the exit code."""
    from .faults import outcomes
    from .outcome import judge
    from .report import write_summary
    from .summary import Series, format_summary, summarise

    series = Series.of(monitor.data, len(cfg.limits))
    scenario = load_scenario(cfg.params["edge_sensor"]["scenario"])
    panel = scenario.panel(cfg.seed)
    window = (t_start, min(t_end, t_start + cfg.reference_duration))
    t_ref, e_ref = _reference_only(cfg, window[1] - window[0])
    # the latched trip as it was before deactivating, the counters as they are now
    diag = {**monitor.adapter_status(),
            **{k: v for k, v in status.items() if k.startswith("trip")}}
    faults = outcomes(records, status, series.sp_t, series.sp_v, series.followed, cfg.limits)
    summary = summarise(series, cfg.limits, panel, cfg.stream_rate, window, (t_ref, e_ref),
                        cfg.policy_label, cfg.seed, diag, _deviation_limits(cfg), cfg.notes,
                        faults)
    summary.outcome = judge(summary.stream.total_violations, summary.events,
                            status.get("trip", "none"), _float(status.get("trip_time")),
                            faults, t_start)
    out = Path(args.report)
    out.mkdir(parents=True, exist_ok=True)
    in_window = t_ref <= window[1] - window[0]
    plots = [] if args.no_plots else _plots(cfg, series, panel, window, t_ref[in_window],
                                            e_ref[in_window], out)
    md, html_path = write_summary(summary, cfg.limits, plots, out, CAUTIONS)
    print()
    print(format_summary(summary, cfg.limits))
    print(f"report: {md} ({html_path.name}, {len(plots)} plots)")
    return summary.outcome.exit_code


def _deviation_limits(cfg: DemoConfig) -> tuple[float, float]:
    """The adapter's watchdog (deviation_joint, deviation_norm) [rad] (NaN: not given)."""
    wd = cfg.params["adapter"].get("watchdog", {})
    return (float(wd.get("deviation_joint", math.nan)),
            float(wd.get("deviation_norm", math.nan)))


def _float(text: str | None) -> float:
    try:
        return float(text) if text is not None else math.nan
    except ValueError:
        return math.nan


def _plots(cfg: DemoConfig, series, panel, window: tuple[float, float], t_ref: np.ndarray,
           e_ref: np.ndarray, out: Path) -> list[Path]:
    """The report's PNG plots (joints against their limits, deviation, lateral error,
    timing)."""
    from .report import plot_deviation, plot_joints, plot_lateral, plot_timing
    from ..sim.metrics import lateral_error

    t_start = window[0]
    plots = plot_joints(series, cfg.limits, out, t_start)
    plots.append(plot_deviation(series, _deviation_limits(cfg), out, t_start))
    in_pass = (series.js_t >= window[0]) & (series.js_t <= window[1])
    plots.append(plot_lateral(series.js_t[in_pass] - t_start,
                              lateral_error(series.js_q[in_pass], panel) if in_pass.any()
                              else np.zeros(0), t_ref, e_ref, out))
    plots.append(plot_timing(series, cfg.stream_rate, out))
    return plots


def _tail(path: Path, lines: int = 5) -> str:
    try:
        return " | ".join(path.read_text().strip().splitlines()[-lines:])
    except OSError:
        return ""
