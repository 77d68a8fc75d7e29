# SPDX-License-Identifier: Apache-2.0
"""Task feedback: the feature table behind ``sensor_bridge`` and the parser the adapter uses.

The ``feedback`` topic
----------------------
``sensor_bridge`` publishes task feedback as a ``sensor_msgs/JointState`` used as a stamped,
named vector of numbers (no joints are involved):

* ``name``: the feature names, in the bridge's configured order (inputs in the order of the
  ``inputs`` parameter, then each input's ``features`` list). The order is fixed for the
  life of the node, but a consumer must look features up by name, never by position.
* ``position``: the feature values (already scaled, offset and filtered). ``NaN`` means
  the feature is not usable now: no sample has been accepted yet, or its input's latest
  sample is older than that input's ``max_age`` (measured in ROS time).
* ``velocity``, ``effort``: always empty.
* ``header.stamp``: the oldest stamp among the latest samples of the features that are
  valid in this message (for a filtered feature, the stamp of the latest sample that went
  into the filter). It is zero (0 s, 0 ns) when no feature is valid. Stamps are ROS time.
* ``header.frame_id``: empty.

Feature table
-------------
`FeatureTable` holds, per input (`InputSpec`), the latest accepted values and their
stamp; it scales (``scale * raw + offset``), filters (`FilterBank`), decides staleness at
a given time and counts what it accepted and dropped (`InputCounters`). A sample is dropped,
never stored, when a value is not finite, when its stamp is zero, more than ``max_age``
ahead of the clock or older than the input's previous sample, or when it is already older
than ``max_age`` on arrival.

Filters and irregular arrival
-----------------------------
A filter is a discrete-time IIR design from `scipy.signal` (``butter``) at a declared
sample rate, run with `scipy.signal.lfilter` one sample at a time, the state kept per
feature. Each accepted sample is one step of the filter whatever the actual time since the
previous one: the design assumes the sensor really runs at ``sample_rate_hz``; if samples
arrive slower (or faster), the effective cutoff scales down (or up) in proportion. The
filter is (re)started from steady state at the first sample, and again at the first sample
after the input went stale (or the clock jumped back past the stored sample), so a gap never
blends old data into new: the first output after a (re)start equals its input.

Parser
------
`FeedbackParser` turns a received ``feedback`` message (names, values, stamp; plain lists
or arrays, no ROS types) into a `FeatureVector` in a requested feature order, with a
validity flag per feature (missing or non-finite -> NaN and invalid).
"""
from __future__ import annotations

import enum
import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from scipy import signal

FILTER_KINDS = ("none", "butter")
MAX_FILTER_ORDER = 8


class FeedbackError(ValueError):
    """A feedback configuration or a received feedback message is invalid."""


# ---------------------------------------------------------------------------- filters
@dataclass(frozen=True)
class FilterSpec:
    """A low-pass design: ``kind`` 'none' (pass-through) or 'butter' (Butterworth).

    ``order`` in 1..8, ``cutoff_hz`` in (0, sample_rate_hz / 2); both are ignored for 'none'.
    """

    kind: str = "none"
    order: int = 2
    cutoff_hz: float = 0.0
    sample_rate_hz: float = 0.0


def design_filter(spec: FilterSpec, where: str = "filter") -> tuple[np.ndarray, np.ndarray] | None:
    """Transfer-function coefficients ``(b, a)`` for ``spec`` (None for 'none').

    Raises `FeedbackError` naming ``where`` when the settings are not usable.
    """
    if spec.kind not in FILTER_KINDS:
        raise FeedbackError(f"{where}: unknown filter '{spec.kind}'; expected one of "
                            f"{', '.join(FILTER_KINDS)}")
    if spec.kind == "none":
        return None
    if isinstance(spec.order, bool) or not isinstance(spec.order, (int, np.integer)) \
            or not 1 <= spec.order <= MAX_FILTER_ORDER:
        raise FeedbackError(f"{where}: filter order must be an integer in 1..{MAX_FILTER_ORDER}, "
                            f"got {spec.order!r}")
    fs, fc = float(spec.sample_rate_hz), float(spec.cutoff_hz)
    if not (math.isfinite(fs) and fs > 0.0):
        raise FeedbackError(f"{where}: sample_rate_hz must be positive (the rate the sensor "
                            f"publishes at), got {spec.sample_rate_hz!r}")
    if not (math.isfinite(fc) and 0.0 < fc < fs / 2.0):
        raise FeedbackError(f"{where}: cutoff_hz must be above 0 and below half of "
                            f"sample_rate_hz ({fs / 2.0:g} Hz), got {spec.cutoff_hz!r}")
    b, a = signal.butter(int(spec.order), fc, btype="low", fs=fs)
    if not np.all(np.abs(np.roots(a)) < 1.0):
        raise FeedbackError(f"{where}: a Butterworth filter of order {spec.order} at "
                            f"{fc:g} Hz / {fs:g} Hz is numerically unstable; lower the order "
                            "or raise the cutoff")
    return np.asarray(b, float), np.asarray(a, float)


