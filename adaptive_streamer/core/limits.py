# SPDX-License-Identifier: Apache-2.0
"""Per-joint kinematic limits (REP 103 units: rad, rad/s, rad/s^2, rad/s^3).

`JointLimits` holds, per joint, a position range (infinite for a continuous joint), and
positive velocity, acceleration and jerk bounds. It is validated on construction; every
error names the joint and the field. Limits are read from the project's own YAML::

    joints:
      j1: {position: [-2.9, 2.9], velocity: 2.0, acceleration: 8.0, jerk: 80.0}
      j7: {position: null, continuous: true, velocity: 3.0, acceleration: 10.0, jerk: 100.0}

or from a URDF (``<limit lower upper velocity>``; a ``continuous`` joint has no position
limits; a ``prismatic`` joint is in m, m/s, ...) with acceleration and jerk taken from a
limits YAML beside it (same stem, ``.limits.yaml``; or passed explicitly). The YAML may also
tighten a URDF value. Of a URDF, the joints the YAML names (or an explicit selection) are
used; mimic and fixed joints never.
"""
from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar, Iterable, Mapping, Sequence

import numpy as np

from .text_files import TextFileError, load_yaml, read_text

FIELDS = ("position_min", "position_max", "velocity_max", "acceleration_max", "jerk_max")


class LimitsError(ValueError):
    """A limits file or value is missing, malformed or inconsistent."""


def _vector(name: str, values: Iterable[float], n: int) -> np.ndarray:
    arr = np.asarray(list(values) if not isinstance(values, np.ndarray) else values, dtype=float)
    if arr.shape != (n,):
        raise LimitsError(f"{name}: expected {n} values (one per joint), got shape {arr.shape}")
    return arr.copy()


