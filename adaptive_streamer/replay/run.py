# SPDX-License-Identifier: Apache-2.0
"""Offline replay: the adapter's decision cycles re-run on a bag, as fast as possible.

`replay` opens a bag, finds what ran (the run info the recorder stored, or ``--params``),
builds the same `StreamingSession` the adapter builds (`core.adapter_setup`), and drives it as
the node does, without DDS:

* with decision records (``<adapter>/decisions``), each recorded cycle is re-run at its
  recorded instant with the inputs it used (`InputRebuilder.exact`); the session starts
  from the first record's planned state, on the recorded decision clock. Gaps in the
  records (decisions that came too late live) are filled as the live session did, by the
  braking segment (`StreamingSession.commit_late` at the plan's end: with the plan output
  the continuation it had sent, as sent). Stops requested on the
  ``stop`` topic are applied at their receive times; a reset seen in the records (stopped
  -> approaching) is applied before that cycle. The decision time ``now`` of a cycle is
  the record's receive time.
* without records (a bag recorded elsewhere), decisions run every period from the first
  stream tick (first ``setpoints`` stamp, else the first time joint states and a window
  are both there), ``now`` one period before each decision instant, with the latest
  inputs received by then; the result is flagged approximate.

A record whose window or feedback is not in the bag ends the replay there when the bag
ends before it (a partial bag: the last complete cycle is the end), otherwise that cycle
uses the latest message by time and is counted as approximate.
"""
from __future__ import annotations

import math
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from adaptive_streamer.core.cycle import Decision
from adaptive_streamer.core.plan_ahead import PlanKnots
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.core.stream import Segment
from adaptive_streamer.core.watchdog import Trip

from ..io import run_info as run_info_mod
from ..io.bag_io import Bag, TopicData, decode, read_bag
from .inputs import InputRebuilder
from ..io.messages import (BOOL, FLOAT64_ARRAY, JOINT_STATE, JOINT_TRAJECTORY, MessageError,
                           STRING, JointStateReader, decision_records, read_bool, read_string)
from ..core.adapter_setup import DEFAULTS, SessionSetup, SetupError, build_session
from ..io.params_files import load_params_file

# logical input -> (relative name, expected type); resolved in the adapter's namespace
INPUT_TOPICS = {
    "joint_states": ("joint_states", JOINT_STATE),
    "window": ("reference/window", JOINT_TRAJECTORY),
    "feedback": ("feedback", JOINT_STATE),
    "stop": ("stop", BOOL),
    "setpoints": ("setpoints", JOINT_TRAJECTORY),
    "robot_description": ("robot_description", STRING),
    "plan": ("driver/plan", JOINT_TRAJECTORY),
}


class ReplayError(ValueError):
    """The bag cannot be replayed (names the bag, topic, joint or parameter at fault)."""


@dataclass(frozen=True)
class SentPlan:
    """A plan message the replayed session sent (plan-ahead output): when and what."""

    time: float
    knots: PlanKnots


@dataclass
class ReplayResult:
    """Everything a replay produced, for comparison, reports and the output bag."""

    bag: Path
    policy: str
    mode: str                                   # "exact" or "approximate"
    setup: SessionSetup
    decisions: list[Decision]
    compute: np.ndarray                         # wall time of each decide() [s]
    now: np.ndarray                             # decision time used for each [s]
    recorded: list[Decision]                    # the bag's decision records
    matched: list[int]                          # per decision: index in recorded (-1: none)
    segments: list[Segment]                     # every committed segment, in order
    trips: list[Trip]
    topics: dict[str, str]                      # logical input -> bag topic
    notes: list[str] = field(default_factory=list)
    partial: str | None = None
    approximate_cycles: int = 0
    plans: list[SentPlan] = field(default_factory=list)  # plan-ahead output, as sent
    elapsed: float = 0.0                        # wall time of the cycle loop [s]
    bag_data: Bag | None = None

    @property
    def cycles(self) -> int:
        """Decision cycles run."""
        return len(self.decisions)


def _resolve(ns: str, name: str) -> str:
    return name if name.startswith("/") else ns.rstrip("/") + "/" + name