class FilterBank:
    """One filter design applied to ``width`` features, each with its own state.

    `start` (re)initialises every feature's state to steady state at the given values
    (`scipy.signal.lfilter_zi`) and filters them; `step` filters the next sample.
    """

    def __init__(self, spec: FilterSpec, width: int, where: str = "filter") -> None:
        self.spec = spec
        self.width = int(width)
        coeffs = design_filter(spec, where)
        self.b, self.a = coeffs if coeffs is not None else (np.ones(1), np.ones(1))
        self._zi_unit = signal.lfilter_zi(self.b, self.a) if coeffs is not None else None
        self._zi: np.ndarray | None = None

    @property
    def passthrough(self) -> bool:
        """True for kind 'none'."""
        return self._zi_unit is None

    def start(self, x: np.ndarray) -> np.ndarray:
        """Restart every feature at steady state for ``x`` and return the filtered ``x``."""
        if self._zi_unit is None:
            return np.array(x, float)
        self._zi = np.outer(np.asarray(x, float), self._zi_unit)
        return self.step(x)

    def step(self, x: np.ndarray) -> np.ndarray:
        """Filter one sample of every feature (shape ``(width,)``) and return the outputs."""
        if self._zi_unit is None:
            return np.array(x, float)
        if self._zi is None:
            return self.start(x)
        y, self._zi = signal.lfilter(self.b, self.a, np.asarray(x, float)[:, None], axis=1,
                                     zi=self._zi)
        return y[:, 0]


# ---------------------------------------------------------------------------- inputs
@dataclass(frozen=True)
class InputSpec:
    """One sensor input: the features it yields, their scaling, filter and maximum age.

    ``name`` names the input in errors and diagnostics. ``scale``/``offset`` hold one value
    per feature (``value = scale * raw + offset``). ``max_age`` [s] > 0.
    """

    name: str
    features: tuple[str, ...]
    scale: tuple[float, ...]
    offset: tuple[float, ...]
    max_age: float
    filter: FilterSpec = field(default_factory=FilterSpec)

    def __post_init__(self) -> None:
        where = f"input '{self.name}'"
        object.__setattr__(self, "features", tuple(str(f) for f in self.features))
        object.__setattr__(self, "scale", tuple(float(s) for s in self.scale))
        object.__setattr__(self, "offset", tuple(float(s) for s in self.offset))
        n = len(self.features)
        if n == 0:
            raise FeedbackError(f"{where}: no features given")
        seen: set[str] = set()
        for feat in self.features:
            if not feat:
                raise FeedbackError(f"{where}: a feature name is empty")
            if feat in seen:
                raise FeedbackError(f"{where}: feature '{feat}' is listed twice")
            seen.add(feat)
        for key in ("scale", "offset"):
            values = getattr(self, key)
            if len(values) != n:
                raise FeedbackError(f"{where}: {key} has {len(values)} values but there are "
                                    f"{n} features (give one per feature)")
            if not all(math.isfinite(v) for v in values):
                raise FeedbackError(f"{where}: {key} values must be finite, got {list(values)}")
        if not (isinstance(self.max_age, (int, float)) and math.isfinite(self.max_age)
                and self.max_age > 0):
            raise FeedbackError(f"{where}: max_age must be a positive number of seconds, "
                                f"got {self.max_age!r}")
        design_filter(self.filter, where)


class Verdict(enum.Enum):
    """What `FeatureTable.update` did with a sample (the value is a reason for logs)."""

    ACCEPTED = "accepted"
    MALFORMED = "a field could not be read from the message"
    NOT_FINITE = "a value is NaN or infinite"
    BAD_STAMP = ("the stamp is zero, more than max_age ahead of the clock, or older than the "
                 "previous sample (restamp on arrival if the sensor clock is not ROS time)")
    LATE = "the sample is already older than max_age on arrival"