@dataclass(frozen=True, eq=False)
class JointLimits:
    """Validated kinematic limits for an ordered list of joints.

    Arrays are read-only, shape ``(n,)``. ``position_min``/``position_max`` are ``-inf``/``inf``
    for joints without position limits; ``continuous`` marks joints whose angle wraps.
    """

    names: tuple[str, ...]
    position_min: np.ndarray
    position_max: np.ndarray
    velocity_max: np.ndarray
    acceleration_max: np.ndarray
    jerk_max: np.ndarray
    continuous: np.ndarray
    #: one line on the URDF joints the loading left out ('' when none; see `from_urdf_string`)
    left_out: ClassVar[str] = ""

    def __init__(
        self,
        names: Sequence[str],
        position_min: Iterable[float],
        position_max: Iterable[float],
        velocity_max: Iterable[float],
        acceleration_max: Iterable[float],
        jerk_max: Iterable[float],
        continuous: Iterable[bool] | None = None,
    ) -> None:
        names = tuple(str(x) for x in names)
        n = len(names)
        if n == 0:
            raise LimitsError("no joints given")
        seen: set[str] = set()
        for name in names:
            if not name:
                raise LimitsError("a joint name is empty")
            if name in seen:
                raise LimitsError(f"joint '{name}' is listed twice (names must be unique)")
            seen.add(name)
        values = {
            "position_min": _vector("position_min", position_min, n),
            "position_max": _vector("position_max", position_max, n),
            "velocity_max": _vector("velocity_max", velocity_max, n),
            "acceleration_max": _vector("acceleration_max", acceleration_max, n),
            "jerk_max": _vector("jerk_max", jerk_max, n),
        }
        cont = np.zeros(n, bool) if continuous is None else np.asarray(list(continuous), bool)
        if cont.shape != (n,):
            raise LimitsError(f"continuous: expected {n} flags, got shape {cont.shape}")
        for i, name in enumerate(names):
            lo, hi = values["position_min"][i], values["position_max"][i]
            if math.isnan(lo) or math.isnan(hi):
                raise LimitsError(f"joint '{name}': position limit is NaN")
            if math.isinf(lo) != math.isinf(hi) or (math.isinf(lo) and (lo > 0 or hi < 0)):
                raise LimitsError(
                    f"joint '{name}': position limits must both be finite, or -inf/inf for a "
                    f"joint without position limits; got [{lo}, {hi}]")
            if not lo < hi:
                raise LimitsError(f"joint '{name}': position_min {lo} must be below position_max {hi}")
            for field in ("velocity_max", "acceleration_max", "jerk_max"):
                x = values[field][i]
                if not (math.isfinite(x) and x > 0):
                    raise LimitsError(f"joint '{name}': {field} must be finite and positive, got {x}")
        for key, arr in values.items():
            arr.setflags(write=False)
            object.__setattr__(self, key, arr)
        cont.setflags(write=False)
        object.__setattr__(self, "names", names)
        object.__setattr__(self, "continuous", cont)

    # ------------------------------------------------------------------ views
    def __len__(self) -> int:
        return len(self.names)

    def __repr__(self) -> str:
        return f"JointLimits({list(self.names)})"

    @property
    def has_position_limits(self) -> np.ndarray:
        """Boolean mask of joints with a finite position range."""
        return np.isfinite(self.position_min)

    def index(self, name: str) -> int:
        """Position of joint ``name``; raises `LimitsError` naming the known joints."""
        try:
            return self.names.index(name)
        except ValueError:
            raise LimitsError(f"unknown joint '{name}'; known joints: {list(self.names)}") from None

    def subset(self, names: Sequence[str]) -> "JointLimits":
        """Limits for ``names`` in that order (a subset and/or reordering)."""
        idx = [self.index(n) for n in names]
        return JointLimits(names, self.position_min[idx], self.position_max[idx],
                           self.velocity_max[idx], self.acceleration_max[idx],
                           self.jerk_max[idx], self.continuous[idx])

    def scaled(self, scale: float) -> "JointLimits":
        """Velocity, acceleration and jerk bounds multiplied by ``scale`` in (0, 1]."""
        if not (math.isfinite(scale) and 0.0 < scale <= 1.0):
            raise LimitsError(f"limit_scale must be in (0, 1], got {scale}")
        return JointLimits(self.names, self.position_min, self.position_max,
                           self.velocity_max * scale, self.acceleration_max * scale,
                           self.jerk_max * scale, self.continuous)

    def same_as(self, other: "JointLimits", rtol: float = 1e-9) -> bool:
        """True when names, ranges and bounds agree (to ``rtol``)."""
        if self.names != other.names or not np.array_equal(self.continuous, other.continuous):
            return False
        return all(np.allclose(getattr(self, f), getattr(other, f), rtol=rtol, atol=0.0)
                   for f in FIELDS)

    def describe_difference(self, other: "JointLimits") -> str:
        """Human-readable list of where two limit sets differ ('' when they agree)."""
        if self.names != other.names:
            return f"joints {list(self.names)} vs {list(other.names)}"
        parts = []
        for f in FIELDS:
            a, b = getattr(self, f), getattr(other, f)
            for i in np.flatnonzero(~np.isclose(a, b, rtol=1e-9, atol=0.0)):
                parts.append(f"{self.names[i]}.{f}: {a[i]:g} vs {b[i]:g}")
        return "; ".join(parts)

    def to_dict(self) -> dict[str, Any]:
        """The own YAML structure (``{'joints': {...}}``)."""
        joints: dict[str, Any] = {}
        for i, name in enumerate(self.names):
            entry: dict[str, Any] = {
                "position": ([float(self.position_min[i]), float(self.position_max[i])]
                             if np.isfinite(self.position_min[i]) else None),
                "velocity": float(self.velocity_max[i]),
                "acceleration": float(self.acceleration_max[i]),
                "jerk": float(self.jerk_max[i]),
            }
            if self.continuous[i]:
                entry["continuous"] = True
            joints[name] = entry
        return {"joints": joints}

    # ------------------------------------------------------------------ loading
    @classmethod
    def from_mapping(cls, data: Any, source: str = "<limits>") -> "JointLimits":
        """Build from the own YAML structure; errors name ``source`` and the joint."""
        if not isinstance(data, Mapping) or not isinstance(data.get("joints"), Mapping) \
                or not data["joints"]:
            raise LimitsError(f"{source}: expected a top-level 'joints:' mapping of joint name "
                              "to {position, velocity, acceleration, jerk}")
        names, rows = [], []
        for name, entry in data["joints"].items():
            rows.append(_parse_entry(source, str(name), entry, require_all=True))
            names.append(str(name))
        try:
            return cls(names, *zip(*[r[:5] for r in rows]), continuous=[r[5] for r in rows])
        except LimitsError as exc:
            raise LimitsError(f"{source}: {exc}") from None

    @classmethod
    def from_file(cls, path: str | Path, dynamics: str | Path | None = None,
                  joints: Sequence[str] | None = None) -> "JointLimits":
        """Read the own limits YAML, or a URDF plus a limits YAML for acceleration/jerk.

        For a URDF, ``dynamics`` defaults to ``<stem>.limits.yaml`` beside the URDF (see
        `from_urdf_string`). ``joints`` (non-empty) selects and orders the joints.
        """
        path = Path(path)
        try:
            text = read_text(path, "limits file")
        except TextFileError as exc:
            raise LimitsError(str(exc)) from None
        if path.suffix.lower() in (".urdf", ".xml") or text.lstrip().startswith("<"):
            dyn = Path(dynamics) if dynamics else path.with_name(path.stem + ".limits.yaml")
            return cls.from_urdf_string(text, dyn, source=str(path), joints=joints)
        try:
            data = load_yaml(text, str(path))
        except TextFileError as exc:
            raise LimitsError(str(exc)) from None
        limits = cls.from_mapping(data, source=str(path))
        if not joints:
            return limits
        try:
            return limits.subset(joints)
        except LimitsError as exc:
            raise LimitsError(f"{path}: {exc}") from None

    @classmethod
    def from_urdf_string(cls, urdf: str, dynamics: str | Path | Mapping[str, Any],
                         source: str = "robot_description",
                         joints: Sequence[str] | None = None) -> "JointLimits":
        """Limits of the commandable joints of a URDF; acceleration/jerk from ``dynamics``.

        ``dynamics`` is a limits YAML path or its parsed mapping (``joints:`` name ->
        acceleration, jerk, optionally a tighter position/velocity). Only ``<joint>``
        elements directly under ``<robot>`` are joints (``<transmission>`` and control
        blocks hold ``<joint>`` references too); fixed, floating, planar and ``<mimic>``
        joints are never commanded and are skipped. Without ``joints`` the result holds, in
        URDF order, the movable joints that ``dynamics`` names; with ``joints`` exactly
        those, in that order (each must be a movable joint of the URDF and be named in
        ``dynamics``). What was left out is described in `left_out` (one line, '' when
        nothing).
        """
        root = _urdf_root(urdf, source)
        dyn, dyn_source = _dynamics_mapping(dynamics, source)
        movable: dict[str, dict[str, Any]] = {}
        mimic: list[str] = []
        seen: set[str] = set()
        for joint in root.findall("joint"):
            kind, name = joint.get("type", ""), joint.get("name", "")
            if not name:
                raise LimitsError(f"{source}: a <joint> (type '{kind}') has no name")
            if name in seen:
                raise LimitsError(f"{source}: joint '{name}' is defined twice")
            seen.add(name)
            if kind in ("fixed", "floating", "planar"):
                continue
            if kind not in ("revolute", "continuous", "prismatic"):
                raise LimitsError(f"{source}: joint '{name}' has unknown type '{kind}' "
                                  "(expected revolute, continuous, prismatic, fixed, floating "
                                  "or planar)")
            if joint.find("mimic") is not None:
                mimic.append(name)
                continue
            movable[name] = _urdf_entry(source, name, kind, joint.find("limit"))
        if not movable:
            raise LimitsError(f"{source}: no movable joints found (mimic joints: {mimic})"
                              if mimic else f"{source}: no movable joints found")
        selection = [j for j in joints or () if j]
        if selection:
            for name in selection:
                if name in mimic:
                    raise LimitsError(f"{source}: joint '{name}' is a mimic joint (it follows "
                                      "another joint and is never commanded); movable joints: "
                                      f"{list(movable)}")
                if name not in movable:
                    raise LimitsError(f"{source}: has no movable joint '{name}'; movable "
                                      f"joints: {list(movable)}")
            names = selection
        else:
            names = [n for n in movable if isinstance(dyn["joints"].get(n), Mapping)]
            if not names:
                raise LimitsError(f"{dyn_source}: names none of the movable joints of "
                                  f"{source} {list(movable)}; each needs acceleration and jerk")
        rows = []
        for name in names:
            extra = dyn["joints"].get(name)
            if not isinstance(extra, Mapping):
                raise LimitsError(f"{dyn_source}: joint '{name}' (from {source}) is missing; it "
                                  "needs acceleration and jerk")
            rows.append(_tightened(source, dyn_source, name, movable[name], extra))
        try:
            limits = cls(names, *zip(*[r[:5] for r in rows]), continuous=[r[5] for r in rows])
        except LimitsError as exc:
            raise LimitsError(f"{source}: {exc}") from None
        unused = [n for n in movable if n not in names]
        parts = []
        if unused:
            why = "not in the joint selection" if selection else f"not named in {dyn_source}"
            parts.append(f"left out movable joints {unused} ({why})")
        if mimic:
            parts.append(f"skipped mimic joints {mimic} (never commanded)")
        if parts:
            object.__setattr__(limits, "left_out", f"{source}: " + "; ".join(parts))
        return limits