def _load_run_info(bag: Bag, names: list[str]) -> tuple[run_info_mod.RunInfo | None, int]:
    """The run info in force when the decisions began, and its index on its topic: the last
    run-info message received before the first decision record (the recorder may have read
    the parameters before the adapter was configured, when the outputs' parameters were not
    declared yet), else the first; from the bag's metadata when there is no topic."""
    for name in names:
        data = bag.get(name)
        if data is not None:
            try:
                first = run_info_mod.parse(read_string(data.raw[0]), f"{bag.path} {name}")
                decisions = bag.get(first.node + "/decisions")
                if decisions is None or len(decisions.times) == 0:
                    return first, 0
                k = max(int(np.searchsorted(data.times, decisions.times[0], side="right")) - 1,
                        0)
                return (first if k == 0 else
                        run_info_mod.parse(read_string(data.raw[k]), f"{bag.path} {name}")), k
            except MessageError as exc:
                raise ReplayError(f"{bag.path}: topic '{name}': {exc}") from None
    text = bag.custom_data.get(run_info_mod.CUSTOM_KEY)
    return (run_info_mod.parse(text, f"{bag.path} metadata") if text else None), 0


def _check_type(bag: Bag, topic: str, expected: str) -> TopicData | None:
    data = bag.topics.get(topic)
    if data is None:
        if topic in bag.all_topics and bag.all_topics[topic] != expected:
            raise ReplayError(f"{bag.path}: topic '{topic}' has type "
                              f"'{bag.all_topics[topic]}'; replay needs {expected}")
        return None
    if data.msgtype != expected:
        raise ReplayError(f"{bag.path}: topic '{topic}' has type '{data.msgtype or 'unknown'}'"
                          f"; replay needs {expected}")
    return data if len(data) else None


def _check_joints(bag: Bag, topic: str, data: TopicData, joints: tuple[str, ...],
                  kind: str) -> None:
    """Clear error when the first message of ``topic`` lacks a joint of the limits."""
    from ..io.messages import WindowReader
    from adaptive_streamer.io.trajectory_conversions import TrajectoryMessageError
    if kind == "window":
        try:
            WindowReader(joints).read(data.raw[0])
        except TrajectoryMessageError as exc:
            raise ReplayError(f"{bag.path}: topic '{topic}': {exc}; the limits have joints "
                              f"{list(joints)}") from None
        return
    try:
        names = JointStateReader().read(data.raw[0])[0]
    except MessageError as exc:
        raise ReplayError(f"{bag.path}: topic '{topic}': {exc}") from None
    missing = [j for j in joints if j not in names]
    if missing:
        raise ReplayError(f"{bag.path}: topic '{topic}': joint '{missing[0]}' of the limits is "
                          f"not in the joint states (names {list(names)}; the limits have "
                          f"joints {list(joints)})")


def open_bag(path: str | Path) -> Bag:
    """Read the topics replay may use (every topic named like an input, records, run info)."""
    suffixes = tuple("/" + rel for rel, _ in INPUT_TOPICS.values()) + (
        "/decisions", "/" + run_info_mod.TOPIC, "/diagnostics")

    def wanted(name: str) -> bool:
        return name.endswith(suffixes) and not name.endswith("shadow/setpoints")
    return read_bag(path, wanted)