@dataclass
class InputCounters:
    """Per-input counts since start."""

    received: int = 0
    accepted: int = 0
    dropped_malformed: int = 0
    dropped_nan: int = 0
    dropped_stamp: int = 0
    dropped_late: int = 0
    stale_events: int = 0


_DROP_COUNTER = {
    Verdict.MALFORMED: "dropped_malformed",
    Verdict.NOT_FINITE: "dropped_nan",
    Verdict.BAD_STAMP: "dropped_stamp",
    Verdict.LATE: "dropped_late",
}


@dataclass(frozen=True)
class FeedbackSample:
    """The table's content at one time.

    ``values`` (one per feature of ``names``) is NaN where the feature is not valid;
    ``fresh`` holds one flag per input; ``stamp`` is the oldest stamp among fresh inputs
    (None when none is fresh).
    """

    names: tuple[str, ...]
    values: np.ndarray
    fresh: np.ndarray
    stamp: float | None


class _InputState:
    def __init__(self, spec: InputSpec) -> None:
        self.spec = spec
        self.scale = np.asarray(spec.scale, float)
        self.offset = np.asarray(spec.offset, float)
        self.bank = FilterBank(spec.filter, len(spec.features), f"input '{spec.name}'")
        self.values = np.full(len(spec.features), np.nan)
        self.stamp: float | None = None
        self.was_fresh = False
        self.counters = InputCounters()

    def fresh(self, now: float) -> bool:
        if self.stamp is None:
            return False
        age = now - self.stamp
        return -self.spec.max_age <= age <= self.spec.max_age

    def note_staleness(self, now: float) -> bool:
        fresh = self.fresh(now)
        if self.was_fresh and not fresh:
            self.counters.stale_events += 1
        self.was_fresh = fresh
        return fresh


class FeatureTable:
    """Latest value and stamp of every feature of a set of inputs, with staleness.

    Inputs are addressed by their index in ``inputs``. Feature names must be unique
    across inputs. Times are seconds of ROS time.
    """

    def __init__(self, inputs: Sequence[InputSpec]) -> None:
        if not inputs:
            raise FeedbackError("no inputs given")
        owner: dict[str, str] = {}
        input_names: set[str] = set()
        for spec in inputs:
            if spec.name in input_names:
                raise FeedbackError(f"input '{spec.name}' is listed twice")
            input_names.add(spec.name)
            for feat in spec.features:
                if feat in owner:
                    raise FeedbackError(
                        f"feature '{feat}' is produced by inputs '{owner[feat]}' and "
                        f"'{spec.name}'; feature names must be unique")
                owner[feat] = spec.name
        self.inputs: tuple[InputSpec, ...] = tuple(inputs)
        self.names: tuple[str, ...] = tuple(f for s in self.inputs for f in s.features)
        self._states = [_InputState(s) for s in self.inputs]

    def index(self, input_name: str) -> int:
        """Index of the input called ``input_name``."""
        for k, spec in enumerate(self.inputs):
            if spec.name == input_name:
                return k
        raise FeedbackError(f"unknown input '{input_name}'; known: "
                            f"{[s.name for s in self.inputs]}")

    def update(self, k: int, raw: Sequence[float], stamp: float, now: float) -> Verdict:
        """Offer a sample of input ``k`` (raw values, its stamp, the clock now).

        Accepted samples are scaled, offset and filtered, and replace the input's values.
        """
        st = self._states[k]
        st.counters.received += 1
        x = np.asarray(raw, float)
        max_age = st.spec.max_age
        if x.shape != st.values.shape:
            verdict = Verdict.MALFORMED
        elif not np.all(np.isfinite(x)):
            verdict = Verdict.NOT_FINITE
        elif not (math.isfinite(stamp) and stamp > 0.0) or stamp - now > max_age:
            verdict = Verdict.BAD_STAMP
        elif now - stamp > max_age:
            verdict = Verdict.LATE
        else:
            fresh = st.note_staleness(now)
            if fresh and st.stamp is not None and stamp < st.stamp:
                verdict = Verdict.BAD_STAMP
            else:
                y = st.scale * x + st.offset
                st.values = st.bank.step(y) if fresh else st.bank.start(y)
                st.stamp = float(stamp)
                st.was_fresh = True
                st.counters.accepted += 1
                return Verdict.ACCEPTED
        setattr(st.counters, _DROP_COUNTER[verdict],
                getattr(st.counters, _DROP_COUNTER[verdict]) + 1)
        return verdict

    def reject_malformed(self, k: int) -> None:
        """Count a message of input ``k`` whose fields could not be read."""
        counters = self._states[k].counters
        counters.received += 1
        counters.dropped_malformed += 1

    def fresh(self, now: float) -> np.ndarray:
        """One flag per input: it has a sample no older than its max age at ``now``.

        Also counts fresh-to-stale transitions (`InputCounters.stale_events`).
        """
        return np.array([st.note_staleness(now) for st in self._states], bool)

    def snapshot(self, now: float) -> FeedbackSample:
        """Values (NaN where not valid), per-input freshness and oldest valid stamp at ``now``."""
        fresh = self.fresh(now)
        parts = [st.values if ok else np.full(st.values.shape, np.nan)
                 for st, ok in zip(self._states, fresh)]
        stamps = [st.stamp for st, ok in zip(self._states, fresh) if ok]
        return FeedbackSample(self.names, np.concatenate(parts), fresh,
                              min(stamps) if stamps else None)

    def age(self, k: int, now: float) -> float | None:
        """Seconds since the latest accepted sample of input ``k`` (None before any)."""
        stamp = self._states[k].stamp
        return None if stamp is None else now - stamp

    def counters(self, k: int) -> InputCounters:
        """A copy of the counts of input ``k``."""
        c = self._states[k].counters
        return InputCounters(**vars(c))


