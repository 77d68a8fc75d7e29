# SPDX-License-Identifier: Apache-2.0
"""A deterministic offline closed-loop run of the demo cell with the live stack's core pieces.

What runs, and how it mirrors the live nodes (all times on one simulated clock, integer
microseconds, so the run is reproducible bit for bit for a given seed):

* **reference_server**: a `Playback` of the demo reference publishes a `Window` of
  ``window_points`` points every decision period, ``window_phase`` periods after the adapter's
  decision instants (the two timers are not synchronised live); it is started at
  ``start_delay`` (before that the window holds the first point at rest).
* **adapter**: one `StreamingSession` (policy + limit stage + watchdog + guard). The stream
  samples the committed plan at ``stream_rate`` and sends the positions to the driver;
  when a tick enters a new decision period the session decides the next segment with the
  latest inputs (`SessionInputs` built as the node does: feedback parsed with a
  `FeedbackParser` for the policy's features, ``feedback_valid_since`` kept the same way).
  The approach tracker is the node's (critically damped at ``approach_bandwidth``).
* **sim_driver**: a `SimPlant` stepped at ``driver_rate`` (a command reaches the plant on
  its next tick, then the plant's own transport delay and lag apply); its measured state is
  the ``joint_states`` the adapter and the sensor see, stamped with the tick time.
* **edge_sensor**: the `LineSensor` (noise, latency, rate, range) sampling the latest
  measured joints through the arm's forward kinematics, on its own 100 Hz grid; readings
  out of range are not delivered.
* **sensor_bridge**: a `FeatureTable` with one input (``edge``: offset and angle, scale 1,
  the configured filter and ``max_age``) publishing on every accepted sample and whenever
  the input turns stale (checked every quarter of ``max_age``, 10-250 ms), as the node does.

At each driver tick the order is: driver tick, sensor tick, bridge staleness check,
reference window, stream tick and decision. The task metric is `lateral_error` of the
*measured* joints (what the live demo reads from ``joint_states``) over the *pass*: from the
reference start for the reference's duration, as the live demo reports it.

`run_closed_loop` returns a `ClosedLoopResult` (arrays and a `ClosedLoopSummary`);
`CellLoop` is the same run one decision at a time (`advance`, `decide`, `result`).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Sequence

import numpy as np

from ..core.alignment import align
from ..core.cycle import CycleConfig, Decision
from ..core.feasibility import ensure_feasible
from ..core.feedback import (FeatureTable, FeatureVector, FeedbackParser, FilterSpec, InputSpec,
                             Verdict)
from ..core.limits import JointLimits
from ..core.playback import Playback
from ..core.policies import BUILT_IN_KINDS, build_policy, check_card, load_card, policy_for_kind
from ..core.policies.base import Policy, RunningConfig
from ..core.policies.card import PolicyCard
from ..core.reference import ReferenceTrajectory
from ..core.reference_files import load_reference_file
from ..core.segment import MotionState
from ..core.session import SessionInputs, StreamingSession, feedback_valid_since
from .plant import PlantConfig, SimPlant
from ..core.watchdog import Trip, WatchdogConfig
from .arm import DEMO_ARM
from .config import Scenario, default_scenario_path, load_scenario
from .line_sensor import LineSensor, true_edge_reading
from .metrics import lateral_error
from .panel import Panel

EDGE_FEATURES = ("edge_offset", "edge_angle")
"""Feature names of the demo's line sensor in the feedback vector (offset [m], angle [rad])."""
_US = 1_000_000


class ClosedLoopError(ValueError):
    """Closed-loop settings are inconsistent (e.g. rates that do not fit the microsecond grid)."""


