# SPDX-License-Identifier: Apache-2.0
"""``adaptive-streamer preflight --params cell.yaml [--timeout S]``: check a cell before a pass.

Nothing moves and nothing is published: the command loads what the adapter and the
reference server would load from the params file, with the adapter's own configure step
(`adaptive_streamer.core.adapter_setup.build_session`), listens with a node of its own
(``preflight``, in the adapter's namespace) and prints one row per check, with the first
fix for each failure. Exit code 0 when nothing failed, 1 otherwise.

Rows: params (the adapter's section), limits (file, or the transient-local
``robot_description`` with ``limits_dynamics``, and every other adapter parameter), policy
(the card against the running configuration), reference (loaded as the reference server
loads it; fits the adapter's limits and the server's own), joint_states names (every
commanded joint named, possibly across several messages), joint_states fresh (no gap longer
than ``watchdog.joint_states_timeout``), reference start (within ``--start-bound`` of the
measured position), one row per driver output (a subscriber on its topic), stream rate
(125-1000 Hz, and the driver's command timeout, from ``--driver-timeout`` or a
``command_timeout`` parameter of another node in the file, spans five periods).
"""
from __future__ import annotations

import argparse
from dataclasses import dataclass, field
from typing import Any

from ..bringup import BringupError, NodeEntry, read_params
from ..core.adapter_setup import DEFAULTS, SessionSetup, SetupError, build_session
from ..core.feasibility import FeasibilityError, ensure_feasible
from ..core.limits import JointLimits, LimitsError
from ..core.reference import ReferenceTrajectory
from ..io.params_files import load_params_file
from ..io.reference_bags import ReferenceFileError, load_reference
from ..nodes.driver_outputs import DEFAULT_TOPICS
from . import checks
from .checks import Check, failed, passed, skipped
from .options import DEFAULT_TIMEOUT
from .probe import Probe

class PreflightError(ValueError):
    """The pre-flight cannot start (bad command-line value)."""


@dataclass
class Preflight:
    """The rows so far, and what later rows need."""

    rows: list[Check] = field(default_factory=list)

    def add(self, row: Check) -> Check:
        """Append a row."""
        self.rows.append(row)
        return row

    @property
    def failed(self) -> bool:
        """True when some row failed."""
        return any(r.failed for r in self.rows)


def _entries(path: str) -> tuple[NodeEntry, NodeEntry | None, list[NodeEntry]]:
    entries, _ = read_params(path)
    adapters = [e for e in entries if e.kind == "adapter"]
    if len(adapters) != 1:
        raise BringupError(f"{path}: expected one adapter section, found {len(adapters)}")
    servers = [e for e in entries if e.kind == "reference_server"]
    return adapters[0], (servers[0] if servers else None), entries


def _limits_row(pf: Preflight, params: dict[str, Any],
                description: str | None) -> SessionSetup | None:
    try:
        setup = build_session(params, policy="hold", robot_description=description)
    except SetupError as exc:
        fix = ("publish robot_description (transient local) or set limits_file"
               if description is None and not params.get("limits_file")
               else "correct the named adapter parameter or file")
        pf.add(failed("limits", str(exc), fix))
        return None
    note = f"; {setup.limits_note}" if setup.limits_note else ""
    source = params.get("limits_file") or "robot_description"
    pf.add(passed("limits", f"{len(setup.joints)} joints {list(setup.joints)} from {source}"
                            f"{note}"))
    return setup


def _policy_row(pf: Preflight, params: dict[str, Any], description: str | None) -> None:
    try:
        setup = build_session(params, robot_description=description)
    except SetupError as exc:
        pf.add(failed("policy", str(exc), "fix the card, or check it with "
                                          "'adaptive-streamer check-policy CARD'"))
        return
    pf.add(passed("policy", f"{setup.policy_label} fits the running configuration"))


def _reference_row(pf: Preflight, server: NodeEntry | None, path: str,
                   setup: SessionSetup) -> ReferenceTrajectory | None:
    if server is None:
        pf.add(skipped("reference", "no reference_server section in the params file"))
        return None
    p = load_params_file(path, node=server.fqn)
    ref_file = p.get("reference_file", "")
    if not ref_file:
        pf.add(failed("reference", "reference_server parameter 'reference_file' is empty",
                      "set reference_file to the reference CSV / YAML / rosbag2"))
        return None
    fraction = float(p.get("limit_fraction", 0.8))
    slow = bool(p.get("slow_down", False))
    try:
        limits = [setup.running.limits]
        if p.get("limits_file"):
            limits.append(JointLimits.from_file(p["limits_file"]))
        max_gap = float(p.get("max_gap", 1.0)) or None
        ends = "periodic" if p.get("end_mode", "hold") == "loop" else "rest"
        reference = load_reference(ref_file, topic=p.get("bag_topic") or None,
                                   joints=[j for j in p.get("joint_names", []) if j] or None,
                                   limits=limits[-1], max_gap=max_gap, ends=ends,
                                   fraction=fraction)
        if set(reference.names) != set(setup.joints):
            pf.add(failed("reference", f"{ref_file}: joints {list(reference.names)} are not "
                                       f"the adapter's {list(setup.joints)}",
                          "stream the reference's joints (limits / 'joints') or fix the file"))
            return None
        for lim in limits:
            reference, lam, report = ensure_feasible(reference, lim, slow_down=slow,
                                                     fraction=fraction)
    except (ReferenceFileError, FeasibilityError, LimitsError, ValueError) as exc:
        pf.add(failed("reference", f"{ref_file}: {exc}",
                      "fix the reference (or enable reference_server slow_down for speed "
                      "limits only)"))
        return None
    slowed = f"; slowed down {lam:.3g}x" if lam > 1.0 else ""
    pf.add(passed("reference", f"{reference.duration:.2f} s fits the limits, "
                               f"{report.summary()}{slowed}"))
    return reference