def _urdf_root(urdf: str, source: str) -> ET.Element:
    try:
        root = ET.fromstring(urdf)
    except ET.ParseError as exc:
        raise LimitsError(f"{source}: not valid URDF XML: {exc}") from None
    if root.tag != "robot":
        raise LimitsError(f"{source}: expected a <robot> root element, got <{root.tag}>")
    return root


def _dynamics_mapping(dynamics: str | Path | Mapping[str, Any], source: str
                      ) -> tuple[Mapping[str, Any], str]:
    """(parsed limits YAML, its name for messages)."""
    if isinstance(dynamics, Mapping):
        dyn, dyn_source = dynamics, "dynamics mapping"
    else:
        dyn_source = str(dynamics)
        try:
            dyn = load_yaml(read_text(dynamics, "limits YAML"), dyn_source)
        except TextFileError as exc:
            raise LimitsError(f"{source}: a URDF has no acceleration/jerk limits; {exc}"
                              ) from None
    if not isinstance(dyn, Mapping) or not isinstance(dyn.get("joints"), Mapping):
        raise LimitsError(f"{dyn_source}: expected a top-level 'joints:' mapping")
    return dyn, dyn_source


def _urdf_entry(source: str, name: str, kind: str, lim: ET.Element | None) -> dict[str, Any]:
    """The own-YAML entry of one movable URDF joint (position range and velocity)."""
    if kind == "continuous":
        # a continuous joint has no position range; its <limit> (velocity) is optional
        entry: dict[str, Any] = {"position": None, "continuous": True}
        if lim is not None and lim.get("velocity") is not None:
            entry["velocity"] = lim.get("velocity")
        return entry
    if lim is None or lim.get("velocity") is None:
        raise LimitsError(f"{source}: joint '{name}' ({kind}) has no <limit velocity=...>")
    if lim.get("lower") is None or lim.get("upper") is None:
        raise LimitsError(f"{source}: joint '{name}' ({kind}) needs lower and upper limits")
    return {"velocity": lim.get("velocity"), "position": [lim.get("lower"), lim.get("upper")]}