def configure(bag: Bag, params_file: str | Path | None, policy: str | None,
              namespace: str | None, scratch: Path) -> tuple[SessionSetup, str, str, list[str]]:
    """(setup, adapter namespace, decisions topic, notes) for replaying ``bag``."""
    notes: list[str] = []
    info_names = sorted(n for n in bag.topics if n.endswith("/" + run_info_mod.TOPIC))
    try:
        info, info_index = _load_run_info(bag, info_names)
    except run_info_mod.RunInfoError as exc:
        raise ReplayError(str(exc)) from None
    params: dict[str, Any] = {}
    node = "/adapter"
    if info is not None:
        node = info.node
        try:
            params, file_notes = run_info_mod.resolve_files(info, scratch)
        except run_info_mod.RunInfoError as exc:
            if policy is None:
                raise ReplayError(f"{bag.path}: {exc}") from None
            params, file_notes = dict(info.parameters), [str(exc)]
        notes += file_notes
        changed = _changed_parameters(bag, info_names, info, info_index)
        if changed:
            notes.append(f"the adapter's parameters {changed} changed during the recording; "
                         "replay uses their values at the start")
    if params_file is not None:
        try:
            params.update(load_params_file(params_file, node))
        except SetupError as exc:
            raise ReplayError(str(exc)) from None
    if info is None and params_file is None:
        raise ReplayError(f"{bag.path}: no run info in the bag (recorded without the "
                          "adapter's parameters); pass --params FILE with the adapter's "
                          "section")
    ns = namespace if namespace is not None else node.rsplit("/", 1)[0] + "/"
    ns = ns if ns.startswith("/") else "/" + ns
    desc_topic = _resolve(ns, "robot_description")
    desc = None
    if bag.get(desc_topic) is not None:
        desc = read_string(bag.topics[desc_topic].raw[0])
    try:
        setup = build_session(params, policy, desc)
    except SetupError as exc:
        raise ReplayError(f"{bag.path}: {exc}") from None
    decisions_topic = node + "/decisions" if namespace is None else _resolve(
        ns, node.rsplit("/", 1)[-1] + "/decisions")
    return setup, ns, decisions_topic, notes


def _changed_parameters(bag: Bag, names: list[str], first: run_info_mod.RunInfo,
                        index: int) -> list[str]:
    """Decision-shaping parameters whose value differs in a run-info message after the one
    replay uses (``index`` on its topic)."""
    changed: set[str] = set()
    for name in names:
        for raw in bag.topics[name].raw[index + 1:]:
            try:
                later = run_info_mod.parse(read_string(raw))
            except (run_info_mod.RunInfoError, MessageError):
                continue
            changed |= {k for k in DEFAULTS
                        if later.parameters.get(k) != first.parameters.get(k)}
    return sorted(changed)


class _Runner:
    """Drives one session over the inputs of a bag (see the module docstring)."""

    def __init__(self, setup: SessionSetup, rebuilder: InputRebuilder,
                 stop: TopicData | None) -> None:
        self.setup = setup
        self.session = setup.session
        self.inputs = rebuilder
        self.stop_times = stop.times if stop is not None else np.empty(0, np.int64)
        self.stop_raw = stop.raw if stop is not None else []
        self._next_stop = 0
        self.segments: list[Segment] = []
        self.decisions: list[Decision] = []
        self.compute: list[float] = []
        self.now: list[float] = []
        self.plans: list[SentPlan] = []

    def _sent(self, now: float) -> None:
        """Keep the session's new plan message, if the last commit made one."""
        knots = self.session.last_plan
        if knots is not None and (not self.plans or self.plans[-1].knots is not knots):
            self.plans.append(SentPlan(now, knots))

    def begin(self, t0: float, position: np.ndarray, first_decision: float | None) -> None:
        """Start at rest at ``position`` as the node's activation does."""
        z = np.zeros_like(position)
        self.session.begin(t0, MotionState(np.array(position, float), z, z.copy()))
        if first_decision is not None and self.session.cycle.t != first_decision:
            self.session.cycle.t = first_decision  # the recorded decision clock, bit for bit
        self.segments.append(self.session.plan.segment_at(t0))
        self._sent(t0)

    def seed(self, r0: Decision) -> None:
        """Start from a recorded decision (the recording began after the adapter started):
        the plan, mode and previous action are those after ``r0``, committed as recorded."""
        session, cycle = self.session, self.session.cycle
        self.begin(r0.time - self.setup.period, r0.state.position, r0.time)
        cycle.state = cycle_state(r0)
        cycle.mode = r0.mode
        cycle.commit(r0)
        session.plan.clear()
        self.segments.clear()
        seg = Segment(r0.time, cycle_state(r0), r0.u)
        session.plan.commit(seg)
        self.segments.append(seg)

    def apply_stops(self, now_ns: int) -> None:
        session = self.session
        while self._next_stop < len(self.stop_times) and \
                self.stop_times[self._next_stop] <= now_ns:
            value = read_bool(self.stop_raw[self._next_stop])
            t = int(self.stop_times[self._next_stop]) * 1e-9
            self._next_stop += 1
            if value:
                if session.watchdog.stop_requested is None:
                    session.watchdog.stop_requested = "stop topic is true"
                    session.stop(t, "external_stop", "stop requested on the stop topic")
            else:
                session.watchdog.stop_requested = None

    def fill_to(self, t: float) -> None:
        """Commit braking segments (late decisions) until the next decision is at ``t``."""
        session, period = self.session, self.setup.period
        while session.cycle.t < t - 0.5 * period:
            end = session.plan.end
            session.commit_late(end)
            self.segments.append(session.plan.segment_at(end + 0.5 * period))

    def decide(self, now: float, inputs: Any) -> Decision | None:
        t0 = time.perf_counter()
        d = self.session.decide(now, inputs)
        dt = time.perf_counter() - t0
        if d is not None:
            self.decisions.append(d)
            self.compute.append(dt)
            self.now.append(now)
            self.segments.append(Segment(d.time, d.state, d.u))
            self._sent(now)
        return d