@dataclass(frozen=True)
class CellSettings:
    """Timing and node settings of the simulated cell (defaults: the demo's).

    ``horizon`` is the adapter's (reference points per decision), ``window_points`` the
    reference_server's (points per published window); ``start_delay`` is when the
    reference starts (the live demo starts it as soon as the adapter follows);
    ``slow_down`` and ``limit_fraction`` are the reference_server's (an infeasible
    reference is refused, or slowed down to that fraction of the limits); ``plant`` is the
    sim_driver's plant (its ``dt`` is replaced by ``1 / driver_rate``); ``edge_filter`` and
    ``edge_max_age`` are the sensor_bridge's settings for the edge input; ``watchdog`` the
    adapter's thresholds; ``settle`` the time simulated after the
    reference ends when no duration is given.
    """

    decision_period: float = 0.05
    horizon: int = 10
    window_points: int = 12
    stream_rate: float = 250.0
    driver_rate: float = 250.0
    start_delay: float = 0.2
    slow_down: bool = False
    limit_fraction: float = 0.8
    override_ramp_time: float = 1.0
    window_phase: float = 0.5
    settle: float = 1.0
    approach_scale: float = 0.3
    approach_tolerance: float = 2e-3
    approach_bandwidth: float = 4.0
    plant: PlantConfig = field(default_factory=lambda: PlantConfig(dt=0.004))
    edge_filter: FilterSpec = field(default_factory=FilterSpec)
    edge_max_age: float = 0.2
    watchdog: WatchdogConfig = field(default_factory=WatchdogConfig)


@dataclass(frozen=True)
class LimitUsage:
    """Peak use of each limit by the commanded stream, per joint (fractions of the limit).

    ``position_margin`` [rad] is the smallest distance to either end of the range (negative
    when outside); position, velocity and acceleration come from the stream samples, jerk
    from the committed segment each sample falls in (exact whenever every segment holds a
    stream tick, i.e. the stream is faster than the decisions).
    """

    velocity: np.ndarray
    acceleration: np.ndarray
    jerk: np.ndarray
    position_margin: np.ndarray

    @property
    def violations(self) -> int:
        """Number of joint-limit pairs exceeded (beyond a 1e-9 relative rounding allowance)."""
        tol = 1.0 + 1e-9
        return int(np.sum(self.velocity > tol) + np.sum(self.acceleration > tol)
                   + np.sum(self.jerk > tol) + np.sum(self.position_margin < -1e-12))


@dataclass(frozen=True)
class ClosedLoopSummary:
    """The figures of one run (lengths in metres, angles in radians)."""

    lateral_rms: float          # over the pass
    lateral_max: float          # max |error| over the pass
    limit_usage: LimitUsage
    deviation_joint_max: float  # largest planned deviation from the reference, one joint
    deviation_norm_max: float   # largest planned deviation norm
    following_error_max: float  # largest |measured - command command_latency earlier|
    trips: tuple[str, ...]      # watchdog trigger kinds that fired, in order
    late_decisions: int
    sensor_samples: int
    sensor_out_of_range: int


@dataclass(frozen=True, eq=False)
class ClosedLoopResult:
    """Everything a run recorded.

    Stream grid (``times``, N): commanded position/velocity/acceleration (N, n).
    Driver grid (``measured_times``, M): measured and true joint positions (M, n), the
    reference at those times (M, n) and its velocity (M, n), the lateral error of the
    measured joints (M,). The pass starts at ``pass_start``; ``in_pass`` (M,) marks the
    driver ticks within ``[pass_start, pass_start + reference duration]`` and
    `pass_times` / `pass_lateral_error` are those ticks (times from the pass start) and
    their errors. ``decisions`` are the committed decisions
    the session returned; ``feedback`` is what each of them saw: (D, f) feature values
    (NaN where invalid or absent).
    """

    seed: int
    policy: str
    panel: Panel
    times: np.ndarray
    commanded: MotionState
    measured_times: np.ndarray
    measured: np.ndarray
    true_positions: np.ndarray
    reference: np.ndarray
    reference_velocity: np.ndarray
    lateral: np.ndarray
    pass_start: float
    in_pass: np.ndarray
    decisions: list[Decision]
    feedback: np.ndarray
    trips: list[Trip]
    summary: ClosedLoopSummary

    @property
    def pass_times(self) -> np.ndarray:
        """Driver tick times within the pass, from the pass start [s]."""
        return self.measured_times[self.in_pass] - self.pass_start

    @property
    def pass_lateral_error(self) -> np.ndarray:
        """Lateral error [m] of the measured joints at `pass_times`."""
        return self.lateral[self.in_pass]


