# SPDX-License-Identifier: Apache-2.0
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
    times = window.times
    H = times.shape[0] if times.ndim == 1 else 0
    if H < 1:
        raise AlignmentError("reference window has no points")
    P, V, A = window.positions, window.velocities, window.accelerations
    if not (P.ndim == 2 and P.shape[0] == H and V.shape == P.shape and A.shape == P.shape):
        for name, arr in (("positions", P), ("velocities", V), ("accelerations", A)):
            if arr.ndim != 2 or arr.shape != (H, P.shape[-1]):
                raise AlignmentError(f"reference window {name}: expected shape ({H}, n), "
                                     f"got {arr.shape}")
    # a sum is finite exactly when every term is (or overflows, which is refused too)
    if not math.isfinite(window.stamp + float(times.sum()) + float(P.sum()) + float(V.sum())
                         + float(A.sum())):
        raise AlignmentError("reference window holds NaN or infinite values")
    if H > 1 and not bool((times[1:] > times[:-1]).all()):
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
    """Evaluate ``window`` at the absolute times ``query`` (shape (H,)).

    When the window's points and the queries share one spacing (the reference server's
    windows at the decision period), every query falls at the same fraction of its own
    interval, so the intervals are consecutive slices and the fraction is one number.
    """
    fast = _aligned_slices(window, query)
    if fast is not None:
        return _hermite(*fast)
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
    return _hermite(P[k], V[k], A[k], P[k + 1], V[k + 1], A[k + 1], h, s)


def _aligned_slices(window: Window, query: np.ndarray) -> tuple | None:
    """Arguments of `_hermite` as slices when the spacings agree (else None)."""
    times, H = window.times, query.shape[0]
    n_pts = times.shape[0]
    if n_pts < 2 or H < 2:
        return None
    h = float(times[-1] - times[0]) / (n_pts - 1)
    # same spacing, to the resolution of absolute (epoch) times
    tol = 1e-6 * h + 4e-16 * abs(float(query[0]))
    if abs(float(query[-1] - query[0]) / (H - 1) - h) > tol \
            or abs(float(times[1] - times[0]) - h) > tol:
        return None
    x = (float(query[0]) - window.stamp - float(times[0])) / h
    k0 = math.floor(x + 1e-6)          # a query on a window point, to rounding, is on it
    if k0 < 0 or k0 + H > n_pts - 1:
        return None
    frac = min(max(x - k0, 0.0), 1.0)
    P, V, A = window.positions, window.velocities, window.accelerations
    a, b = slice(k0, k0 + H), slice(k0 + 1, k0 + H + 1)
    return P[a], V[a], A[a], P[b], V[b], A[b], h, frac


# Quintic Hermite basis on s in [0, 1] (rows: p0, h v0, h^2 a0, p1, h v1, h^2 a1; columns:
# coefficients of s^0..s^5), from matching p, p', p'' at both ends.
_BASIS = np.array([[1, 0, 0, -10, 15, -6],
                   [0, 1, 0, -6, 8, -3],
                   [0, 0, 0.5, -1.5, 1.5, -0.5],
                   [0, 0, 0, 10, -15, 6],
                   [0, 0, 0, -4, 7, -3],
                   [0, 0, 0, 0.5, -1, 0.5]], float)
_D1 = np.arange(6.0)
_D2 = np.arange(6.0) * np.arange(-1.0, 5.0)


def _weights(s: np.ndarray, h: np.ndarray) -> np.ndarray:
    """(3, m, 6) weights of the six end values for p, v, a at fractions ``s`` (m,) of
    intervals of lengths ``h`` (m,)."""
    col = s[:, None]
    sk = np.cumprod(np.concatenate([np.ones_like(col), np.repeat(col, 5, axis=1)], axis=1),
                    axis=1)                                   # s^k, k = 0..5
    shift1 = np.concatenate([np.zeros_like(col), sk[:, :5]], axis=1)       # s^(k-1)
    shift2 = np.concatenate([np.zeros_like(col), np.zeros_like(col), sk[:, :4]], axis=1)
    hh = h * h
    scale = np.stack([np.ones_like(h), h, hh, np.ones_like(h), h, hh], axis=1)
    return np.stack([sk @ _BASIS.T, (_D1 * shift1 @ _BASIS.T) / h[:, None],
                     (_D2 * shift2 @ _BASIS.T) / hh[:, None]]) * scale


def _weights_one(s: float, h: float) -> np.ndarray:
    """(3, 6) weights at one fraction ``s`` (the common case, in plain floats)."""
    s2 = s * s
    s3 = s2 * s
    powers = np.array([[1.0, s, s2, s3, s3 * s, s3 * s2],
                       [0.0, 1.0 / h, 2.0 * s / h, 3.0 * s2 / h, 4.0 * s3 / h, 5.0 * s3 * s / h],
                       [0.0, 0.0, 2.0 / (h * h), 6.0 * s / (h * h), 12.0 * s2 / (h * h),
                        20.0 * s3 / (h * h)]])
    return (powers @ _BASIS.T) * np.array([1.0, h, h * h, 1.0, h, h * h])


def _hermite(p0, v0, a0, p1, v1, a1, h, s) -> AlignedReference:
    """Quintic Hermite interpolation on intervals of length ``h`` at local fractions ``s``:
    scalars (one fraction for every row), or arrays of shape (H, 1) (one per row)."""
    x = np.stack([p0, v0, a0, p1, v1, a1])                  # (6, H, n)
    if np.isscalar(s):
        rows, n = x.shape[1], x.shape[2]
        out = (_weights_one(float(s), float(h)) @ x.reshape(6, -1)).reshape(3, rows, n)
    else:
        w = _weights(np.asarray(s, float).reshape(-1), np.asarray(h, float).reshape(-1))
        out = np.einsum("khj,jhn->khn", w, x)
    return AlignedReference(out[0], out[1], out[2])
