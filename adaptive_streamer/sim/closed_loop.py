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

`run_closed_loop` returns a `ClosedLoopResult` (arrays and a `ClosedLoopSummary`).
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
from ..core.feedback import FeatureTable, FeedbackParser, FilterSpec, InputSpec, Verdict
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
    cfg = settings or CellSettings()
    scenario = scenario or load_scenario()
    if limits is None or isinstance(limits, (str, Path)):
        limits = JointLimits.from_file(limits or demo_file("limits.yaml"))
    if reference is None or isinstance(reference, (str, Path)):
        reference = load_reference_file(reference or demo_file("reference.csv"), limits=limits)
    reference, _, _ = ensure_feasible(reference, limits, slow_down=cfg.slow_down,
                                      fraction=cfg.limit_fraction)
    if reference.names != limits.names:
        raise ClosedLoopError(f"reference joints {list(reference.names)} differ from the "
                              f"limits' joints {list(limits.names)}")
    panel = panel or scenario.panel(seed)
    period = cfg.decision_period
    period_us = _ticks(period, "decision_period")
    stream_us = _ticks(1.0 / cfg.stream_rate, "stream period (1 / stream_rate)")
    driver_us = _ticks(1.0 / cfg.driver_rate, "driver period (1 / driver_rate)")
    sensor_us = _ticks(1.0 / scenario.sensor.rate, "sensor period (1 / sensor rate)")
    if not 0.0 <= cfg.window_phase < 1.0:
        raise ClosedLoopError(f"window_phase must be in [0, 1) periods, got {cfg.window_phase}")
    window_phase_us = int(round(cfg.window_phase * period_us))
    stale_us = _ticks(round(min(max(cfg.edge_max_age / 4.0, 0.01), 0.25), 6),
                      "bridge staleness check")
    if duration is None:
        duration = cfg.start_delay + reference.duration + cfg.settle
    end_us = int(round(duration * _US))

    base = RunningConfig(limits.names, period, limits, cfg.horizon, EDGE_FEATURES)
    pol, running = _policy(policy, base)
    session = StreamingSession(
        limits, period, pol, approach_policy(running, cfg.approach_bandwidth),
        CycleConfig(horizon=cfg.horizon, approach_scale=cfg.approach_scale,
                    approach_tolerance=cfg.approach_tolerance,
                    approach_bandwidth=cfg.approach_bandwidth),
        cfg.watchdog)
    playback = Playback(reference, period, cfg.window_points, override=1.0,
                        ramp_time=cfg.override_ramp_time)
    q0 = (np.asarray(initial_positions, float) if initial_positions is not None
          else reference.positions[0].copy())
    plant = SimPlant(replace(cfg.plant, dt=driver_us / _US), q0, seed=seed)
    sensor = LineSensor(scenario.sensor, panel.length, scenario.sensor_seed(seed))
    table = FeatureTable([InputSpec("edge", EDGE_FEATURES, (1.0, 1.0), (0.0, 0.0),
                                    cfg.edge_max_age, cfg.edge_filter)])
    parser = FeedbackParser(running.features) if running.features else None

    n = len(limits)
    first = plant.step(0.0)
    session.begin(0.0, MotionState(first.position, np.zeros(n), np.zeros(n)))
    js = (0.0, 0.0, first.position)          # (received, stamp, positions)
    sampled_stamp: float | None = None
    window_rx = (window_phase_us - period_us) / _US   # the server was up before the adapter
    window = playback.window(window_rx)
    fb_msg: tuple[tuple[str, ...], np.ndarray, float] | None = None
    valid_since: float | None = None
    last_fresh = table.fresh(0.0)
    pass_start = math.nan
    segment = -1

    m_t, m_q, m_true, r_p, r_v = [], [], [], [], []
    s_t, s_p, s_v, s_a, s_j = [], [], [], [], []
    decisions: list[Decision] = []
    seen: list[np.ndarray] = []

    def record_driver(t: float, sample_pos: np.ndarray, true_pos: np.ndarray) -> None:
        m_t.append(t)
        m_q.append(sample_pos)
        m_true.append(true_pos)
        ref = align(window, np.array([t]))
        r_p.append(ref.positions[0])
        r_v.append(ref.velocities[0])

    def publish_feedback(now: float) -> None:
        nonlocal fb_msg, last_fresh
        snap = table.snapshot(now)
        fb_msg = (snap.names, snap.values, snap.stamp if snap.stamp is not None else 0.0)
        last_fresh = snap.fresh

    record_driver(0.0, first.position, first.true_position)
    step_us = math.gcd(math.gcd(stream_us, driver_us), math.gcd(sensor_us, period_us))
    step_us = math.gcd(math.gcd(step_us, stale_us), window_phase_us or step_us)
    for us in range(step_us, end_us + 1, step_us):
        t = us / _US
        if us % driver_us == 0:
            smp = plant.step(t)
            js = (t, t, smp.position)
            record_driver(t, smp.position, smp.true_position)
        if us % sensor_us == 0:
            if js[1] != sampled_stamp:
                offset, angle, along = true_edge_reading(DEMO_ARM, panel, js[2])
                sensor.sample(js[1], offset[0], angle[0], along[0])
                sampled_stamp = js[1]
            for reading in sensor.due(t):
                if reading.valid and table.update(0, (reading.offset, reading.angle),
                                                  reading.stamp, t) is Verdict.ACCEPTED:
                    publish_feedback(t)
        if us % stale_us == 0 and not np.array_equal(table.fresh(t), last_fresh):
            publish_feedback(t)
        if (us - window_phase_us) % period_us == 0:
            if math.isnan(pass_start) and t >= cfg.start_delay - 1e-9:
                playback.start(t)
                pass_start = t
            window, window_rx = playback.window(t), t
        if us % stream_us == 0:
            sp, _ = session.sample(t)
            plant.command(sp.position, t)
            s_t.append(t)
            s_p.append(sp.position)
            s_v.append(sp.velocity)
            s_a.append(sp.acceleration)
            s_j.append(session.plan.jerk_at(t))
            k = us // period_us
            if k != segment:
                segment = k
                feedback = None
                if fb_msg is not None and parser is not None:
                    feedback = parser.parse(*fb_msg)
                    if feedback.all_valid:
                        valid_since = feedback_valid_since(feedback.stamp, t)
                inputs = SessionInputs(window, window_rx, feedback, valid_since,
                                       js[2], js[1], js[0])
                d = session.decide(t, inputs)
                if d is not None:
                    decisions.append(d)
                    seen.append(np.full(len(running.features), np.nan) if feedback is None
                                else feedback.values.copy())

    times = np.array(s_t)
    commanded = MotionState(np.array(s_p), np.array(s_v), np.array(s_a))
    measured = np.array(m_q)
    ref_v = np.array(r_v)
    lateral = lateral_error(measured, panel)
    mt = np.array(m_t)
    in_pass = (mt >= pass_start - 1e-9) & (mt <= pass_start + reference.duration + 1e-9)
    summary = _summarise(session, limits, commanded, np.array(s_j), mt, measured, lateral,
                         in_pass, decisions, sensor)
    return ClosedLoopResult(seed, pol.card.name, panel, times, commanded, mt, measured,
                            np.array(m_true), np.array(r_p), ref_v, lateral, pass_start,
                            in_pass, decisions,
                            np.array(seen).reshape(len(seen), len(running.features)),
                            list(session.watchdog.events), summary)


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