def demo_file(name: str) -> Path:
    """A file of the demo's config folder (next to the scenario file that `load_scenario` finds)."""
    return default_scenario_path().parent / name


def _ticks(period: float, what: str) -> int:
    us = period * _US
    if not (math.isfinite(us) and us >= 1.0) or abs(us - round(us)) > 1e-6:
        raise ClosedLoopError(f"{what}: {period!r} s is not a whole number of microseconds")
    return int(round(us))


def _policy(policy: str | Path | PolicyCard | Policy, base: RunningConfig
            ) -> tuple[Policy, RunningConfig]:
    """The policy to run and the running configuration (features: what it reads)."""
    if isinstance(policy, str) and policy in BUILT_IN_KINDS:
        built = policy_for_kind(policy, base)
        return built, replace(base, features=())
    if isinstance(policy, (str, Path)):
        policy = load_card(policy)
    if isinstance(policy, PolicyCard):
        running = replace(base, features=policy.feedback_features)
        return build_policy(policy, running), running
    running = replace(base, features=policy.card.feedback_features)
    check_card(policy.card, running)
    return policy, running


def approach_policy(running: RunningConfig, bandwidth: float) -> Policy:
    """The adapter's approach tracker: critically damped at ``bandwidth`` [rad/s]."""
    w = 2.0 * bandwidth
    return policy_for_kind("tracker", running, kp=(w / 2) ** 2, kd=w)