def replay(path: str | Path, params_file: str | Path | None = None, policy: str | None = None,
           namespace: str | None = None, progress: bool = False,
           bag: Bag | None = None) -> ReplayResult:
    """Replay the bag at ``path`` (see the module docstring); raises `ReplayError`/`BagError`.

    ``policy`` (a card or built-in kind) replaces the recorded policy; ``params_file``
    overrides recorded parameters. ``bag`` skips reading when the bag is already open.
    """
    data = bag if bag is not None else open_bag(path)
    with tempfile.TemporaryDirectory(prefix="replay-files-") as scratch:
        setup, ns, decisions_topic, notes = configure(data, params_file, policy, namespace,
                                                      Path(scratch))
        return _replay(data, setup, ns, decisions_topic, notes, policy, progress)


def _replay(bag: Bag, setup: SessionSetup, ns: str, decisions_topic: str, notes: list[str],
            policy: str | None, progress: bool) -> ReplayResult:
    if bag.recovered:
        notes.insert(0, bag.recovered)
    topics = {k: _resolve(ns, rel) for k, (rel, _) in INPUT_TOPICS.items()}
    topics["decisions"] = decisions_topic
    found = {k: _check_type(bag, topics[k], INPUT_TOPICS[k][1]) for k in INPUT_TOPICS}
    records_data = _check_type(bag, decisions_topic, FLOAT64_ARRAY)
    for key in ("window", "joint_states"):
        if found[key] is None:
            raise ReplayError(f"{bag.path}: no messages on topic '{topics[key]}' "
                              f"({INPUT_TOPICS[key][1]}), which replay needs; topics in the "
                              f"bag: {sorted(bag.all_topics)}")
    if setup.parser is not None and found["feedback"] is None:
        raise ReplayError(f"{bag.path}: the policy reads feedback features "
                          f"{list(setup.running.features)} but there are no messages on "
                          f"topic '{topics['feedback']}'")
    _check_joints(bag, topics["window"], found["window"], setup.joints, "window")
    _check_joints(bag, topics["joint_states"], found["joint_states"], setup.joints, "joints")
    try:
        records, index = (decision_records(records_data.raw) if records_data is not None
                          else ([], []))
    except MessageError as exc:
        raise ReplayError(f"{bag.path}: topic '{decisions_topic}': {exc}") from None
    rebuilder = InputRebuilder(setup.joints, setup.parser, found["window"], found["feedback"],
                               found["joint_states"])
    runner = _Runner(setup, rebuilder, found["stop"])
    label = policy or setup.policy_label
    result = ReplayResult(Path(bag.path), label, "exact" if records else "approximate", setup,
                          runner.decisions, np.empty(0), np.empty(0), records, [],
                          runner.segments, [], {k: v for k, v in topics.items()}, notes,
                          bag_data=bag)
    bar = _progress(progress, len(records) if records else None)
    t_start = time.perf_counter()
    if records and records_data is not None:
        _run_exact(result, runner, records, records_data.times[np.asarray(index, np.intp)],
                   bar)
    else:
        notes.append("the bag has no decision records: decisions were re-run every period "
                     "with the latest inputs by time; the result is approximate")
        _run_nearest(result, runner, found, bar)
    result.elapsed = time.perf_counter() - t_start
    if bag.recovered and result.partial is None and runner.decisions:
        result.partial = (f"replayed {result.cycles} cycles, up to the last complete one at "
                          f"t = {runner.decisions[-1].time:.3f} s (the rest of the recording "
                          "is lost)")
    if bar is not None:
        bar.close()
    result.compute = np.asarray(runner.compute)
    result.now = np.asarray(runner.now)
    result.plans = runner.plans
    if result.plans and found["plan"] is not None:
        notes.append(plan_agreement(result.plans, found["plan"], topics["plan"]))
    result.trips = list(setup.session.watchdog.events)
    if rebuilder.bad_windows:
        notes.append(f"{rebuilder.bad_windows} reference/window message(s) could not be used "
                     f"(as live): {'; '.join(rebuilder.window_errors)}")
    return result


