# SPDX-License-Identifier: Apache-2.0
"""The plug-in point of the training environment: what it steps, one decision at a time.

A *cell* is a plant, its sensors and the reference around one core `StreamingSession`
(the code the live adapter and the replay run). The environment only needs the
`DecisionCell` protocol:

* ``session``: the `StreamingSession` deciding (its ``cycle`` holds the planned state);
* ``advance()``: run the plant up to the next decision instant and return that decision's
  `SessionInputs`, or None when the run is over;
* ``decide(inputs)``: let the session decide on them (returns the committed `Decision`);
* ``feedback_message``: the latest feedback message ``(names, values, stamp)`` (or None),
  from which the reward's task feature is read.

Two cells are provided:

* `demo_cell_factory`: the demo cell (`adaptive_streamer.sim.closed_loop.CellLoop`: the
  simulated driver, line sensor, sensor bridge and reference server on one microsecond
  grid, exactly as `run_closed_loop` runs them);
* `PlantCell`: your own plant and sensor model. Write a small class with the `PlantModel`
  methods (``reset``, ``step``, ``feedback``) and pass
  ``plant_cell_factory(MyPlant(), reference, limits)`` to the environment; the session is
  stepped at the stream rate, the reference is published every decision period.

A factory is ``factory(policy, seed) -> DecisionCell``; the environment calls it on every
reset with its own action-taking policy.
"""
from __future__ import annotations

from typing import Callable, Protocol

import numpy as np

from ..core.cycle import CycleConfig, Decision
from ..core.feedback import FeedbackParser
from ..core.limits import JointLimits
from ..core.playback import Playback
from ..core.policies.base import Policy, RunningConfig
from ..core.reference import ReferenceTrajectory
from ..core.segment import MotionState
from ..core.session import SessionInputs, StreamingSession, feedback_valid_since
from ..sim.closed_loop import CellLoop, CellSettings, approach_policy

FeedbackMessage = tuple[tuple[str, ...], np.ndarray, float]


class CellError(ValueError):
    """A plant model gave malformed values (wrong size, non-finite)."""


class DecisionCell(Protocol):
    """What the environment steps (see the module docstring)."""

    session: StreamingSession
    feedback_message: FeedbackMessage | None

    def advance(self) -> SessionInputs | None:
        """Run up to the next decision instant; its inputs, or None when the run is over."""

    def decide(self, inputs: SessionInputs) -> Decision | None:
        """The session's decision on ``inputs`` (None when not committed)."""


CellFactory = Callable[[Policy, int], DecisionCell]


def demo_cell_factory(settings: CellSettings | None = None,
                      limits: JointLimits | str | None = None,
                      duration: float | None = None) -> CellFactory:
    """Factory of the demo cell (`CellLoop`) with these settings; ``seed`` draws the panel
    placement and the sensor and driver noise, as in `run_closed_loop`."""
    def make(policy: Policy, seed: int) -> DecisionCell:
        return CellLoop(policy, seed, duration, limits, settings=settings)
    return make


class PlantModel(Protocol):
    """Your plant and sensors, stepped once per stream tick by `PlantCell`.

    ``reset(seed)`` starts an episode and returns the measured joint positions at t = 0;
    ``step(t, command)`` applies the commanded setpoint (a `MotionState` of (n,) arrays)
    sampled at time ``t`` and returns the measured positions at ``t``;
    ``feedback(t)`` returns the latest sensor message ``(names, values, stamp)`` or None.
    """

    def reset(self, seed: int) -> np.ndarray:
        """Start an episode; measured joint positions at t = 0."""

    def step(self, t: float, command: MotionState) -> np.ndarray:
        """Apply the setpoint sampled at ``t``; measured joint positions at ``t``."""

    def feedback(self, t: float) -> FeedbackMessage | None:
        """The latest feedback message at ``t``, or None."""


class PlantCell:
    """A user `PlantModel` around a `StreamingSession` (a `DecisionCell`).

    At every stream tick (``settings.stream_rate``): the session samples the plan, the
    plant steps with the setpoint, and when the tick enters a new decision period the
    reference window is refreshed and the decision inputs are returned. Runs until
    ``duration`` (default: the reference plus ``settings.settle``).
    """

    def __init__(self, model: PlantModel, policy: Policy, seed: int,
                 reference: ReferenceTrajectory, limits: JointLimits,
                 settings: CellSettings | None = None, duration: float | None = None) -> None:
        cfg = self.settings = settings or CellSettings()
        self.model = model
        n = len(limits)
        period = cfg.decision_period
        features = policy.card.feedback_features
        running = RunningConfig(limits.names, period, limits, cfg.horizon, features)
        self.session = StreamingSession(
            limits, period, policy, approach_policy(running, cfg.approach_bandwidth),
            CycleConfig(horizon=cfg.horizon, approach_scale=cfg.approach_scale,
                        approach_tolerance=cfg.approach_tolerance,
                        approach_bandwidth=cfg.approach_bandwidth),
            cfg.watchdog)
        self.playback = Playback(reference, period, cfg.window_points, override=1.0,
                                 ramp_time=cfg.override_ramp_time)
        self.playback.start(0.0)
        self._parser = FeedbackParser(features) if features else None
        self._steps_per_period = max(1, int(round(cfg.stream_rate * period)))
        self._dt = period / self._steps_per_period
        total = duration if duration is not None else reference.duration + cfg.settle
        self._end = int(round(total / self._dt))
        q0 = self._positions(model.reset(seed), n, "reset")
        self._q = q0
        self._k = 0
        self._valid_since: float | None = None
        self.feedback_message: FeedbackMessage | None = None
        self.session.begin(0.0, MotionState(q0, np.zeros(n), np.zeros(n)))

    @staticmethod
    def _positions(q: np.ndarray, n: int, what: str) -> np.ndarray:
        q = np.asarray(q, float)
        if q.shape != (n,) or not np.all(np.isfinite(q)):
            raise CellError(f"plant model {what}(): expected {n} finite joint positions, "
                            f"got shape {q.shape}")
        return q

    def advance(self) -> SessionInputs | None:
        """Stream ticks up to the next decision instant; its inputs (None at the end)."""
        n = len(self.session.limits)
        while self._k < self._end:
            self._k += 1
            t = self._k * self._dt
            sp, _ = self.session.sample(t)
            self._q = self._positions(self.model.step(t, sp), n, "step")
            self.feedback_message = self.model.feedback(t)
            if self._k % self._steps_per_period == 0:
                feedback = None
                if self.feedback_message is not None and self._parser is not None:
                    feedback = self._parser.parse(*self.feedback_message)
                    if feedback.all_valid:
                        self._valid_since = feedback_valid_since(feedback.stamp, t)
                window = self.playback.window(t)
                return SessionInputs(window, t, feedback, self._valid_since, self._q, t, t)
        return None

    def decide(self, inputs: SessionInputs) -> Decision | None:
        """The session's decision on ``inputs``."""
        return self.session.decide(inputs.window_received, inputs)


def plant_cell_factory(model: PlantModel, reference: ReferenceTrajectory, limits: JointLimits,
                       settings: CellSettings | None = None,
                       duration: float | None = None) -> CellFactory:
    """Factory of `PlantCell` around ``model`` (the same model object, reset per episode)."""
    def make(policy: Policy, seed: int) -> DecisionCell:
        return PlantCell(model, policy, seed, reference, limits, settings, duration)
    return make


__all__ = ["CellError", "CellFactory", "DecisionCell", "FeedbackMessage", "PlantCell",
           "PlantModel", "demo_cell_factory", "plant_cell_factory"]