def _tightened(source: str, dyn_source: str, name: str, entry: Mapping[str, Any],
               extra: Mapping[str, Any]) -> list:
    """URDF row with the limits YAML's values; the YAML may only tighten the URDF."""
    row = list(_parse_entry(source, name, entry, require_all=False))
    over = _parse_entry(dyn_source, name, extra, require_all=False)
    for k in range(5):
        if not math.isnan(over[k]):
            row[k] = max(row[k], over[k]) if k == 0 else (
                min(row[k], over[k]) if not math.isnan(row[k]) else over[k])
    for k, field in ((2, "velocity"), (3, "acceleration"), (4, "jerk")):
        if math.isnan(row[k]):
            where = (f"{source} gives no <limit velocity> and {dyn_source}"
                     if field == "velocity" else dyn_source)
            raise LimitsError(f"{where}: joint '{name}' needs '{field}'")
    return row


def _number(source: str, joint: str, field: str, value: Any) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise LimitsError(f"{source}: joint '{joint}': {field} must be a number, got {value!r}") from None
    if math.isnan(x):
        raise LimitsError(f"{source}: joint '{joint}': {field} is NaN")
    return x


def _parse_entry(source: str, joint: str, entry: Any, require_all: bool
                 ) -> tuple[float, float, float, float, float, bool]:
    """(pmin, pmax, v, a, j, continuous); NaN marks a value the entry does not give."""
    if not isinstance(entry, Mapping):
        raise LimitsError(f"{source}: joint '{joint}': expected a mapping with position, velocity, "
                          f"acceleration, jerk; got {entry!r}")
    known = {"position", "velocity", "acceleration", "jerk", "continuous"}
    unknown = set(entry) - known
    if unknown:
        raise LimitsError(f"{source}: joint '{joint}': unknown field(s) {sorted(unknown)}; "
                          f"expected {sorted(known)}")
    continuous = bool(entry.get("continuous", False))
    pmin = pmax = math.nan
    if "position" in entry:
        pos = entry["position"]
        if pos is None:
            pmin, pmax = -math.inf, math.inf
        elif isinstance(pos, (list, tuple)) and len(pos) == 2:
            pmin = _number(source, joint, "position[0]", pos[0])
            pmax = _number(source, joint, "position[1]", pos[1])
        else:
            raise LimitsError(f"{source}: joint '{joint}': position must be [min, max] or null, "
                              f"got {pos!r}")
    elif require_all:
        if not continuous:
            raise LimitsError(f"{source}: joint '{joint}': missing 'position' ([min, max], or null "
                              "with continuous: true)")
        pmin, pmax = -math.inf, math.inf
    if continuous and math.isfinite(pmin):
        raise LimitsError(f"{source}: joint '{joint}': a continuous joint has no position limits "
                          "(use position: null)")
    out = [pmin, pmax]
    for field in ("velocity", "acceleration", "jerk"):
        if field in entry:
            out.append(_number(source, joint, field, entry[field]))
        elif require_all:
            raise LimitsError(f"{source}: joint '{joint}': missing '{field}'")
        else:
            out.append(math.nan)
    return out[0], out[1], out[2], out[3], out[4], continuous