def plan_agreement(plans: list[SentPlan], recorded: TopicData, topic: str) -> str:
    """One line: how the regenerated plan messages agree with the recorded ones (matched by
    the time of their first point)."""
    by_stamp = {p.knots.stamp_ns: p.knots for p in plans}
    matched, worst = 0, 0.0
    for raw in recorded.raw:
        msg = decode(raw, JOINT_TRAJECTORY)
        knots = by_stamp.get(msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec)
        if knots is None or len(msg.points) != len(knots.positions):
            continue
        matched += 1
        for k, pt in enumerate(msg.points):
            for got, want in ((pt.positions, knots.positions[k]),
                              (pt.velocities, knots.velocities[k]),
                              (pt.accelerations, knots.accelerations[k])):
                worst = max(worst, float(np.max(np.abs(np.asarray(got) - want))))
    return (f"{topic}: {len(plans)} plan message(s) regenerated; {matched} of "
            f"{len(recorded.raw)} recorded ones have a regenerated one with the same first "
            f"point time and knot count, largest |difference| of p, v, a {worst:.3g}")


def _progress(enabled: bool, total: int | None) -> Any:
    if not enabled:
        return None
    from tqdm import tqdm
    return tqdm(total=total, unit="cycle", desc="replay", mininterval=0.5)


def _run_exact(result: ReplayResult, runner: _Runner, records: list[Decision],
               rec_times: np.ndarray, bar: Any) -> None:
    inputs = runner.inputs
    first = _first_complete(records, rec_times, inputs)
    r0 = records[first - 1] if first > 0 else records[0]
    period = runner.setup.period
    from_rest = (first == 0 and r0.mode == "approaching" and not np.any(r0.state.velocity)
                 and not np.any(r0.state.acceleration))
    if from_rest:
        runner.begin(r0.time - period, r0.state.position, r0.time)
    else:
        runner.seed(r0)
        if first > 0:
            result.notes.append(
                f"skipped the first {first} recorded cycle(s) (up to t = {r0.time:.3f} s): "
                "the bag does not hold the inputs they used (the recorder picked up joint_states, "
                "reference/window or feedback later than the adapter's own topics); replay "
                "starts from the recorded decision before the first complete cycle")
        else:
            result.notes.append(f"the recording starts after the adapter did (first record "
                                f"at t = {r0.time:.3f} s, mode {r0.mode}): replay starts from "
                                "that recorded decision")
    session = runner.session
    last_update = 0
    requested: list[float] = []
    start = first if first > 0 else (0 if from_rest else 1)
    for i, r in enumerate(records):
        if i < start:
            continue  # before the seed, or the seed itself
        if r.time < session.cycle.t - 0.5 * period:
            continue  # a repeated record of an instant already decided
        runner.fill_to(r.time)
        now_ns = int(rec_times[i])
        runner.apply_stops(now_ns)
        si, missing = inputs.exact(now_ns, r.window_stamp, r.feedback_stamp)
        if missing:
            ended = [m for m in missing if _ended_before(inputs, m, now_ns)]
            if ended or result.bag_data is not None and result.bag_data.recovered:
                result.partial = (f"the bag ends inside the cycle at t = {r.time:.3f} s "
                                  f"({', '.join(missing)} not recorded); replayed "
                                  f"{len(runner.decisions)} of {len(records)} recorded cycles, "
                                  "up to the last complete one")
                break
            result.approximate_cycles += 1
        now = now_ns * 1e-9
        if session.mode == "stopped" and r.mode == "approaching":
            session.reset([])  # the operator's reset, as recorded
        elif (r.mode == "stopping" and session.mode in ("approaching", "following")
              and not session.watchdog.tripped and not _faults(session, now, si)):
            session.cycle.request_stop()  # a stop the bag does not explain, as recorded
            requested.append(r.time)
        d = runner.decide(now, si)
        if d is not None:
            result.matched.append(i if d.time == r.time else -1)
        if bar is not None and i - last_update >= 256:
            bar.update(i - last_update)
            last_update = i
    if bar is not None:
        bar.update(len(records) - last_update)
    if requested:
        result.notes.append(
            "the recorded run began a stop the bag does not explain (a ~/stop call, "
            "deactivation or shutdown, or an input check replay did not see) at t = "
            + ", ".join(f"{t:.3f}" for t in requested[:5]) + " s; replay stops there too")
    if result.approximate_cycles:
        result.notes.append(f"{result.approximate_cycles} cycle(s) used the nearest message "
                            "because the one recorded as used is not in the bag")