class CellLoop:
    """The demo cell in closed loop, one decision at a time (what `run_closed_loop` runs).

    Build it with the arguments of `run_closed_loop`, then alternate `advance` (the cell
    runs on its microsecond grid until a stream tick enters a new decision period and
    returns the session's inputs for that decision, or None when ``duration`` is over) and
    `decide` (the session decides on those inputs); `result` gathers the record. Between
    the two calls ``session.cycle`` holds the planned state the decision starts from, so a
    caller can look at the decision's inputs before it is made (the training environment
    does). ``feedback_message`` is the latest message of the sensor bridge
    (names, values, stamp), or None before the first.
    """

    def __init__(self, policy: str | Path | PolicyCard | Policy, seed: int,
                 duration: float | None = None,
                 limits: JointLimits | str | Path | None = None, *,
                 settings: CellSettings | None = None, scenario: Scenario | None = None,
                 reference: ReferenceTrajectory | str | Path | None = None,
                 panel: Panel | None = None,
                 initial_positions: Sequence[float] | None = None) -> None:
        cfg = self.settings = settings or CellSettings()
        scenario = scenario or load_scenario()
        if limits is None or isinstance(limits, (str, Path)):
            limits = JointLimits.from_file(limits or demo_file("limits.yaml"))
        if reference is None or isinstance(reference, (str, Path)):
            reference = load_reference_file(reference or demo_file("reference.csv"),
                                            limits=limits)
        reference, _, _ = ensure_feasible(reference, limits, slow_down=cfg.slow_down,
                                          fraction=cfg.limit_fraction)
        if reference.names != limits.names:
            raise ClosedLoopError(f"reference joints {list(reference.names)} differ from the "
                                  f"limits' joints {list(limits.names)}")
        self.seed, self.limits, self.reference = seed, limits, reference
        self.panel = panel = panel or scenario.panel(seed)
        period = cfg.decision_period
        self._period_us = _ticks(period, "decision_period")
        self._stream_us = _ticks(1.0 / cfg.stream_rate, "stream period (1 / stream_rate)")
        self._driver_us = _ticks(1.0 / cfg.driver_rate, "driver period (1 / driver_rate)")
        self._sensor_us = _ticks(1.0 / scenario.sensor.rate, "sensor period (1 / sensor rate)")
        if not 0.0 <= cfg.window_phase < 1.0:
            raise ClosedLoopError(f"window_phase must be in [0, 1) periods, got "
                                  f"{cfg.window_phase}")
        self._window_phase_us = int(round(cfg.window_phase * self._period_us))
        self._stale_us = _ticks(round(min(max(cfg.edge_max_age / 4.0, 0.01), 0.25), 6),
                                "bridge staleness check")
        if duration is None:
            duration = cfg.start_delay + reference.duration + cfg.settle
        self._end_us = int(round(duration * _US))

        base = RunningConfig(limits.names, period, limits, cfg.horizon, EDGE_FEATURES)
        self.policy, self.running = _policy(policy, base)
        self.session = StreamingSession(
            limits, period, self.policy, approach_policy(self.running, cfg.approach_bandwidth),
            CycleConfig(horizon=cfg.horizon, approach_scale=cfg.approach_scale,
                        approach_tolerance=cfg.approach_tolerance,
                        approach_bandwidth=cfg.approach_bandwidth),
            cfg.watchdog)
        self.playback = Playback(reference, period, cfg.window_points, override=1.0,
                                 ramp_time=cfg.override_ramp_time)
        q0 = (np.asarray(initial_positions, float) if initial_positions is not None
              else reference.positions[0].copy())
        self.plant = SimPlant(replace(cfg.plant, dt=self._driver_us / _US), q0, seed=seed)
        self.sensor = LineSensor(scenario.sensor, panel.length, scenario.sensor_seed(seed))
        self.table = FeatureTable([InputSpec("edge", EDGE_FEATURES, (1.0, 1.0), (0.0, 0.0),
                                             cfg.edge_max_age, cfg.edge_filter)])
        self._parser = FeedbackParser(self.running.features) if self.running.features else None

        n = len(limits)
        first = self.plant.step(0.0)
        self.session.begin(0.0, MotionState(first.position, np.zeros(n), np.zeros(n)))
        self._js = (0.0, 0.0, first.position)          # (received, stamp, positions)
        self._sampled_stamp: float | None = None
        # the server was up before the adapter
        self._window_rx = (self._window_phase_us - self._period_us) / _US
        self._window = self.playback.window(self._window_rx)
        self.feedback_message: tuple[tuple[str, ...], np.ndarray, float] | None = None
        self._valid_since: float | None = None
        self._last_fresh = self.table.fresh(0.0)
        self.pass_start = math.nan
        self._segment = -1
        self._m_t: list[float] = []
        self._m_q: list[np.ndarray] = []
        self._m_true: list[np.ndarray] = []
        self._r_p: list[np.ndarray] = []
        self._r_v: list[np.ndarray] = []
        self._s_t: list[float] = []
        self._s_p: list[np.ndarray] = []
        self._s_v: list[np.ndarray] = []
        self._s_a: list[np.ndarray] = []
        self._s_j: list[np.ndarray] = []
        self.decisions: list[Decision] = []
        self._seen: list[np.ndarray] = []
        self._record_driver(0.0, first.position, first.true_position)
        step = math.gcd(math.gcd(self._stream_us, self._driver_us),
                        math.gcd(self._sensor_us, self._period_us))
        self._step_us = math.gcd(math.gcd(step, self._stale_us),
                                 self._window_phase_us or step)
        self._us = 0
        self._feedback: FeatureVector | None = None

    @property
    def time(self) -> float:
        """The cell's simulated time [s] (the last grid instant run)."""
        return self._us / _US

    @property
    def measured_positions(self) -> np.ndarray:
        """The latest measured joint positions (the driver's ``joint_states``)."""
        return self._js[2]

    def _record_driver(self, t: float, sample_pos: np.ndarray, true_pos: np.ndarray) -> None:
        self._m_t.append(t)
        self._m_q.append(sample_pos)
        self._m_true.append(true_pos)
        ref = align(self._window, np.array([t]))
        self._r_p.append(ref.positions[0])
        self._r_v.append(ref.velocities[0])

    def _publish_feedback(self, now: float) -> None:
        snap = self.table.snapshot(now)
        self.feedback_message = (snap.names, snap.values,
                                 snap.stamp if snap.stamp is not None else 0.0)
        self._last_fresh = snap.fresh

    def advance(self) -> SessionInputs | None:
        """Run the cell up to the next decision; its inputs, or None at the end of the run."""
        cfg, session = self.settings, self.session
        period_us, window_phase_us = self._period_us, self._window_phase_us
        while self._us + self._step_us <= self._end_us:
            self._us += self._step_us
            us = self._us
            t = us / _US
            if us % self._driver_us == 0:
                smp = self.plant.step(t)
                self._js = (t, t, smp.position)
                self._record_driver(t, smp.position, smp.true_position)
            if us % self._sensor_us == 0:
                js = self._js
                if js[1] != self._sampled_stamp:
                    offset, angle, along = true_edge_reading(DEMO_ARM, self.panel, js[2])
                    self.sensor.sample(js[1], offset[0], angle[0], along[0])
                    self._sampled_stamp = js[1]
                for reading in self.sensor.due(t):
                    if reading.valid and self.table.update(
                            0, (reading.offset, reading.angle), reading.stamp,
                            t) is Verdict.ACCEPTED:
                        self._publish_feedback(t)
            if us % self._stale_us == 0 and not np.array_equal(self.table.fresh(t),
                                                               self._last_fresh):
                self._publish_feedback(t)
            if (us - window_phase_us) % period_us == 0:
                if math.isnan(self.pass_start) and t >= cfg.start_delay - 1e-9:
                    self.playback.start(t)
                    self.pass_start = t
                self._window, self._window_rx = self.playback.window(t), t
            if us % self._stream_us == 0:
                sp, _ = session.sample(t)
                self.plant.command(sp.position, t)
                self._s_t.append(t)
                self._s_p.append(sp.position)
                self._s_v.append(sp.velocity)
                self._s_a.append(sp.acceleration)
                self._s_j.append(session.plan.jerk_at(t))
                k = us // period_us
                if k != self._segment:
                    self._segment = k
                    feedback = None
                    if self.feedback_message is not None and self._parser is not None:
                        feedback = self._parser.parse(*self.feedback_message)
                        if feedback.all_valid:
                            self._valid_since = feedback_valid_since(feedback.stamp, t)
                    self._feedback = feedback
                    js = self._js
                    return SessionInputs(self._window, self._window_rx, feedback,
                                         self._valid_since, js[2], js[1], js[0])
        return None

    def decide(self, inputs: SessionInputs) -> Decision | None:
        """The session's decision on ``inputs`` (from `advance`), if it was committed."""
        d = self.session.decide(self.time, inputs)
        if d is not None:
            self.decisions.append(d)
            feedback = inputs.feedback
            self._seen.append(np.full(len(self.running.features), np.nan) if feedback is None
                              else feedback.values.copy())
        return d

    def result(self) -> ClosedLoopResult:
        """Everything recorded so far."""
        session, limits = self.session, self.limits
        times = np.array(self._s_t)
        commanded = MotionState(np.array(self._s_p), np.array(self._s_v), np.array(self._s_a))
        measured = np.array(self._m_q)
        lateral = lateral_error(measured, self.panel)
        mt = np.array(self._m_t)
        pass_start, duration = self.pass_start, self.reference.duration
        in_pass = (mt >= pass_start - 1e-9) & (mt <= pass_start + duration + 1e-9)
        summary = _summarise(session, limits, commanded, np.array(self._s_j), mt, measured,
                             lateral, in_pass, self.decisions, self.sensor)
        k = len(self.running.features)
        return ClosedLoopResult(self.seed, self.policy.card.name, self.panel, times, commanded,
                                mt, measured, np.array(self._m_true), np.array(self._r_p),
                                np.array(self._r_v), lateral, pass_start, in_pass,
                                list(self.decisions),
                                np.array(self._seen).reshape(len(self._seen), k),
                                list(session.watchdog.events), summary)


