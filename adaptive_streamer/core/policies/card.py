# SPDX-License-Identifier: Apache-2.0
"""Policy cards: one YAML file that fully describes a policy.

Format (version 1)
------------------
::

    policy_card: 1                 # format version (required)
    name: edge_follow_demo         # required, free text
    description: ...               # optional, free text
    kind: onnx                     # required: onnx | tracker | linear_feedback | hold
    joints: [j1, j2, j3, j4, j5, j6]   # required: the joint order of actions and observations
    decision_period: 0.05          # required [s]
    limits: limits.yaml            # required: the limits the policy was made/trained for
    ...kind-specific fields...

``limits`` is a path (own limits YAML or URDF, see `adaptive_streamer.core.limits`) or an
inline ``{joints: {...}}`` mapping in the limits format; a file may list more joints than
the card (the card's joints are taken from it). Relative paths are relative to the card's
folder. Every number must be finite; unknown fields, and fields the kind does not use, are
refused (catches typos).

``kind: onnx`` (a learned policy in an ONNX file):

* ``model`` (required): path of the ``.onnx`` file.
* ``action`` (required): ``normalised`` (each output in [-1, 1] is mapped onto the
  admissible interval of the next acceleration) or ``acceleration`` (the next acceleration
  [rad/s^2], clipped into that interval).
* ``observation`` (required): the list of blocks concatenated into the model's float32
  input; see `adaptive_streamer.core.observation` for the values. An entry is a block name
  or a mapping with ``block`` and its parameters::

      - joint_position                 # no parameters
      - joint_velocity
      - joint_acceleration
      - {block: reference_position, horizon: 5, scale: 0.1}  # horizon >= 1 required;
                                       #   scale [rad] > 0, one number or one per joint, default 1
      - {block: reference_velocity, horizon: 5}              # horizon required
      - {block: reference_acceleration, horizon: 5}          # horizon required
      - {block: feedback, features: [edge_offset, edge_angle], scale: [0.005, 0.02],
         offset: [0, 0]}               # features required; scale (non-zero) and offset:
                                       #   one number or one per feature, defaults 1 and 0
      - previous_action

* ``onnx`` (optional): ``{input: NAME, output: NAME, intra_op_threads: 1}``; ``input`` and
  ``output`` may be omitted when the model has exactly one input / output; threads >= 1
  (default 1).

The model must take a float32 input of shape ``(size,)`` or ``(1, size)`` (a dynamic first
dimension counts as 1) and give a float32 output of shape ``(n,)`` or ``(1, n)``; it must be
stateless (use the ``previous_action`` block for memory).

``kind: tracker`` (reference tracking, `adaptive_streamer.core.policies.tracker`):

* ``gains`` (optional): ``{kp: ..., kd: ..., feedforward: ...}``, each one number (all
  joints) or one per joint; kp [1/s^2] and kd [1/s] >= 0. Missing gains complete a
  critically damped pair: neither given -> ``kp = w^2, kd = 2 w`` with ``w = 0.15 pi / T``
  (2 pi x 1.5 rad/s at T = 50 ms, see `default_natural_frequency`); only kp -> ``kd = 2
  sqrt(kp)``; only kd -> ``kp = (kd / 2)^2``. ``feedforward`` defaults to 1.
* ``action`` (optional): ``acceleration`` (the only meaning).

``kind: linear_feedback``: the tracker plus a linear feedback term:

* ``gains``, ``action``: as the tracker.
* ``feedback_gain`` (required)::

      feedback_gain:
        features: [edge_offset]     # feature names (distinct)
        matrix: [[0.0], [12.0], [0.0], [0.0], [0.0], [0.0]]
                                    # rows = joints (card order), columns = features;
                                    # joint acceleration [rad/s^2] per unit of feature

``kind: hold``: brings the joints to rest (the cycle applies the braking decision);
``action`` (optional): ``brake``.

Checking against the adapter
----------------------------
`check_card` refuses a card whose joints, decision period or limits differ from the
adapter's `RunningConfig` (both values shown), that reads more reference points than the
adapter provides per decision, or that needs feedback features the adapter does not
receive.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from ..limits import JointLimits, LimitsError
from ..text_files import TextFileError, load_yaml, read_text
from ..observation import BLOCK_KINDS, HORIZON_BLOCKS, ObservationBlock, ObservationLayout
from .running import PolicyError, RunningConfig

CARD_VERSION = 1
KINDS = ("onnx", "tracker", "linear_feedback", "hold")
_COMMON_REQUIRED = ("policy_card", "name", "kind", "joints", "decision_period", "limits")
_COMMON_OPTIONAL = ("description",)
_KIND_FIELDS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {  # (required, optional)
    "onnx": (("model", "action", "observation"), ("onnx",)),
    "tracker": ((), ("gains", "action")),
    "linear_feedback": (("feedback_gain",), ("gains", "action")),
    "hold": ((), ("action",)),
}
_KIND_ACTIONS = {"onnx": ("normalised", "acceleration"), "tracker": ("acceleration",),
                 "linear_feedback": ("acceleration",), "hold": ("brake",)}
_BLOCK_PARAMS = {"reference_position": ("horizon", "scale"),
                 "reference_velocity": ("horizon",), "reference_acceleration": ("horizon",),
                 "feedback": ("features", "scale", "offset")}
TRACKING_POINTS = 2  # the tracker reads the reference at t_k and one period ahead


class CardError(PolicyError):
    """A policy card is malformed, or does not fit the adapter's running configuration."""


