# SPDX-License-Identifier: Apache-2.0
"""A simulated joint-space driver plant, stepped at the driver rate (ROS-free).

Per joint, one tick of period ``dt`` does, in order:

1. **Command timeout.** The plant follows commands only while the latest one is at most
   ``command_timeout`` seconds old at the tick time (and one has arrived at all). Otherwise it
   *holds*: the position freezes where it is, the velocity is zero, velocity commands are not
   integrated, and the delay line and target are reset to the held position, so that on
   resuming the lag starts from rest there. A follow -> hold change counts as one timeout.
2. **Target.** Position commands are the target directly, or, when given with a
   ``reach_in`` time (a one-point trajectory's ``time_from_start``), the target moves
   linearly from its value at receipt to the command over ``reach_in`` seconds; velocity
   commands are integrated into it (``target += v * dt`` per following tick, starting from
   the held position).
3. **Transport delay.** The target passes a delay line of ``delay_ticks`` ticks: a target
   formed at tick ``k`` drives the lag during tick ``k + delay_ticks``.
4. **Second-order lag.** ``y'' = wn^2 (u - y) - 2 zeta wn y'`` with unity DC gain, discretised
   exactly for an input held over each tick (zero-order hold; ``scipy.signal.cont2discrete``
   with ``method="zoh"``, i.e. the matrix exponential of the augmented system), so the state
   at every tick equals the continuous-time response to the piecewise-constant input.
5. **Measurement.** Position and velocity are reported with independent Gaussian noise
   (standard deviations ``position_noise``/``velocity_noise``; ``numpy.random.default_rng``
   seeded by ``seed``).

`SimPlant.step` returns the measured state at the end of the tick (and the true state for
metrics). Times are seconds of whatever clock the caller uses (ROS time in the node).
"""
from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy.signal import cont2discrete

INTERFACES = ("position", "velocity")


class PlantError(ValueError):
    """A plant setting or command is malformed (wrong length, non-finite, out of range)."""