def run_closed_loop(policy: str | Path | PolicyCard | Policy, seed: int,
                    duration: float | None = None,
                    limits: JointLimits | str | Path | None = None, *,
                    settings: CellSettings | None = None, scenario: Scenario | None = None,
                    reference: ReferenceTrajectory | str | Path | None = None,
                    panel: Panel | None = None,
                    initial_positions: Sequence[float] | None = None) -> ClosedLoopResult:
    """Run the demo cell in closed loop and return what happened.

    Args:
        policy: a policy card path, a parsed `PolicyCard`, a built-in kind (``tracker``,
            ``hold``; the reference-only run is ``"tracker"``), or a built `Policy` (its
            card is checked against the run; it is not reset or test-run).
        seed: run seed: the panel placement and the sensor noise (`Scenario.placement`,
            `Scenario.sensor_seed`) and the driver's measurement noise (``seed``).
        duration: simulated time [s]; default ``start_delay`` + the reference + ``settle``.
        limits: joint limits (object or file); default ``config/demo/limits.yaml``.
        settings: cell timing and node settings (default `CellSettings()`).
        scenario: the cell (default: `load_scenario()`); ``reference``: the joint-space
            reference (object or file; default ``config/demo/reference.csv``).
        panel: the real panel (default: drawn from ``seed``).
        initial_positions: where the arm starts (default: the reference's first point).
    """
    loop = CellLoop(policy, seed, duration, limits, settings=settings, scenario=scenario,
                    reference=reference, panel=panel, initial_positions=initial_positions)
    while (inputs := loop.advance()) is not None:
        loop.decide(inputs)
    return loop.result()