# ---------------------------------------------------------------------------- parser
@dataclass(frozen=True)
class FeatureVector:
    """Named feature values in a requested order.

    ``values`` is NaN where ``valid`` is False (feature missing from the message or not
    finite). ``stamp`` [s] is the message stamp, None when it was zero (nothing valid).
    """

    names: tuple[str, ...]
    values: np.ndarray
    valid: np.ndarray
    stamp: float | None

    @property
    def all_valid(self) -> bool:
        """True when every requested feature is valid."""
        return bool(np.all(self.valid))


class FeedbackParser:
    """Reads ``feedback`` messages into a fixed feature order (``features``).

    The name-to-index map is cached per distinct name list, so the usual case (the same
    names every message) costs one tuple comparison.
    """

    def __init__(self, features: Sequence[str]) -> None:
        self.features: tuple[str, ...] = tuple(str(f) for f in features)
        if len(set(self.features)) != len(self.features):
            dup = sorted({f for f in self.features if self.features.count(f) > 1})
            raise FeedbackError(f"requested feedback features repeat: {dup}")
        self._names: tuple[str, ...] | None = None
        self._take = np.zeros(len(self.features), int)
        self._present = np.zeros(len(self.features), bool)

    def parse(self, names: Sequence[str], values: Sequence[float], stamp: float) -> FeatureVector:
        """Feature vector for ``names``/``values`` (the message's ``name``/``position``) at
        ``stamp`` [s]. Raises `FeedbackError` when names and values disagree in length or a
        name repeats."""
        names = tuple(names)
        vals = np.asarray(values, float).reshape(-1)
        if vals.shape[0] != len(names):
            raise FeedbackError(f"feedback message has {len(names)} names but "
                                f"{vals.shape[0]} values")
        if names != self._names:
            index: dict[str, int] = {}
            for i, name in enumerate(names):
                if name in index:
                    raise FeedbackError(f"feedback message names feature '{name}' twice")
                index[name] = i
            self._present = np.array([f in index for f in self.features], bool)
            self._take = np.array([index.get(f, 0) for f in self.features], int)
            self._names = names
        out = np.full(len(self.features), np.nan)
        if vals.size:
            out[self._present] = vals[self._take[self._present]]
        valid = self._present & np.isfinite(out)
        out[~valid] = np.nan
        return FeatureVector(self.features, out, valid, float(stamp) if stamp > 0 else None)


def parse_feedback(names: Sequence[str], values: Sequence[float], stamp: float,
                   features: Sequence[str]) -> FeatureVector:
    """One-off `FeedbackParser` use: ``names``/``values``/``stamp`` in the order ``features``."""
    return FeedbackParser(features).parse(names, values, stamp)
