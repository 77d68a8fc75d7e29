# SPDX-License-Identifier: Apache-2.0
"""Playback of a reference on the real timeline: progress, speed override, pause/resume and
the upcoming window of H points spaced by the decision period.

The playback maps real time t to reference time tau with d tau / dt = s(t), where s is the
ramped speed override (`adaptive_streamer.core.override.OverrideRamp`). Window points are
given on the real timeline (chain rule, with q_ref the reference):

    p = q_ref(tau),   v = s q_ref'(tau),   a = s^2 q_ref''(tau) + s_dot q_ref'(tau)

States: ``waiting`` (before start; s = 0, the window holds the first point), ``running``,
``pausing`` (s ramping to 0; the reference keeps advancing along the ramp), ``paused``
(s held at 0), ``finished`` (end mode ``hold``: the reference time reached the end; the
window holds the final point at rest). Start and resume ramp s up to the override
setting; pause ramps it to 0; a new override while running ramps to it.

End modes: ``hold`` needs a reference that ends at rest (``ends='rest'``); ``loop`` wraps
reference time and refuses (does not blend) a reference whose last point differs from its
first, so a loop is continuous in position, velocity and acceleration.

Everything is deterministic given the call times, which must not decrease.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .override import OverrideError, OverrideRamp
from .reference import LOOP_TOLERANCE, ReferenceTrajectory

MIN_OVERRIDE = 0.05
MAX_OVERRIDE = 1.0
END_MODES = ("hold", "loop")
STATES = ("waiting", "running", "pausing", "paused", "finished")


class PlaybackError(ValueError):
    """A playback setting or request is refused (the message says why)."""


class Window(NamedTuple):
    """The next H reference points: ``times`` (H,) are offsets from ``stamp`` [s]; the
    positions, velocities and accelerations are (H, n) on the real timeline."""

    stamp: float
    times: np.ndarray
    positions: np.ndarray
    velocities: np.ndarray
    accelerations: np.ndarray
    names: tuple[str, ...]


@dataclass(frozen=True)
class PlaybackStatus:
    """Progress at the last time the playback saw."""

    state: str
    time: float             # the last call time [s]
    reference_time: float   # position along the reference [s], within [0, duration]
    progress: float         # reference_time / duration (within the current lap when looping)
    laps: int               # completed laps (loop mode)
    override: float         # s now
    override_target: float  # the speed-override setting
    duration: float         # reference duration at override 1 [s]


def validate_override(value: float) -> float:
    """The override as float, or `PlaybackError` when outside [MIN_OVERRIDE, MAX_OVERRIDE]."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise PlaybackError(f"speed override must be a number, got {value!r}") from None
    if not (np.isfinite(x) and MIN_OVERRIDE <= x <= MAX_OVERRIDE):
        raise PlaybackError(f"speed override must be in [{MIN_OVERRIDE}, {MAX_OVERRIDE}], got "
                            f"{value}")
    return x