def limit_usage(limits: JointLimits, commanded: MotionState, jerk: np.ndarray) -> LimitUsage:
    """Peak fractions of the velocity, acceleration and jerk limits and the position margin
    of commanded states (N, n) and jerks (N, n)."""
    p, v, a = commanded
    margin = np.minimum(p - limits.position_min, limits.position_max - p).min(axis=0)
    return LimitUsage(np.abs(v).max(axis=0) / limits.velocity_max,
                      np.abs(a).max(axis=0) / limits.acceleration_max,
                      np.abs(jerk).max(axis=0) / limits.jerk_max, margin)


def _summarise(session: StreamingSession, limits: JointLimits, commanded: MotionState,
               jerk: np.ndarray, measured_times: np.ndarray, measured: np.ndarray,
               lateral: np.ndarray, in_pass: np.ndarray, decisions: list[Decision],
               sensor: LineSensor) -> ClosedLoopSummary:
    latency = session.watchdog.config.command_latency
    follow = 0.0
    for t, q in zip(measured_times, measured):
        cmd = session.commanded_at(t - latency)
        if cmd is not None:
            follow = max(follow, float(np.max(np.abs(q - cmd.position))))
    dev = np.array([(d.deviation_max, d.deviation_norm) for d in decisions
                    if d.mode == "following" and math.isfinite(d.deviation_max)])
    dev_joint, dev_norm = (dev.max(axis=0) if dev.size else (0.0, 0.0))
    on_pass = lateral[in_pass]
    return ClosedLoopSummary(
        lateral_rms=float(np.sqrt(np.mean(on_pass ** 2))) if on_pass.size else math.nan,
        lateral_max=float(np.max(np.abs(on_pass))) if on_pass.size else math.nan,
        limit_usage=limit_usage(limits, commanded, jerk),
        deviation_joint_max=float(dev_joint), deviation_norm_max=float(dev_norm),
        following_error_max=follow,
        trips=tuple(trip.kind for trip in session.watchdog.events),
        late_decisions=session.late_decisions,
        sensor_samples=sensor.samples, sensor_out_of_range=sensor.out_of_range)