@dataclass(frozen=True)
class OnnxOptions:
    """ONNX settings of a card: input/output names (None: the only one) and threads."""

    input: str | None = None
    output: str | None = None
    intra_op_threads: int = 1


@dataclass(frozen=True, eq=False)
class TrackerGains:
    """Per-joint tracking gains (arrays (n,)): kp [1/s^2], kd [1/s], feed-forward factor."""

    kp: np.ndarray
    kd: np.ndarray
    feedforward: np.ndarray


@dataclass(frozen=True, eq=False)
class FeedbackGain:
    """Joint acceleration per unit feature: ``matrix`` (n, f) for ``features`` (f,)."""

    features: tuple[str, ...]
    matrix: np.ndarray


@dataclass(frozen=True, eq=False)
class PolicyCard:
    """A parsed, validated policy card. ``source`` names the file (or the built-in card)."""

    source: str
    name: str
    kind: str
    joints: tuple[str, ...]
    decision_period: float
    limits: JointLimits
    action: str
    description: str = ""
    observation: tuple[ObservationBlock, ...] = ()
    model: Path | None = None
    onnx: OnnxOptions | None = None
    gains: TrackerGains | None = None
    feedback_gain: FeedbackGain | None = None

    @property
    def feedback_features(self) -> tuple[str, ...]:
        """Feedback features the policy reads (in first-use order)."""
        names: list[str] = []
        for block in self.observation:
            names.extend(f for f in block.features if f not in names)
        if self.feedback_gain is not None:
            names.extend(f for f in self.feedback_gain.features if f not in names)
        return tuple(names)

    @property
    def reference_points(self) -> int:
        """Reference points the policy reads per decision (rows of ``ref_*``)."""
        if self.kind in ("tracker", "linear_feedback"):
            return TRACKING_POINTS
        return max((b.horizon for b in self.observation), default=1)

    def observation_layout(self) -> ObservationLayout:
        """The layout of this card's observation (its blocks and limits)."""
        return ObservationLayout(self.observation, self.limits)


def default_natural_frequency(period: float) -> float:
    """Default tracker natural frequency ``w = 0.15 pi / T`` [rad/s] (2 pi x 1.5 at 50 ms).

    With ``kp = w^2, kd = 2 w`` the loop is critically damped with a -3 dB bandwidth of
    about 0.64 w, i.e. 1/20 of the decision rate: sampling at 20 or more times the
    closed-loop bandwidth is the usual rule for digital control (common practice; e.g.
    Franklin, Powell & Workman, Digital Control of Dynamic Systems, 3rd ed., 1998, from
    memory). Scaling with 1/T keeps the discrete loop's poles the same for every period.
    """
    return 0.15 * math.pi / period