@dataclass(frozen=True)
class PlantConfig:
    """Settings of the simulated driver (SI units: s, rad, rad/s)."""

    dt: float                       # tick period [s]
    natural_frequency: float = 60.0  # wn [rad/s]
    damping: float = 0.7            # zeta [-]
    delay_ticks: int = 2            # transport delay [ticks]
    command_timeout: float = 0.1    # hold when the latest command is older than this [s]
    position_noise: float = 2e-5    # measurement noise std [rad]
    velocity_noise: float = 2e-3    # measurement noise std [rad/s]
    interface: str = "position"     # "position" or "velocity" commands

    def __post_init__(self) -> None:
        for name in ("dt", "natural_frequency", "damping", "command_timeout"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise PlantError(f"{name}: expected a finite positive number, got {value!r}")
        for name in ("position_noise", "velocity_noise"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
                raise PlantError(f"{name}: expected a finite number >= 0, got {value!r}")
        if isinstance(self.delay_ticks, bool) or not isinstance(self.delay_ticks, int) \
                or self.delay_ticks < 0:
            raise PlantError(f"delay_ticks: expected an integer >= 0, got {self.delay_ticks!r}")
        if self.interface not in INTERFACES:
            raise PlantError(f"interface: expected one of {', '.join(INTERFACES)}, "
                             f"got {self.interface!r}")


@dataclass(frozen=True)
class PlantSample:
    """One tick's output: measured and true position/velocity (n,), and the hold flag."""

    time: float
    position: np.ndarray
    velocity: np.ndarray
    true_position: np.ndarray
    true_velocity: np.ndarray
    holding: bool


def discretise_lag(natural_frequency: float, damping: float,
                   dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact zero-order-hold discretisation (Ad 2x2, Bd 2x1) of the unity-gain 2nd-order lag.

    State ``[y, y']``; continuous model ``y'' = wn^2 (u - y) - 2 zeta wn y'``; discretised with
    ``scipy.signal.cont2discrete(..., method="zoh")``.
    """
    wn, zeta = natural_frequency, damping
    a = np.array([[0.0, 1.0], [-wn * wn, -2.0 * zeta * wn]])
    b = np.array([[0.0], [wn * wn]])
    ad, bd, _, _, _ = cont2discrete((a, b, np.eye(2), np.zeros((2, 1))), dt, method="zoh")
    return ad, bd


class SimPlant:
    """The simulated driver for ``n`` joints; see the module docstring for one tick."""

    def __init__(self, config: PlantConfig, initial_positions: Sequence[float],
                 seed: int = 0) -> None:
        q0 = np.asarray(initial_positions, dtype=float)
        if q0.ndim != 1 or q0.size == 0 or not np.all(np.isfinite(q0)):
            raise PlantError("initial_positions: expected a non-empty list of finite numbers, "
                             f"got {list(np.atleast_1d(q0))}")
        self.config = config
        self.n = q0.size
        self._ad, bd = discretise_lag(config.natural_frequency, config.damping, config.dt)
        self._bd = bd[:, 0]
        self._rng = np.random.default_rng(seed)
        self._y = q0.copy()
        self._ydot = np.zeros(self.n)
        self._target = q0.copy()
        self._delay: deque[np.ndarray] = deque()
        self._reset_delay_line()
        self._command = np.zeros(self.n)
        self._command_time: float | None = None
        self._ramp_start = q0.copy()
        self._reach_in = 0.0
        self._following = False
        self.commands_received = 0
        self.timeouts = 0

    # ------------------------------------------------------------------ commands
    def command(self, values: Sequence[float], t: float, reach_in: float = 0.0) -> None:
        """Take a command (positions or velocities per the configured interface) at time ``t``.

        ``reach_in`` [s] (position interface only): reach the commanded positions linearly
        over this time from the current target instead of at once.
        """
        cmd = np.asarray(values, dtype=float)
        kind = self.config.interface
        if cmd.shape != (self.n,):
            raise PlantError(f"{kind} command: expected {self.n} values, got {cmd.size}")
        if not np.all(np.isfinite(cmd)):
            raise PlantError(f"{kind} command: values must be finite, got {cmd.tolist()}")
        if not (math.isfinite(reach_in) and reach_in >= 0.0):
            raise PlantError(f"{kind} command: reach_in must be finite and >= 0, got {reach_in}")
        if reach_in > 0.0 and kind != "position":
            raise PlantError("reach_in applies to position commands only")
        self._ramp_start = self._target.copy()
        self._command = cmd.copy()
        self._command_time = float(t)
        self._reach_in = float(reach_in)
        self.commands_received += 1

    def forget_commands(self) -> None:
        """Drop the latest command (e.g. after the clock jumped back); the plant then holds."""
        self._command_time = None

    # ------------------------------------------------------------------ state
    @property
    def following(self) -> bool:
        """True while the last tick followed a fresh command, False while holding."""
        return self._following

    @property
    def target(self) -> np.ndarray:
        """The position target formed at the last tick (n,), before the transport delay: the
        command the plant follows, or the held position while holding."""
        return self._target.copy()

    @property
    def true_position(self) -> np.ndarray:
        """The noise-free position (n,) after the last tick."""
        return self._y.copy()

    def step(self, t: float) -> PlantSample:
        """Advance one tick ending at time ``t`` and return the measured and true state."""
        cfg = self.config
        fresh = self._command_time is not None and t - self._command_time <= cfg.command_timeout
        if not fresh:
            if self._following:
                self.timeouts += 1
            self._following = False
            self._ydot[:] = 0.0
            self._target = self._y.copy()
            self._reset_delay_line()
        else:
            self._following = True
            if cfg.interface == "position":
                share = (1.0 if self._reach_in == 0.0
                         else max((t - self._command_time) / self._reach_in, 0.0))
                self._target = (self._command.copy() if share >= 1.0 else
                                self._ramp_start + share * (self._command - self._ramp_start))
            else:
                self._target = self._target + self._command * cfg.dt
            self._delay.append(self._target.copy())
            u = self._delay.popleft()
            ad, bd = self._ad, self._bd
            y = ad[0, 0] * self._y + ad[0, 1] * self._ydot + bd[0] * u
            ydot = ad[1, 0] * self._y + ad[1, 1] * self._ydot + bd[1] * u
            self._y, self._ydot = y, ydot
        pos = self._y + (self._rng.normal(0.0, cfg.position_noise, self.n)
                         if cfg.position_noise > 0 else 0.0)
        vel = self._ydot + (self._rng.normal(0.0, cfg.velocity_noise, self.n)
                            if cfg.velocity_noise > 0 else 0.0)
        return PlantSample(float(t), pos, vel, self._y.copy(), self._ydot.copy(),
                           not self._following)

    def _reset_delay_line(self) -> None:
        self._delay.clear()
        for _ in range(self.config.delay_ticks):
            self._delay.append(self._y.copy())
