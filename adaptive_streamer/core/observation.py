# SPDX-License-Identifier: Apache-2.0
"""The observation vector a learned policy reads, built from the policy inputs.

An observation is a list of blocks concatenated, in order, into one float32 vector
(joint arrays in the card's joint order, n joints; ``h`` a block's horizon; T the decision
period; ``p, v, a`` the planned state at the decision instant; ``ref_*[i]`` the reference at
``t + i T``):

========================  ======  ===========================================================
block                     size    value
========================  ======  ===========================================================
joint_position            n       ``(p - centre) / half_range`` per joint (the position range
                                  maps onto [-1, 1]); a continuous joint: ``p / pi``
                                  wrapped into [-1, 1] (IEEE remainder by 2, i.e. the angle
                                  wrapped into [-pi, pi], over pi); a joint without a
                                  position range that is not continuous: ``p`` unscaled
joint_velocity            n       ``v / velocity_max``
joint_acceleration        n       ``a / acceleration_max``
reference_position        h n     ``(ref_p[i] - p) / scale``, i = 0..h-1 (``scale`` [rad]: one
                                  number or one per joint; default 1)
reference_velocity        h n     ``ref_v[i] / velocity_max``, i = 0..h-1
reference_acceleration    h n     ``ref_a[i] / acceleration_max``, i = 0..h-1
feedback                  2 f     for the f named features: ``(x - offset) / scale`` (0 where
                                  the feature is invalid, missing or no feedback arrived),
                                  then one validity flag per feature (1 valid, 0 not)
previous_action           n       the policy's previous raw action
========================  ======  ===========================================================

Horizon blocks are point-major: all joints of point 0, then all joints of point 1, and so
on. Differences ``ref_p[i] - p`` are taken in the planner's coordinates as given (no
wrapping). Feedback features are looked up by name in the received `FeatureVector` (the
name-to-index map is cached per distinct name tuple).

`ObservationLayout` precomputes index and normalisation arrays once; `build` runs about
ten numpy calls whatever the number of blocks, writing into the output buffer (pass the
same ``out`` every time to reuse it and its cached views). A layout keeps scratch arrays:
use one per thread.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .limits import JointLimits
from .policy_inputs import PolicyInputs

HORIZON_BLOCKS = ("reference_position", "reference_velocity", "reference_acceleration")
BLOCK_KINDS = ("joint_position", "joint_velocity", "joint_acceleration", *HORIZON_BLOCKS,
               "feedback", "previous_action")


class ObservationError(ValueError):
    """An observation layout is inconsistent, or inputs do not fit it."""


@dataclass(frozen=True)
class ObservationBlock:
    """One block of an observation layout (see the module docstring for the values).

    ``horizon`` is used by the reference blocks; ``scale`` by reference_position (1 or n
    values) and feedback (1 or f values); ``features`` and ``offset`` by feedback.
    """

    kind: str
    horizon: int = 0
    scale: tuple[float, ...] = (1.0,)
    features: tuple[str, ...] = ()
    offset: tuple[float, ...] = (0.0,)

    def size(self, n_joints: int) -> int:
        """Number of observation entries this block fills for ``n_joints`` joints."""
        if self.kind in HORIZON_BLOCKS:
            return self.horizon * n_joints
        if self.kind == "feedback":
            return 2 * len(self.features)
        return n_joints

    def label(self) -> str:
        """Short description, e.g. ``reference_position(h=5)`` or ``feedback[edge_offset]``."""
        if self.kind in HORIZON_BLOCKS:
            return f"{self.kind}(h={self.horizon})"
        if self.kind == "feedback":
            return f"feedback[{', '.join(self.features)}]"
        return self.kind


def _per_item(values: tuple[float, ...], count: int, what: str) -> np.ndarray:
    arr = np.asarray(values, float)
    if arr.size == 1:
        arr = np.full(count, float(arr[0]))
    if arr.shape != (count,) or not np.all(np.isfinite(arr)):
        raise ObservationError(f"{what}: expected 1 or {count} finite values, got {list(values)}")
    return arr


class ObservationLayout:
    """A fixed sequence of observation blocks for joints with `limits`.

    Attributes: ``blocks``, ``slices`` (one per block, into the observation), ``size``,
    ``horizon`` (reference points the layout reads), ``features`` (feedback features read).

    How `build` works: every entry is ``gain * (src[ia] - src[ib]) + bias`` over one
    float64 source vector ``src`` = [0, p, v, a, previous action, the first reference rows
    each reference block reads (flattened), the message's feature values and validity
    flags] filled by a single concatenation (``ib`` points at the leading 0 except for
    reference_position). Continuous joints are then wrapped (`math.remainder`, per joint),
    the result is cast into the float32 output, and feedback values whose flag is 0 are
    zeroed. The feedback indices depend on the message's feature names and are rebuilt when
    those change.
    """

    def __init__(self, blocks: tuple[ObservationBlock, ...] | list[ObservationBlock],
                 limits: JointLimits) -> None:
        self.blocks = tuple(blocks)
        self.limits = limits
        n = self._n = len(limits)
        if not self.blocks:
            raise ObservationError("an observation needs at least one block")
        rows = {kind: 0 for kind in HORIZON_BLOCKS}
        slices: list[slice] = []
        start, features = 0, []
        for k, block in enumerate(self.blocks):
            where = f"observation block {k} ({block.kind})"
            if block.kind not in BLOCK_KINDS:
                raise ObservationError(f"{where}: unknown block; expected one of "
                                       f"{', '.join(BLOCK_KINDS)}")
            if block.kind in HORIZON_BLOCKS:
                if isinstance(block.horizon, bool) or not isinstance(block.horizon, int) \
                        or block.horizon < 1:
                    raise ObservationError(f"{where}: horizon must be an integer >= 1, got "
                                           f"{block.horizon!r}")
                rows[block.kind] = max(rows[block.kind], block.horizon)
            if block.kind == "feedback":
                if not block.features or len(set(block.features)) != len(block.features):
                    raise ObservationError(f"{where}: features must be a non-empty list of "
                                           f"distinct names, got {list(block.features)}")
                features.extend(f for f in block.features if f not in features)
            slices.append(slice(start, start + block.size(n)))
            start += block.size(n)
        self.slices = tuple(slices)
        self.size = start
        self.horizon = max(rows.values())
        self.features = tuple(features)
        self._rows = tuple(rows[kind] for kind in HORIZON_BLOCKS)
        # source offsets: 0 is the constant zero, then p, v, a, previous action, references
        offset = {"joint_position": 1, "joint_velocity": 1 + n,
                  "joint_acceleration": 1 + 2 * n, "previous_action": 1 + 3 * n}
        at = 1 + 4 * n
        for kind, h in zip(HORIZON_BLOCKS, self._rows):
            offset[kind] = at
            at += h * n
        self._fixed = at - 1  # entries of src before the feedback part
        self._ia = np.zeros(self.size, np.intp)
        self._ib = np.zeros(self.size, np.intp)
        self._gain = np.ones(self.size)
        self._bias = np.zeros(self.size)
        self._wraps: list[int] = []  # entries of continuous joints' positions
        self._feedback: list[tuple[slice, ObservationBlock]] = []
        for k, (block, s) in enumerate(zip(self.blocks, self.slices)):
            self._recipe(block, s, offset, f"observation block {k} ({block.kind})")
        self._has_difference = bool(np.any(self._ib))
        self._t = np.zeros(self.size)
        self._t2 = np.zeros(self.size)
        self._names: tuple[str, ...] | None = None
        self._bind_feedback(None)
        self._views_for: np.ndarray | None = None
        self._out_views: tuple = ()

    def describe(self) -> str:
        """Blocks with their index ranges, e.g. ``joint_position [0:7], ...``."""
        return ", ".join(f"{b.label()} [{s.start}:{s.stop}]"
                         for b, s in zip(self.blocks, self.slices))

    def build(self, inputs: PolicyInputs, out: np.ndarray | None = None) -> np.ndarray:
        """The observation for ``inputs`` as float32 of shape (size,).

        Written into ``out`` (float32, C-contiguous, ``size`` entries, any shape) when
        given, and ``out`` is returned; otherwise a new array. Reference arrays must hold at
        least ``horizon`` rows.
        """
        if out is None:
            out = np.empty(self.size, np.float32)
        if out is not self._views_for:
            self._out_views = self._views_of(out)
            self._views_for = out
        fb = inputs.feedback
        names = None if fb is None else fb.names
        if names is not self._names and names != self._names:
            self._bind_feedback(names)
        state = inputs.state
        parts = [state.position, state.velocity, state.acceleration, inputs.previous_action]
        hp, hv, ha = self._rows
        if inputs.ref_positions.shape[0] < self.horizon:
            raise ObservationError(f"the observation reads {self.horizon} reference points, "
                                   f"got {inputs.ref_positions.shape[0]}")
        if hp:
            parts.append(inputs.ref_positions[:hp].reshape(-1))
        if hv:
            parts.append(inputs.ref_velocities[:hv].reshape(-1))
        if ha:
            parts.append(inputs.ref_accelerations[:ha].reshape(-1))
        if self._fb_in_src:
            parts += [fb.values, fb.valid]
        try:
            np.concatenate(parts, out=self._src_view)
        except ValueError:
            raise ObservationError(
                f"inputs do not fit the observation layout for {self._n} joints: got "
                f"{[np.shape(x) for x in parts]} for (p, v, a, previous action, reference rows "
                f"read {self._rows}, feedback values and flags)") from None
        t = self._t
        np.take(self._src, self._ia, out=t)
        if self._has_difference:
            np.subtract(t, np.take(self._src, self._ib, out=self._t2), out=t)
        t *= self._gain
        for i in self._wraps:  # continuous joints: (angle / pi) wrapped into [-1, 1]
            y = t[i]
            if math.isfinite(y):
                t[i] = math.remainder(y, 2.0)
        flat, masks = self._out_views
        np.add(t, self._bias, out=flat)
        for values, flags, invalid in masks:
            np.equal(flags, 0.0, out=invalid)
            np.copyto(values, 0.0, where=invalid)
        return out

    def build_batch(self, inputs: PolicyInputs) -> np.ndarray:
        """Observations of B decisions at once, float32 (B, size), equal row by row to
        `build` (the same recipe arrays). ``inputs`` holds batched arrays: state and
        previous action (B, n), reference rows (B, >= horizon, n), and the feedback's
        values and validity flags (B, f) under one tuple of names (or None)."""
        fb = inputs.feedback
        names = None if fb is None else fb.names
        if names is not self._names and names != self._names:
            self._bind_feedback(names)
        state = inputs.state
        b = state.position.shape[0]
        parts = [np.zeros((b, 1)), state.position, state.velocity, state.acceleration,
                 inputs.previous_action]
        for rows, ref in zip(self._rows, (inputs.ref_positions, inputs.ref_velocities,
                                          inputs.ref_accelerations)):
            if rows:
                if ref.shape[1] < rows:
                    raise ObservationError(f"the observation reads {rows} reference points, "
                                           f"got {ref.shape[1]}")
                parts.append(ref[:, :rows].reshape(b, -1))
        if self._fb_in_src:
            parts += [fb.values, fb.valid]
        try:
            src = np.concatenate(parts, axis=1, dtype=float)
        except ValueError:
            raise ObservationError(
                f"batched inputs do not fit the observation layout for {self._n} joints: got "
                f"{[np.shape(x) for x in parts[1:]]}") from None
        t = src[:, self._ia]
        if self._has_difference:
            t -= src[:, self._ib]
        t *= self._gain
        for i in self._wraps:  # the same IEEE remainder as `build`
            t[:, i] = [math.remainder(y, 2.0) if math.isfinite(y) else y for y in t[:, i]]
        out = (t + self._bias).astype(np.float32)
        for s, block in self._feedback:
            f = len(block.features)
            values, flags = out[:, s.start:s.start + f], out[:, s.start + f:s.stop]
            values[flags == 0.0] = 0.0
        return out

    # ------------------------------------------------------------------ internals
    def _recipe(self, block: ObservationBlock, s: slice, offset: dict[str, int],
                where: str) -> None:
        """Fill ``ia, ib, gain, bias`` for one block (feedback indices: `_bind_feedback`)."""
        lim, n, kind = self.limits, self._n, block.kind
        idx = np.arange(n)
        if kind == "joint_position":
            ranged = lim.has_position_limits
            pmin = np.where(ranged, lim.position_min, -1.0)
            pmax = np.where(ranged, lim.position_max, 1.0)
            gain = 2.0 / (pmax - pmin)  # no range: centre 0, half range 1
            gain[lim.continuous] = 1.0 / math.pi
            self._gain[s] = gain
            self._bias[s] = np.where(lim.continuous, 0.0, -0.5 * (pmax + pmin) * gain)
            self._ia[s] = offset[kind] + idx
            self._wraps.extend((s.start + np.flatnonzero(lim.continuous)).tolist())
        elif kind in ("joint_velocity", "joint_acceleration", "previous_action"):
            self._ia[s] = offset[kind] + idx
            if kind != "previous_action":
                self._gain[s] = 1.0 / (lim.velocity_max if kind == "joint_velocity"
                                       else lim.acceleration_max)
        elif kind in HORIZON_BLOCKS:
            h = block.horizon
            self._ia[s] = offset[kind] + np.arange(h * n)
            if kind == "reference_position":
                scale = _per_item(block.scale, n, f"{where}: scale")
                if not np.all(scale > 0.0):
                    raise ObservationError(f"{where}: scale must be positive, got "
                                           f"{list(block.scale)}")
                self._ib[s] = np.tile(offset["joint_position"] + idx, h)
                self._gain[s] = np.tile(1.0 / scale, h)
            else:
                vmax = lim.velocity_max if kind == "reference_velocity" else lim.acceleration_max
                self._gain[s] = np.tile(1.0 / vmax, h)
        else:  # feedback: values (x - offset) / scale, then flags
            f = len(block.features)
            scale = _per_item(block.scale, f, f"{where}: scale")
            if not np.all(scale != 0.0):
                raise ObservationError(f"{where}: scale must be non-zero, got "
                                       f"{list(block.scale)}")
            offs = _per_item(block.offset, f, f"{where}: offset")
            self._gain[s.start:s.start + f] = 1.0 / scale
            self._bias[s.start:s.start + f] = -offs / scale
            self._feedback.append((s, block))

    def _bind_feedback(self, names: tuple[str, ...] | None) -> None:
        """Point the feedback entries at the message's values/flags (or at 0 when absent)."""
        self._names = names
        k = 0 if names is None else len(names)
        self._fb_in_src = bool(self._feedback) and names is not None
        m = self._fixed + (2 * k if self._fb_in_src else 0)
        self._src = np.zeros(1 + m)
        self._src_view = self._src[1:]
        index = {} if names is None else {name: i for i, name in enumerate(names)}
        for s, block in self._feedback:
            f = len(block.features)
            at = [index.get(x) for x in block.features]
            self._ia[s.start:s.start + f] = [0 if i is None else 1 + self._fixed + i for i in at]
            self._ia[s.start + f:s.stop] = [0 if i is None else 1 + self._fixed + k + i
                                            for i in at]

    def _views_of(self, out: np.ndarray) -> tuple:
        if out.dtype != np.float32 or out.size != self.size or not out.flags.c_contiguous:
            raise ObservationError(f"output buffer must be C-contiguous float32 with "
                                   f"{self.size} entries, got {out.dtype} shape {out.shape}")
        flat = out.reshape(-1)
        masks = []
        for s, block in self._feedback:
            f = len(block.features)
            masks.append((flat[s.start:s.start + f], flat[s.start + f:s.stop], np.zeros(f, bool)))
        return flat, tuple(masks)