def _first_complete(records: list[Decision], rec_times: np.ndarray,
                    inputs: InputRebuilder) -> int:
    """Index of the first record whose inputs the bag holds: the window and feedback it
    names, and a joint state of every joint received before it. 0 when the first record
    is complete, or when no record is (replay then goes on with the nearest messages)."""
    for i, r in enumerate(records):
        now_ns = int(rec_times[i])
        _, missing = inputs.exact(now_ns, r.window_stamp, r.feedback_stamp)
        if not missing and inputs.measured_at(now_ns) is not None:
            return i
    return 0


def _faults(session: Any, now: float, inputs: Any) -> bool:
    """True when the session's own input checks fire now (it will stop by itself)."""
    needs = bool(session.cycle.policy.needs_feedback) and session.mode == "following"
    return bool(session.input_faults(now, inputs, needs))


def cycle_state(d: Decision) -> MotionState:
    """The planned state a decision starts from (copied)."""
    return MotionState(*(np.array(x, float) for x in d.state))


def _ended_before(inputs: InputRebuilder, which: str, now_ns: int) -> bool:
    stream = inputs.windows if which == "reference/window" else inputs.feedback
    return stream.end_ns < now_ns


def _run_nearest(result: ReplayResult, runner: _Runner, found: dict[str, TopicData | None],
                 bar: Any) -> None:
    setup, inputs = runner.setup, runner.inputs
    period, rate = setup.period, setup.rate
    setpoints = found["setpoints"]
    if setpoints is not None:
        from ..io.messages import header_stamps
        t0 = float(header_stamps(setpoints.raw[:1])[0])
    else:
        first = max(int(inputs.windows.times[0]), int(inputs.joint_states.times[0])) * 1e-9
        t0 = math.ceil(first * rate) / rate
    position = inputs.measured_at(int(round(t0 * 1e9)))
    if position is None:
        raise ReplayError(f"{result.bag}: no valid joint_states received before the first "
                          f"stream tick at {t0:.3f} s (needed to start the plan)")
    runner.begin(t0, position, None)
    end_ns = max(inputs.windows.end_ns, inputs.joint_states.end_ns)
    session = runner.session
    while True:
        now = session.next_decision_time - period
        now_ns = int(round(now * 1e9))
        if now_ns > end_ns:
            break
        runner.apply_stops(now_ns)
        if runner.decide(now, inputs.nearest(now_ns)) is not None:
            result.matched.append(-1)
        if bar is not None:
            bar.update(1)