def load_card(card_path: str | Path) -> PolicyCard:
    """Read and validate a policy card file (relative paths resolve from its folder)."""
    path = Path(card_path)
    try:
        data = load_yaml(read_text(path, "policy card"), str(path))
    except TextFileError as exc:
        raise CardError(str(exc)) from None
    return parse_card(data, str(path), path.parent)


def parse_card(data: Any, source: str, folder: Path) -> PolicyCard:
    """Validate the card structure ``data``; errors name ``source`` and the field."""
    if not isinstance(data, Mapping):
        raise CardError(f"{source}: a policy card must be a YAML mapping, got "
                        f"{type(data).__name__}")
    version = data.get("policy_card")
    if version != CARD_VERSION or isinstance(version, bool):
        raise CardError(f"{source}: policy_card: expected format version {CARD_VERSION}, got "
                        f"{version!r}")
    kind = data.get("kind")
    if kind not in KINDS:
        raise CardError(f"{source}: kind: unknown policy kind {kind!r}; expected one of "
                        f"{', '.join(KINDS)}")
    required, optional = _KIND_FIELDS[kind]
    allowed = _COMMON_REQUIRED + _COMMON_OPTIONAL + required + optional
    extra = [str(k) for k in data if k not in allowed]
    if extra:
        raise CardError(f"{source}: unknown or unused field(s) {extra} for kind '{kind}'; "
                        f"allowed: {list(allowed)}")
    missing = [k for k in _COMMON_REQUIRED + required if k not in data]
    if missing:
        raise CardError(f"{source}: missing required field(s) {missing} for kind '{kind}'")
    name = data["name"]
    if not isinstance(name, str) or not name.strip():
        raise CardError(f"{source}: name: expected a non-empty string, got {name!r}")
    description = data.get("description", "")
    if not isinstance(description, str):
        raise CardError(f"{source}: description: expected a string, got {description!r}")
    joints = _names(source, "joints", data["joints"])
    period = _number(source, "decision_period", data["decision_period"])
    if period <= 0.0:
        raise CardError(f"{source}: decision_period: must be positive [s], got {period}")
    limits = _limits(source, data["limits"], joints, folder)
    action = data.get("action", _KIND_ACTIONS[kind][0])
    if action not in _KIND_ACTIONS[kind]:
        raise CardError(f"{source}: action: {action!r} is not possible for kind '{kind}'; "
                        f"expected {' or '.join(_KIND_ACTIONS[kind])}")
    n = len(joints)
    card: dict[str, Any] = {}
    if kind == "onnx":
        card["observation"] = _observation(source, data["observation"], n)
        card["model"] = _model(source, data["model"], folder)
        card["onnx"] = _onnx_options(source, data.get("onnx", {}))
    if kind in ("tracker", "linear_feedback"):
        card["gains"] = _gains(source, data.get("gains", {}), joints, period)
    if kind == "linear_feedback":
        card["feedback_gain"] = _feedback_gain(source, data["feedback_gain"], joints)
    return PolicyCard(source, name, kind, joints, period, limits, action, description, **card)


def check_card(card: PolicyCard, running: RunningConfig) -> None:
    """Refuse ``card`` when it does not fit ``running`` (every mismatch, both values)."""
    problems = []
    if card.joints != running.joints:
        problems.append(f"joints: card {list(card.joints)} vs running {list(running.joints)}")
    elif not card.limits.same_as(running.limits):
        problems.append(f"limits differ (card vs running): "
                        f"{card.limits.describe_difference(running.limits)}")
    if not math.isclose(card.decision_period, running.decision_period, rel_tol=1e-9):
        problems.append(f"decision_period: card {card.decision_period:g} s vs running "
                        f"{running.decision_period:g} s")
    if card.reference_points > running.horizon:
        problems.append(f"the policy reads {card.reference_points} reference points per "
                        f"decision, the adapter provides {running.horizon} (horizon)")
    absent = [f for f in card.feedback_features if f not in running.features]
    if absent:
        problems.append(f"feedback features {absent} are not available; the adapter receives "
                        f"{list(running.features)}")
    if problems:
        raise CardError(f"{card.source}: policy card does not fit the adapter: "
                        + "; ".join(problems))


