# SPDX-License-Identifier: Apache-2.0
"""The demo panel: a flat plate on a table whose processed edge is a straight segment.

Everything is in the arm base frame, in the table plane (x, y; the table normal is +z).
The *nominal* edge runs from ``nominal_start`` to ``nominal_end``. The *real* panel is the
nominal one rotated by ``angle`` [rad, counter-clockwise about +z] about the panel
``centre`` and then shifted by ``offset`` [m] along the nominal edge's left normal
``n = z x d`` (``d`` the unit direction start -> end).

Signed quantities (used by the line sensor and the task metric):

- lateral offset of a point: ``(p - real_start) . n_real`` [m], the perpendicular distance
  from the real edge line, positive on the left of the real edge (looking along ``d``);
- edge angle relative to a direction ``u``: the angle [rad] from ``u`` to the real edge
  direction, counter-clockwise about +z, in (-pi, pi].

`draw_placement` draws a random placement: ``|offset| ~ U(lo, hi)`` mm and
``|angle| ~ U(lo, hi)`` degrees, each with a random sign.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np


class PanelError(ValueError):
    """Panel geometry or placement values are malformed."""


def _point(name: str, value: Sequence[float]) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.shape != (2,) or not np.all(np.isfinite(arr)):
        raise PanelError(f"{name}: expected a finite [x, y] pair, got {value!r}")
    return arr


def _rotation(angle: float) -> np.ndarray:
    c, s = math.cos(angle), math.sin(angle)
    return np.array([[c, -s], [s, c]])


def _xy(points: np.ndarray, name: str) -> np.ndarray:
    arr = np.asarray(points, dtype=float)
    arr2 = np.atleast_2d(arr)
    if arr2.ndim != 2 or arr2.shape[1] not in (2, 3):
        raise PanelError(f"{name}: expected shape (2,), (3,), (N, 2) or (N, 3), "
                         f"got {arr.shape}")
    return arr2[:, :2]


@dataclass(frozen=True, eq=False)
class Panel:
    """A panel placement: nominal edge, rotation centre, top height, real offset and angle."""

    nominal_start: np.ndarray
    nominal_end: np.ndarray
    centre: np.ndarray
    top_height: float
    offset: float = 0.0
    angle: float = 0.0

    def __post_init__(self) -> None:
        start = _point("nominal edge start", self.nominal_start)
        end = _point("nominal edge end", self.nominal_end)
        centre = _point("panel centre", self.centre)
        if np.linalg.norm(end - start) <= 0.0:
            raise PanelError("nominal edge: start and end must differ")
        for name in ("top_height", "offset", "angle"):
            if not math.isfinite(getattr(self, name)):
                raise PanelError(f"{name}: must be finite, got {getattr(self, name)!r}")
        for name, value in (("nominal_start", start), ("nominal_end", end), ("centre", centre)):
            value.setflags(write=False)
            object.__setattr__(self, name, value)

    # ------------------------------------------------------------------ geometry
    @property
    def nominal_direction(self) -> np.ndarray:
        """Unit direction of the nominal edge (2,)."""
        d = self.nominal_end - self.nominal_start
        return d / np.linalg.norm(d)

    @property
    def nominal_normal(self) -> np.ndarray:
        """Left normal z x d of the nominal edge (2,)."""
        d = self.nominal_direction
        return np.array([-d[1], d[0]])

    @property
    def real_edge(self) -> tuple[np.ndarray, np.ndarray]:
        """Start and end (2,) of the real edge."""
        rot = _rotation(self.angle)
        shift = self.offset * self.nominal_normal
        return tuple(rot @ (p - self.centre) + self.centre + shift  # type: ignore[return-value]
                     for p in (self.nominal_start, self.nominal_end))

    @property
    def real_direction(self) -> np.ndarray:
        """Unit direction of the real edge (2,)."""
        return _rotation(self.angle) @ self.nominal_direction

    @property
    def real_normal(self) -> np.ndarray:
        """Left normal of the real edge (2,)."""
        d = self.real_direction
        return np.array([-d[1], d[0]])

    @property
    def length(self) -> float:
        """Edge length [m] (the same for nominal and real)."""
        return float(np.linalg.norm(self.nominal_end - self.nominal_start))

    def lateral_offset(self, points: np.ndarray) -> np.ndarray:
        """Signed perpendicular distance [m] of points (N, 2|3) from the real edge line (N,)."""
        start, _ = self.real_edge
        return (_xy(points, "points") - start) @ self.real_normal

    def along_edge(self, points: np.ndarray) -> np.ndarray:
        """Distance [m] of the points' projections along the real edge from its start (N,)."""
        start, _ = self.real_edge
        return (_xy(points, "points") - start) @ self.real_direction

    def edge_angle(self, directions: np.ndarray) -> np.ndarray:
        """Angle [rad] from each direction (N, 2|3; table-plane part used) to the real edge."""
        u = _xy(directions, "directions")
        e = self.real_direction
        return np.arctan2(u[:, 0] * e[1] - u[:, 1] * e[0], u @ e)

    def placed(self, offset: float, angle: float) -> "Panel":
        """The same panel with another real placement (offset [m], angle [rad])."""
        return Panel(self.nominal_start, self.nominal_end, self.centre, self.top_height,
                     offset, angle)


def draw_placement(rng: np.random.Generator, offset_mm: Sequence[float],
                   angle_deg: Sequence[float]) -> tuple[float, float]:
    """Random placement (offset [m], angle [rad]): magnitudes ~ U(lo, hi), random signs."""
    for name, rng_range in (("offset_mm", offset_mm), ("angle_deg", angle_deg)):
        if len(rng_range) != 2 or not 0.0 <= rng_range[0] <= rng_range[1] \
                or not math.isfinite(rng_range[1]):
            raise PanelError(f"placement {name}: expected [lo, hi] with 0 <= lo <= hi, "
                             f"got {list(rng_range)!r}")
    offset = rng.uniform(*offset_mm) * rng.choice((-1.0, 1.0)) * 1e-3
    angle = math.radians(rng.uniform(*angle_deg) * rng.choice((-1.0, 1.0)))
    return float(offset), float(angle)
