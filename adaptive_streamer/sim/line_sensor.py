# SPDX-License-Identifier: Apache-2.0
"""A line sensor at the nozzle: lateral edge offset and edge angle, noisy, late, ranged.

The sensor head is fixed to the nozzle. Its *travel axis* is the nozzle frame's x axis
projected onto the table plane (the nominal pass moves along it). A sample taken at time
``t`` reports, for the nozzle pose at ``t``:

- ``offset`` [m]: the nozzle's lateral offset from the real edge (`Panel.lateral_offset`:
  positive when the nozzle is on the left of the edge, looking along the edge direction),
  plus Gaussian noise of standard deviation ``offset_noise``;
- ``angle`` [rad]: the edge angle relative to the travel axis (`Panel.edge_angle`), plus
  Gaussian noise of standard deviation ``angle_noise``.

A sample is *out of range* (no reading: NaN in both fields) when the true offset exceeds
``range`` in magnitude or the nozzle is not over the edge segment (its projection along the
edge falls outside ``[0, length]``). Noise is drawn for every sample, so the noise sequence
does not depend on which samples were in range.

Latency: a sample keeps the stamp ``t`` of the pose it measured (the time the reading
represents) and is delivered ``latency`` seconds later — `LineSensor.due` hands out the
samples whose ``t + latency`` has passed. The owner calls `LineSensor.sample` at ``rate``.
"""
from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

import numpy as np

from .arm import ArmKinematics
from .panel import Panel

DELIVERY_SLACK = 1e-6  # s; float tolerance when comparing t + latency with the clock


class SensorError(ValueError):
    """Line-sensor settings are malformed."""


@dataclass(frozen=True)
class SensorConfig:
    """Line-sensor settings (SI: Hz, s, m, rad)."""

    rate: float = 100.0
    latency: float = 0.030
    offset_noise: float = 0.2e-3
    angle_noise: float = math.radians(0.1)
    range: float = 15e-3

    def __post_init__(self) -> None:
        for name in ("rate", "range"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise SensorError(f"sensor {name}: expected a finite positive number, "
                                  f"got {value!r}")
        for name in ("latency", "offset_noise", "angle_noise"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise SensorError(f"sensor {name}: expected a finite number >= 0, "
                                  f"got {value!r}")


@dataclass(frozen=True)
class Reading:
    """One sensor sample: ``stamp`` (the time it represents), offset [m], angle [rad]."""

    stamp: float
    offset: float
    angle: float

    @property
    def valid(self) -> bool:
        """False for an out-of-range sample (NaN fields)."""
        return math.isfinite(self.offset) and math.isfinite(self.angle)


def true_edge_reading(arm: ArmKinematics, panel: Panel,
                      joint_positions: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Noise-free (offset [m], angle [rad], along-edge [m]) for joint positions (N, n) or (n,).

    The nozzle pose comes from ``arm.forward``; each output has shape (N,).
    """
    pose = arm.forward(np.atleast_2d(np.asarray(joint_positions, dtype=float)))
    points = pose[:, :3, 3]
    travel = pose[:, :3, 0]
    return panel.lateral_offset(points), panel.edge_angle(travel), panel.along_edge(points)


class LineSensor:
    """Adds noise, range and latency to true edge readings; see the module docstring."""

    def __init__(self, config: SensorConfig, length: float, seed: int) -> None:
        self.config = config
        self._length = float(length)
        self._rng = np.random.default_rng(seed)
        self._pending: deque[Reading] = deque()
        self.samples = 0
        self.out_of_range = 0
        self.delivered = 0

    def sample(self, t: float, offset: float, angle: float, along: float) -> Reading:
        """Take a sample of the true values at time ``t`` and queue it for delivery."""
        cfg = self.config
        noise = self._rng.normal(0.0, 1.0, 2) * (cfg.offset_noise, cfg.angle_noise)
        self.samples += 1
        if abs(offset) > cfg.range or not 0.0 <= along <= self._length:
            reading = Reading(float(t), math.nan, math.nan)
            self.out_of_range += 1
        else:
            reading = Reading(float(t), float(offset + noise[0]), float(angle + noise[1]))
        self._pending.append(reading)
        return reading

    def due(self, now: float) -> list[Reading]:
        """Pop the queued readings whose delivery time ``stamp + latency`` is <= ``now``."""
        out: list[Reading] = []
        limit = now - self.config.latency + DELIVERY_SLACK
        while self._pending and self._pending[0].stamp <= limit:
            out.append(self._pending.popleft())
        self.delivered += len(out)
        return out

    def clear(self) -> None:
        """Drop queued readings (e.g. after the clock jumped back)."""
        self._pending.clear()
