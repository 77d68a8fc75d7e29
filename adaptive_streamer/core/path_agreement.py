# SPDX-License-Identifier: Apache-2.0
"""Whether a received reference window lies on the whole reference path (no ROS).

The reference server publishes the whole resampled reference once (``reference/path``,
transient local) and the next points every decision period (``reference/window``). Speed
override, pause and looping change when the window's points apply, never where they are:
every window point lies on the path's curve. `ReferencePath.check` measures the
distance [rad, Euclidean over the joints] of each window point from the path's polyline
(straight segments between the path samples; the samples are one decision period apart, so
the polyline is within a chord error of the curve) and gives the reason when a point is
further than the tolerance.

The search starts near where the previous window matched (the window moves along the path)
and falls back to the whole path when no segment near it is close enough, so a check costs
a band of segments, not the whole path.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

BAND = 8   # segments searched beyond the previous match, on either side, per window point


class PathError(ValueError):
    """A reference path cannot be used (empty, not finite, or joints that do not match)."""


@dataclass(frozen=True)
class PathCheck:
    """A window against the path: the largest distance of its points from the path, which
    point, and the reason when it is over the tolerance (None: on the path). Within the
    tolerance the distance is to the nearest segment near the previous match (an upper
    bound); over it, to the nearest segment of the whole path."""

    distance: float   # [rad]
    point: int        # index of the window point furthest from the path
    reason: str | None


class ReferencePath:
    """The whole reference as a polyline in joint space (positions (N, n), N >= 1)."""

    def __init__(self, positions: np.ndarray, names: Sequence[str]) -> None:
        p = np.asarray(positions, float)
        if p.ndim != 2 or p.shape[0] == 0 or p.shape[1] != len(names):
            raise PathError(f"reference path has shape {p.shape}; expected (samples >= 1, "
                            f"{len(names)} joints)")
        if not np.all(np.isfinite(p)):
            raise PathError("reference path has positions that are not finite")
        self.names = tuple(names)
        self.samples = p.shape[0]
        if p.shape[0] == 1:
            p = np.vstack([p, p])
        self._start = p[:-1]
        self._step = p[1:] - p[:-1]
        self._length2 = np.maximum(np.einsum("ij,ij->i", self._step, self._step), 1e-300)
        self._near = 0

    @property
    def segments(self) -> int:
        """Number of polyline segments."""
        return len(self._start)

    def check(self, points: np.ndarray, tolerance: float) -> PathCheck:
        """Whether the window ``points`` (H, n) lie within ``tolerance`` [rad] of the path."""
        pts = np.asarray(points, float)
        lo = max(0, self._near - BAND)
        hi = min(self.segments, self._near + BAND + len(pts))
        d, seg = self._nearest(pts, lo, hi)
        if (lo > 0 or hi < self.segments) and not np.all(d <= tolerance):
            d, seg = self._nearest(pts, 0, self.segments)   # moved on (or off): everywhere
        self._near = int(seg[0])
        i = int(np.argmax(d)) if np.all(np.isfinite(d)) else int(np.argmin(np.isfinite(d)))
        worst = float(d[i])
        if worst <= tolerance:
            return PathCheck(worst, i, None)
        return PathCheck(worst, i, f"reference/window point {i} is {worst:.4g} rad from the "
                         f"reference path (reference/path; over path_tolerance {tolerance:g} "
                         "rad)")

    def _nearest(self, pts: np.ndarray, lo: int, hi: int) -> tuple[np.ndarray, np.ndarray]:
        """Distance of each point to the nearest segment in [lo, hi) and that segment."""
        a, step, l2 = self._start[lo:hi], self._step[lo:hi], self._length2[lo:hi]
        rel = pts[:, None, :] - a[None, :, :]                       # (H, S, n)
        t = np.clip(np.einsum("hsj,sj->hs", rel, step) / l2, 0.0, 1.0)
        gap = rel - t[:, :, None] * step[None, :, :]
        dist2 = np.einsum("hsj,hsj->hs", gap, gap)
        k = np.argmin(dist2, axis=1)
        return np.sqrt(dist2[np.arange(len(pts)), k]), k + lo
