"""Reference alignment: the reference window evaluated at the adapter's own decision times.

A window (`adaptive_streamer.core.playback.Window`) holds H points at absolute times
``stamp + times`` with positions,
velocities and accelerations on the real timeline (speed override already applied). The
adapter's decision instants rarely coincide with them, so each query time is interpolated
between the two bracketing points by quintic Hermite interpolation, which matches position,
velocity and acceleration at both points (exact for a quintic reference and consistent in
p, v, a). Before the first point the first point is held; past the last point the last
point is held (the watchdog's reference-staleness check stops motion long before a window
runs out).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .playback import Window


class AlignmentError(ValueError):
    """A reference window is malformed."""


def validate_window(window: Window) -> None:
    """Raise `AlignmentError` unless ``window`` is well formed (shapes, finite, increasing)."""
    times = np.asarray(window.times)
    H = times.shape[0] if times.ndim == 1 else 0
    if H < 1:
        raise AlignmentError("reference window has no points")
    for name in ("positions", "velocities", "accelerations"):
        arr = getattr(window, name)
        if arr.ndim != 2 or arr.shape[0] != H:
            raise AlignmentError(f"reference window {name}: expected shape ({H}, n), got {arr.shape}")
    if not (math.isfinite(window.stamp) and np.all(np.isfinite(times))
            and np.all(np.isfinite(window.positions)) and np.all(np.isfinite(window.velocities))
            and np.all(np.isfinite(window.accelerations))):
        raise AlignmentError("reference window holds NaN or infinite values")
    if H > 1 and np.any(np.diff(times) <= 0.0):
        raise AlignmentError("reference window times are not strictly increasing")


def window_end(window: Window) -> float:
    """Absolute time of the window's last point."""
    return float(window.stamp + window.times[-1])


@dataclass(frozen=True)
class AlignedReference:
    """Reference at query times (arrays (H, n))."""

    positions: np.ndarray
    velocities: np.ndarray
    accelerations: np.ndarray


def align(window: Window, query: np.ndarray) -> AlignedReference:
    """Evaluate ``window`` at the absolute times ``query`` (shape (H,))."""
    t = window.stamp + window.times
    P, V, A = window.positions, window.velocities, window.accelerations
    if t.shape[0] == 1:
        shape = (query.shape[0], P.shape[1])
        return AlignedReference(np.broadcast_to(P[0], shape).copy(),
                                np.broadcast_to(V[0], shape).copy(),
                                np.broadcast_to(A[0], shape).copy())
    q = np.clip(query, t[0], t[-1])
    k = np.clip(np.searchsorted(t, q, side="right") - 1, 0, t.shape[0] - 2)
    h = (t[k + 1] - t[k])[:, None]
    s = ((q - t[k])[:, None]) / h
    p0, v0, a0, p1, v1, a1 = P[k], V[k] * h, A[k] * h * h, P[k + 1], V[k + 1] * h, A[k + 1] * h * h
    # quintic Hermite in the local coordinate s in [0, 1]: c0 + c1 s + ... + c5 s^5
    c3 = 10 * (p1 - p0) - 6 * v0 - 4 * v1 - 1.5 * a0 + 0.5 * a1
    c4 = -15 * (p1 - p0) + 8 * v0 + 7 * v1 + 1.5 * a0 - a1
    c5 = 6 * (p1 - p0) - 3 * (v0 + v1) - 0.5 * (a0 - a1)
    c2 = 0.5 * a0
    pos = p0 + s * (v0 + s * (c2 + s * (c3 + s * (c4 + s * c5))))
    vel = (v0 + s * (2 * c2 + s * (3 * c3 + s * (4 * c4 + s * 5 * c5)))) / h
    acc = (2 * c2 + s * (6 * c3 + s * (12 * c4 + s * 20 * c5))) / (h * h)
    return AlignedReference(pos, vel, acc)


def wrap_angle(x: np.ndarray) -> np.ndarray:
    """Angles wrapped to [-pi, pi)."""
    return (x + np.pi) % (2.0 * np.pi) - np.pi