# ---------------------------------------------------------------------------- fields
def _number(source: str, field: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise CardError(f"{source}: {field}: expected a number, got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise CardError(f"{source}: {field}: must be finite, got {x}")
    return x


def _numbers(source: str, field: str, value: Any, count: int, what: str) -> np.ndarray:
    """One number (broadcast) or ``count`` numbers."""
    items = value if isinstance(value, (list, tuple)) else [value]
    if len(items) not in (1, count):
        raise CardError(f"{source}: {field}: expected one number or {count} ({what}), got "
                        f"{len(items)}")
    arr = np.array([_number(source, f"{field}[{i}]", x) for i, x in enumerate(items)])
    return np.full(count, arr[0]) if arr.size == 1 else arr


def _names(source: str, field: str, value: Any) -> tuple[str, ...]:
    if not isinstance(value, (list, tuple)) or not value \
            or not all(isinstance(x, str) and x for x in value):
        raise CardError(f"{source}: {field}: expected a non-empty list of names, got {value!r}")
    repeated = sorted({x for x in value if value.count(x) > 1})
    if repeated:
        raise CardError(f"{source}: {field}: names repeat: {repeated}")
    return tuple(value)


def _limits(source: str, value: Any, joints: tuple[str, ...], folder: Path) -> JointLimits:
    try:
        if isinstance(value, str):
            limits = JointLimits.from_file(folder / value)
        elif isinstance(value, Mapping):
            limits = JointLimits.from_mapping(value, source=f"{source}: limits")
        else:
            raise CardError(f"{source}: limits: expected a limits file path or an inline "
                            f"{{joints: ...}} mapping, got {value!r}")
    except LimitsError as exc:  # messages name the limits file, or the card for inline limits
        where = "" if isinstance(value, Mapping) else f"{source}: limits: "
        raise CardError(f"{where}{exc}") from None
    absent = [j for j in joints if j not in limits.names]
    if absent:
        raise CardError(f"{source}: limits: joint(s) {absent} of the card are not in the "
                        f"limits (which have {list(limits.names)})")
    return limits if limits.names == joints else limits.subset(joints)


def _model(source: str, value: Any, folder: Path) -> Path:
    if not isinstance(value, str) or not value:
        raise CardError(f"{source}: model: expected the path of an .onnx file, got {value!r}")
    path = folder / value
    if not path.is_file():
        raise CardError(f"{source}: model: file '{path}' not found (relative paths resolve "
                        f"from the card's folder)")
    return path


def _onnx_options(source: str, value: Any) -> OnnxOptions:
    if not isinstance(value, Mapping):
        raise CardError(f"{source}: onnx: expected a mapping {{input, output, "
                        f"intra_op_threads}}, got {value!r}")
    extra = [str(k) for k in value if k not in ("input", "output", "intra_op_threads")]
    if extra:
        raise CardError(f"{source}: onnx: unknown field(s) {extra}; allowed: input, output, "
                        f"intra_op_threads")
    for key in ("input", "output"):
        if key in value and (not isinstance(value[key], str) or not value[key]):
            raise CardError(f"{source}: onnx.{key}: expected a tensor name, got {value[key]!r}")
    threads = value.get("intra_op_threads", 1)
    if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
        raise CardError(f"{source}: onnx.intra_op_threads: expected an integer >= 1, got "
                        f"{threads!r}")
    return OnnxOptions(value.get("input"), value.get("output"), threads)


def _observation(source: str, value: Any, n: int) -> tuple[ObservationBlock, ...]:
    if not isinstance(value, list) or not value:
        raise CardError(f"{source}: observation: expected a non-empty list of blocks, got "
                        f"{value!r}")
    return tuple(_block(source, f"observation[{k}]", entry, n) for k, entry in enumerate(value))


def _block(source: str, field: str, entry: Any, n: int) -> ObservationBlock:
    params: Mapping[str, Any] = {}
    if isinstance(entry, Mapping):
        kind, params = entry.get("block"), {k: v for k, v in entry.items() if k != "block"}
    else:
        kind = entry
    if kind not in BLOCK_KINDS:
        raise CardError(f"{source}: {field}: unknown block {kind!r}; expected one of "
                        f"{', '.join(BLOCK_KINDS)} (a name, or a mapping with 'block')")
    allowed = _BLOCK_PARAMS.get(kind, ())
    extra = [str(k) for k in params if k not in allowed]
    if extra:
        raise CardError(f"{source}: {field} ({kind}): unknown parameter(s) {extra}; allowed: "
                        f"{list(allowed) or 'none'}")
    where = f"{field} ({kind})"
    if kind in HORIZON_BLOCKS:
        h = params.get("horizon")
        if isinstance(h, bool) or not isinstance(h, int) or h < 1:
            raise CardError(f"{source}: {where}: horizon: expected an integer >= 1 (reference "
                            f"points), got {h!r}")
        scale = (1.0,)
        if "scale" in params:
            s = _numbers(source, f"{where}: scale", params["scale"], n, "one per joint")
            if not np.all(s > 0.0):
                raise CardError(f"{source}: {where}: scale: must be positive, got {s.tolist()}")
            scale = tuple(s.tolist())
        return ObservationBlock(kind, horizon=h, scale=scale)
    if kind == "feedback":
        if "features" not in params:
            raise CardError(f"{source}: {where}: missing 'features' (list of feature names)")
        features = _names(source, f"{where}: features", params["features"])
        f = len(features)
        scale = _numbers(source, f"{where}: scale", params.get("scale", 1.0), f, "one per feature")
        if not np.all(scale != 0.0):
            raise CardError(f"{source}: {where}: scale: must be non-zero, got {scale.tolist()}")
        offset = _numbers(source, f"{where}: offset", params.get("offset", 0.0), f,
                          "one per feature")
        return ObservationBlock(kind, features=features, scale=tuple(scale.tolist()),
                                offset=tuple(offset.tolist()))
    return ObservationBlock(kind)


def _gains(source: str, value: Any, joints: tuple[str, ...], period: float) -> TrackerGains:
    if not isinstance(value, Mapping):
        raise CardError(f"{source}: gains: expected a mapping {{kp, kd, feedforward}}, got "
                        f"{value!r}")
    extra = [str(k) for k in value if k not in ("kp", "kd", "feedforward")]
    if extra:
        raise CardError(f"{source}: gains: unknown field(s) {extra}; allowed: kp, kd, "
                        f"feedforward")
    n = len(joints)
    got = {k: _numbers(source, f"gains.{k}", value[k], n, f"one per joint {list(joints)}")
           for k in value}
    for k in ("kp", "kd"):
        if k in got and not np.all(got[k] >= 0.0):
            raise CardError(f"{source}: gains.{k}: must be >= 0, got {got[k].tolist()}")
    if "kp" not in got and "kd" not in got:
        w = default_natural_frequency(period)
        got["kp"], got["kd"] = np.full(n, w * w), np.full(n, 2.0 * w)
    elif "kd" not in got:
        got["kd"] = 2.0 * np.sqrt(got["kp"])
    elif "kp" not in got:
        got["kp"] = 0.25 * got["kd"] ** 2
    ff = got.get("feedforward", np.ones(n))
    return TrackerGains(got["kp"], got["kd"], ff)


def _feedback_gain(source: str, value: Any, joints: tuple[str, ...]) -> FeedbackGain:
    if not isinstance(value, Mapping) or set(value) != {"features", "matrix"}:
        raise CardError(f"{source}: feedback_gain: expected a mapping with exactly 'features' "
                        f"and 'matrix', got {value!r}")
    features = _names(source, "feedback_gain.features", value["features"])
    rows = value["matrix"]
    n, f = len(joints), len(features)
    if not isinstance(rows, list) or len(rows) != n \
            or not all(isinstance(r, list) and len(r) == f for r in rows):
        raise CardError(f"{source}: feedback_gain.matrix: expected {n} rows (joints "
                        f"{list(joints)}) of {f} numbers (features {list(features)}), got "
                        f"{rows!r}")
    matrix = np.array([[_number(source, f"feedback_gain.matrix[{i}][{j}]", x)
                        for j, x in enumerate(r)] for i, r in enumerate(rows)])
    return FeedbackGain(features, matrix)