def _outputs(params: dict[str, Any]) -> list[tuple[str, str, str]]:
    """(name, type, topic) of each configured driver output."""
    out = []
    for name in [n for n in params.get("outputs", DEFAULTS["outputs"]) if n]:
        kind = str(params.get(f"{name}.type", "position"))
        out.append((name, kind, str(params.get(f"{name}.topic",
                                               DEFAULT_TOPICS.get(kind, f"driver/{kind}")))))
    return out


def _command_timeout(entries: list[NodeEntry], path: str, given: float | None) -> float | None:
    if given is not None:
        return given
    for e in entries:
        if e.kind != "adapter":
            value = load_params_file(path, node=e.fqn).get("command_timeout")
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                return float(value)
    return None


def preflight(path: str, timeout: float = DEFAULT_TIMEOUT,
              start_bound: float = checks.START_BOUND,
              driver_timeout: float | None = None) -> list[Check]:
    """The pre-flight rows for the params file ``path`` (a node of its own listens)."""
    if not timeout > 0 or not start_bound > 0:
        raise PreflightError(f"--timeout and --start-bound must be positive, got {timeout:g} "
                             f"and {start_bound:g}")
    pf = Preflight()
    try:
        adapter, server, entries = _entries(path)
        params = load_params_file(path, node=adapter.fqn)
    except (BringupError, SetupError) as exc:
        pf.add(failed("params", str(exc), "give the cell's params file with an adapter section"))
        return pf.rows
    pf.add(passed("params", f"{path}: adapter {adapter.fqn}"))
    want_description = not params.get("limits_file")
    probe = Probe(adapter.namespace, want_description)
    try:
        description = probe.wait_for_description(timeout) if want_description else None
        setup = _limits_row(pf, params, description)
        if setup is None:
            for name in ("policy", "reference", "joint_states", "outputs"):
                pf.add(skipped(name, "needs the limits"))
            return pf.rows
        _policy_row(pf, params, description)
        reference = _reference_row(pf, server, path, setup)
        outputs = _outputs(params)
        probe.listen(setup.joints, str(params.get("joint_states_qos", "sensor_data")),
                     [t for _, _, t in outputs])
        obs = probe.observe(timeout)
        js_timeout = float(params.get("watchdog.joint_states_timeout",
                                      DEFAULTS["watchdog.joint_states_timeout"]))
        pf.add(checks.joint_names(setup.joints, obs.joint_states, probe.joint_states_topic))
        pf.add(checks.joint_states_timing(setup.joints, obs.joint_states, js_timeout))
        if reference is None or obs.measured is None:
            pf.add(skipped("reference start", "needs the reference and every joint measured"))
        else:
            tol = float(params.get("approach_tolerance", DEFAULTS["approach_tolerance"]))
            pf.add(checks.start_distance(setup.joints, obs.measured,
                                         reference.sample(0.0)[0], tol, start_bound))
        for (name, kind, _), topic in zip(outputs, probe.topics):
            count = obs.subscribers[topic]
            row = f"output {name}"
            pf.add(passed(row, f"{kind} on {topic}: {count} subscriber(s)") if count else
                   failed(row, f"{kind} on {topic}: no subscriber in {timeout:g} s",
                          f"set {name}.topic to the driver's command topic (or start the "
                          "driver's command interface)"))
        per_decision = all(kind == "plan" for _, kind, _ in outputs) and bool(outputs)
        pf.add(checks.stream_rate(setup.rate, setup.period,
                                  _command_timeout(entries, path, driver_timeout), per_decision))
    finally:
        probe.close()
    return pf.rows


def format_table(rows: list[Check]) -> str:
    """The rows as a text table; each failure followed by its fix."""
    width = max(len(r.name) for r in rows)
    lines = []
    for r in rows:
        lines.append(f"{r.name:<{width}}  {r.status.value:<4}  {r.detail}")
        if r.fix:
            lines.append(f"{'':<{width}}        fix: {r.fix}")
    bad = sum(r.failed for r in rows)
    lines.append(f"preflight: {'FAILED, ' + str(bad) + ' check(s)' if bad else 'passed'}"
                 " (nothing was commanded)")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Entry of ``adaptive-streamer preflight``: print the table; 1 on a failure."""
    rows = preflight(args.params, args.timeout, args.start_bound, args.driver_timeout)
    print(format_table(rows))
    return 1 if any(r.failed for r in rows) else 0
