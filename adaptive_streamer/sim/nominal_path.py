# SPDX-License-Identifier: Apache-2.0
"""The nominal pass: a straight nozzle path along the nominal edge, timed rest to rest.

The nozzle moves from ``start`` to ``end`` (table-plane points, base frame) at a constant
height ``nozzle_height`` above the panel top, with a constant orientation: nozzle z axis
pointing down (-z), x axis along the travel direction (the line sensor's travel axis).

Timing of the path distance ``s(t)`` (length ``L``), symmetric about the middle:
rest for ``dwell``; speed ramp from 0 to ``cruise_speed`` ``V`` over ``ramp_time`` ``Tr``
with the quintic smoothstep ``v = V (10 tau^3 - 15 tau^4 + 6 tau^5)``, ``tau = t / Tr``
(zero acceleration and jerk at both ends of the ramp, so jerk is continuous); cruise at
``V``; the mirror-image ramp down; rest for ``dwell``. The ramp covers ``V Tr / 2``.

`nominal_joint_path` solves the arm's inverse kinematics for the nozzle poses at given times.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .arm import ArmKinematics, KinematicsError


class PathError(ValueError):
    """Pass settings are malformed or inconsistent (e.g. ramps longer than the pass)."""


@dataclass(frozen=True, eq=False)
class PassConfig:
    """Nominal pass settings (SI: m, m/s, s; ``ik_seed`` in rad)."""

    start: np.ndarray
    end: np.ndarray
    nozzle_height: float
    cruise_speed: float
    ramp_time: float
    dwell: float
    sample_period: float
    ik_seed: np.ndarray

    def __post_init__(self) -> None:
        for name, shape in (("start", (2,)), ("end", (2,)), ("ik_seed", None)):
            arr = np.asarray(getattr(self, name), dtype=float)
            if (shape is not None and arr.shape != shape) or arr.ndim != 1 \
                    or not np.all(np.isfinite(arr)):
                raise PathError(f"pass {name}: expected finite values"
                                + (" [x, y]" if shape else " (one per joint)")
                                + f", got {getattr(self, name)!r}")
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        for name in ("cruise_speed", "ramp_time", "sample_period"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise PathError(f"pass {name}: expected a finite positive number, got {value!r}")
        for name in ("nozzle_height", "dwell"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise PathError(f"pass {name}: expected a finite number >= 0, got {value!r}")
        if self.length <= 0:
            raise PathError("pass: start and end must differ")
        if self.cruise_speed * self.ramp_time > self.length:
            raise PathError(f"pass: the two speed ramps cover {self.cruise_speed * self.ramp_time:g}"
                            f" m, more than the pass length {self.length:g} m; lower "
                            "cruise_speed or ramp_time")

    @property
    def length(self) -> float:
        """Pass length [m]."""
        return float(np.linalg.norm(self.end - self.start))

    @property
    def direction(self) -> np.ndarray:
        """Unit travel direction in the table plane (2,)."""
        return (self.end - self.start) / self.length

    @property
    def duration(self) -> float:
        """Total time [s]: dwell, ramp, cruise, ramp, dwell."""
        cruise = (self.length - self.cruise_speed * self.ramp_time) / self.cruise_speed
        return 2.0 * (self.dwell + self.ramp_time) + cruise


def path_distance(cfg: PassConfig, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Path distance s(t) [m] and speed s'(t) [m/s] for times t (clipped to the pass)."""
    t = np.clip(np.asarray(t, dtype=float), 0.0, cfg.duration)
    first = t <= cfg.duration / 2.0
    tf = np.where(first, t, cfg.duration - t)            # mirror the second half
    v, tr = cfg.cruise_speed, cfg.ramp_time
    tau = np.clip((tf - cfg.dwell) / tr, 0.0, 1.0)
    ramp_s = v * tr * (2.5 * tau ** 4 - 3.0 * tau ** 5 + tau ** 6)
    ramp_v = v * (10 * tau ** 3 - 15 * tau ** 4 + 6 * tau ** 5)
    cruise_t = np.maximum(tf - cfg.dwell - tr, 0.0)
    s_half = ramp_s + v * cruise_t
    return np.where(first, s_half, cfg.length - s_half), ramp_v


def nozzle_poses(cfg: PassConfig, panel_top: float, s: np.ndarray) -> np.ndarray:
    """Nozzle poses (N, 4, 4) at path distances s (N,): down-pointing, x along travel."""
    s = np.atleast_1d(np.asarray(s, dtype=float))
    d = cfg.direction
    pose = np.zeros((s.size, 4, 4))
    pose[:, :3, 0] = (d[0], d[1], 0.0)          # x: travel
    pose[:, :3, 1] = (d[1], -d[0], 0.0)         # y = z x x
    pose[:, :3, 2] = (0.0, 0.0, -1.0)           # z: down
    pose[:, :2, 3] = cfg.start + s[:, None] * d
    pose[:, 2, 3] = panel_top + cfg.nozzle_height
    pose[:, 3, 3] = 1.0
    return pose


def nominal_joint_path(cfg: PassConfig, arm: ArmKinematics, panel_top: float,
                       times: np.ndarray, tolerance: float = 1e-12) -> np.ndarray:
    """Joint positions (N, n) placing the nozzle on the nominal pass at ``times`` (N,).

    The first pose is solved from ``cfg.ik_seed``; all poses are then solved from that
    solution (one batch). Raises `PathError` if consecutive solutions jump by more than
    0.1 rad (the solver switched branch) or the IK fails.
    """
    s, _ = path_distance(cfg, times)
    poses = nozzle_poses(cfg, panel_top, s)
    try:
        q_first = arm.inverse(poses[0], cfg.ik_seed, tolerance=tolerance)
        q = arm.inverse(poses, q_first, tolerance=tolerance)
    except KinematicsError as exc:
        raise PathError(f"nominal pass: {exc}") from None
    if len(q) > 1:
        jump = np.abs(np.diff(q, axis=0)).max()
        if jump > 0.1:
            raise PathError(f"nominal pass: IK solutions jump by {jump:.3g} rad between "
                            "samples (branch switch); shorten sample_period or move ik_seed")
    return q