class Playback:
    """Progress along ``reference`` and the windows it produces (plain numpy arrays)."""

    def __init__(self, reference: ReferenceTrajectory, period: float, horizon: int,
                 end_mode: str = "hold", override: float = 1.0, ramp_time: float = 1.0) -> None:
        if not (np.isfinite(period) and period > 0.0):
            raise PlaybackError(f"decision period must be positive and finite, got {period}")
        if int(horizon) != horizon or horizon < 1:
            raise PlaybackError(f"horizon must be a positive integer, got {horizon}")
        if end_mode not in END_MODES:
            raise PlaybackError(f"end mode must be one of {list(END_MODES)}, got {end_mode!r}")
        if end_mode == "hold" and reference.ends != "rest":
            raise PlaybackError("end mode 'hold' needs a reference that ends at rest "
                                f"(ends='rest'), got ends={reference.ends!r}")
        if end_mode == "loop":
            gap = np.abs(reference.positions[-1] - reference.positions[0])
            if np.any(gap > LOOP_TOLERANCE):
                j = int(np.argmax(gap))
                raise PlaybackError(
                    f"end mode 'loop' needs the last point to equal the first (loop refuses, it "
                    f"does not blend); joint '{reference.names[j]}' starts at "
                    f"{reference.positions[0, j]:.9g} and ends at {reference.positions[-1, j]:.9g}")
        self.reference = reference
        self.period = float(period)
        self.horizon = int(horizon)
        self.end_mode = end_mode
        self._override = validate_override(override)
        try:
            self._ramp = OverrideRamp(0.0, ramp_time)
        except OverrideError as exc:
            raise PlaybackError(str(exc)) from None
        self._offsets = np.arange(self.horizon) * self.period
        self._t: float | None = None
        self._tau = 0.0
        self._started = False
        self._paused = False
        self._finished = False

    # ------------------------------------------------------------------ state
    @property
    def state(self) -> str:
        """One of `STATES`, at the last time seen."""
        if not self._started:
            return "waiting"
        if self._finished:
            return "finished"
        if self._paused:
            return "paused" if self._t is not None and self._ramp.settled(self._t) else "pausing"
        return "running"

    @property
    def override(self) -> float:
        """The speed-override setting (the level s ramps to while running)."""
        return self._override

    def status(self) -> PlaybackStatus:
        """Progress at the last call time (nothing advances)."""
        t = self._t if self._t is not None else 0.0
        dur = self.reference.duration
        if self.end_mode == "loop":
            laps, ref_t = int(self._tau // dur), float(self._tau % dur)
        else:
            laps, ref_t = 0, float(min(self._tau, dur))
        return PlaybackStatus(self.state, t, ref_t, ref_t / dur, laps,
                              float(self._ramp.value(t)), self._override, dur)

    def _advance(self, t: float) -> None:
        t = float(t)
        if not np.isfinite(t):
            raise PlaybackError(f"time must be finite, got {t}")
        if self._t is not None:
            if t < self._t:
                raise PlaybackError(f"time went backwards: {t:.9f} s after {self._t:.9f} s "
                                    "(clock reset?)")
            self._tau += float(self._ramp.integral(self._t, t))
        self._t = t
        self._ramp.fold(t)
        if self.end_mode == "hold" and self._tau >= self.reference.duration:
            self._finished = True

    # ------------------------------------------------------------------ requests
    def start(self, t: float) -> str:
        """Start at time ``t`` (ramp s from 0 to the override). Refused unless waiting."""
        self._advance(t)
        if self._started:
            raise PlaybackError(f"already started (state: {self.state})")
        self._started = True
        self._ramp.set_target(self._override, t)
        return f"started; speed override ramps to {self._override:g}"

    def pause(self, t: float) -> str:
        """Ramp s to 0 from time ``t`` and hold it there. Refused unless running."""
        self._advance(t)
        if self.state != "running":
            raise PlaybackError(f"cannot pause: not running (state: {self.state})")
        self._paused = True
        self._ramp.set_target(0.0, t)
        return "pausing; speed override ramps to 0"

    def resume(self, t: float) -> str:
        """Ramp s back to the override from time ``t``. Refused unless pausing or paused."""
        self._advance(t)
        if self.state not in ("pausing", "paused"):
            raise PlaybackError(f"cannot resume: not paused (state: {self.state})")
        self._paused = False
        self._ramp.set_target(self._override, t)
        return f"resuming; speed override ramps to {self._override:g}"

    def set_override(self, value: float, t: float) -> str:
        """Change the override setting at time ``t``; while running, s ramps to it."""
        x = validate_override(value)
        self._advance(t)
        self._override = x
        if self.state == "running":
            self._ramp.set_target(x, t)
            return f"speed override ramps to {x:g}"
        return f"speed override set to {x:g} (applies when running; state: {self.state})"

    # ------------------------------------------------------------------ output
    def window(self, t: float) -> Window:
        """The H points from time ``t`` on, spaced by the period (advances the playback to t)."""
        self._advance(t)
        times = t + self._offsets
        s = self._ramp.value(times)
        s_dot = self._ramp.rate(times)
        tau = self._tau + self._ramp.integral(t, times)
        dur = self.reference.duration
        ref_t = np.mod(tau, dur) if self.end_mode == "loop" else np.minimum(tau, dur)
        p, v_ref, a_ref = self.reference.sample(ref_t)
        if self.end_mode == "hold":
            past = tau >= dur
            v_ref[past] = 0.0
            a_ref[past] = 0.0
        vel = s[:, None] * v_ref
        acc = (s * s)[:, None] * a_ref + s_dot[:, None] * v_ref
        return Window(float(t), self._offsets.copy(), p, vel, acc, self.reference.names)
