# SPDX-License-Identifier: Apache-2.0
"""Training tables from recorded bags: one row per recorded ``following`` decision.

For each decision record on ``adapter/decisions`` (`core.decision_record`) made while the
adapter followed, the row holds:

* ``observation`` (float32, the card's layout): built with `core.cycle.policy_inputs_at`
  (the function the cycle builds its policy inputs with) from the recorded planned state,
  the reference window message whose ``header.stamp`` is the record's ``window_stamp``,
  the feedback message stamped ``feedback_stamp`` (the last received by the record's
  arrival; without a stamp the latest received by then, as replay does) and the previous
  action as the cycle keeps it (the last following decision's raw action, zeros after the
  approach);
* ``action`` (the raw policy output recorded), ``admissible_low`` / ``admissible_high``,
  ``u`` (committed acceleration), ``time``, ``position``, ``velocity``, ``acceleration``
  (the planned state at the decision), ``feedback`` and ``feedback_valid`` (the card's
  features as the policy read them), ``deviation_max``, ``deviation_norm``;
* the reward of `adaptive_streamer.training.reward` as the environment gives it for that
  decision: ``reward_task`` from the task feature of the feedback the *next* decision read
  (NaN for the last row), ``reward_deviation``, ``reward_smoothness``, ``reward``;
* ``bag`` (index of the bag the row came from, into the table's ``bags``).

`write_table` stores the concatenated rows of several bags as NPZ (plus ``bags``,
``joints``, ``features``, ``observation_layout``: the layout's description).
A policy swap during a recording resets the previous action live but is not recorded: a
row right after a swap may then differ in its ``previous_action`` block.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from ..core.alignment import AlignmentError
from ..core.cycle import Decision, policy_inputs_at
from ..core.feedback import FeatureVector, FeedbackParser
from ..core.policies.card import PolicyCard, load_card
from ..core.watchdog import WatchdogConfig
from ..io.bag_io import Bag, BagError, TopicData, read_bag
from ..io.messages import JointStateReader, MessageError, WindowReader, decision_records, \
    header_stamps
from .reward import RewardWeights, reward_terms

WINDOW_TOPIC = "reference/window"
FEEDBACK_TOPIC = "feedback"
DECISIONS_TOPIC = "adapter/decisions"
TOPICS = (WINDOW_TOPIC, FEEDBACK_TOPIC, DECISIONS_TOPIC)
COLUMNS = ("observation", "action", "admissible_low", "admissible_high", "u", "time",
           "position", "velocity", "acceleration", "feedback", "feedback_valid",
           "deviation_max", "deviation_norm", "reward_task", "reward_deviation",
           "reward_smoothness", "reward", "bag")


class DatasetError(ValueError):
    """A bag cannot be turned into a table (topic missing, joints differ...)."""


@dataclass(frozen=True)
class Table:
    """Columns of one table (name -> array with one row per decision)."""

    columns: dict[str, np.ndarray]

    @property
    def rows(self) -> int:
        """Number of decisions."""
        return int(self.columns["time"].shape[0])


class _Topic:
    """Messages of one topic with their header stamps (messages found by stamp)."""

    def __init__(self, data: TopicData) -> None:
        self.data = data
        self.stamps = header_stamps(data.raw)

    def with_stamp(self, stamp: float, now_ns: int) -> int | None:
        hits = np.flatnonzero(self.stamps == stamp)
        if hits.size == 0:
            return None
        before = hits[self.data.times[hits] <= now_ns]
        return int(before[-1] if before.size else hits[0])

    def latest(self, now_ns: int) -> int | None:
        i = int(np.searchsorted(self.data.times, now_ns, side="right")) - 1
        return i if i >= 0 else None


def _topic(bag: Bag, name: str, required: bool) -> _Topic | None:
    data = bag.get(name) or bag.get("/" + name)
    if data is None or len(data) == 0:
        if required:
            raise DatasetError(f"{bag.path}: no messages on topic '{name}' (needed for the "
                               f"table); topics in the bag: {sorted(bag.all_topics)}")
        return None
    return _Topic(data)


def bag_table(path: str | Path, card: PolicyCard | str | Path,
              reward: RewardWeights | None = None, watchdog: WatchdogConfig | None = None,
              index: int = 0) -> Table:
    """The table of one bag for ``card`` (see the module docstring)."""
    card = card if isinstance(card, PolicyCard) else load_card(card)
    weights = reward or RewardWeights()
    limit = (watchdog or WatchdogConfig()).deviation_norm
    try:
        bag = read_bag(path, lambda topic: topic.lstrip("/") in TOPICS)
    except BagError as exc:
        raise DatasetError(f"{path}: {exc}") from None
    rec_topic = _topic(bag, DECISIONS_TOPIC, True)
    windows = _topic(bag, WINDOW_TOPIC, True)
    feedback_topic = _topic(bag, FEEDBACK_TOPIC, bool(card.feedback_features))
    try:
        records, idx = decision_records(rec_topic.data.raw)
    except MessageError as exc:
        raise DatasetError(f"{path}: topic '{DECISIONS_TOPIC}': {exc}") from None
    n = len(card.joints)
    if records and records[0].u.shape[0] != n:
        raise DatasetError(f"{path}: decision records are for {records[0].u.shape[0]} joints, "
                           f"the card '{card.source}' for {n} ({list(card.joints)})")
    rec_ns = rec_topic.data.times[np.asarray(idx, np.intp)]
    layout = card.observation_layout()
    offsets = np.arange(max(2, layout.horizon)) * card.decision_period
    wreader, sreader = WindowReader(card.joints), JointStateReader()
    parser = FeedbackParser(card.feedback_features) if card.feedback_features else None
    task_parser = FeedbackParser((weights.task_feature,))
    jt = card.limits.jerk_max * card.decision_period
    previous = np.zeros(n)
    rows: list[dict[str, np.ndarray | float]] = []
    task_next: list[float] = []

    def message(stamp: float, now_ns: int) -> bytes | None:
        if feedback_topic is None:
            return None
        i = (feedback_topic.with_stamp(stamp, now_ns) if not math.isnan(stamp)
             else feedback_topic.latest(now_ns))
        return None if i is None else feedback_topic.data.raw[i]

    def parse(p: FeedbackParser, raw: bytes | None) -> FeatureVector | None:
        if raw is None:
            return None
        try:
            names, values, _, sec, nsec = sreader.read(raw)
        except (ValueError, MessageError):
            return None
        return p.parse(names, values, sec + nsec * 1e-9)

    for d, now_ns in zip(records, rec_ns):
        if d.mode == "following":
            wi = windows.with_stamp(d.window_stamp, int(now_ns))
            raw = message(d.feedback_stamp, int(now_ns))
            fv = parse(parser, raw) if parser is not None else None
            if rows:
                tv = parse(task_parser, raw)
                task_next.append(float(tv.values[0]) if tv is not None and tv.valid[0]
                                 else math.nan)
            if wi is not None:
                try:
                    pin = policy_inputs_at(d.time, d.state, wreader.read(windows.data.raw[wi]),
                                           fv, previous, offsets)
                except (AlignmentError, MessageError, ValueError) as exc:
                    raise DatasetError(f"{path}: decision at t = {d.time:.3f} s: the "
                                       f"reference window stamped {d.window_stamp} cannot be "
                                       f"used: {exc}") from None
                rows.append(_row(d, layout.build(pin), fv, card.feedback_features))
        previous = _previous_after(d, previous)
    task_next.append(math.nan)
    return Table(_columns(rows, task_next[:len(rows)], weights, limit, jt, n,
                          len(card.feedback_features), layout.size, index))


def _previous_after(d: Decision, previous: np.ndarray) -> np.ndarray:
    """The cycle's previous action after committing ``d`` (`DecisionCycle.commit`)."""
    if d.next_mode == "following" and d.mode == "approaching":
        return np.zeros_like(previous)
    if d.mode == "following" and d.verdict == "ok":
        return d.action
    return previous


def _row(d: Decision, obs: np.ndarray, fv: FeatureVector | None,
         features: tuple[str, ...]) -> dict[str, np.ndarray | float]:
    k = len(features)
    return {"observation": obs, "action": d.action, "admissible_low": d.lo,
            "admissible_high": d.hi, "u": d.u, "time": d.time, "position": d.state.position,
            "velocity": d.state.velocity, "acceleration": d.state.acceleration,
            "feedback": fv.values if fv is not None else np.full(k, np.nan),
            "feedback_valid": fv.valid if fv is not None else np.zeros(k, bool),
            "deviation_max": d.deviation_max, "deviation_norm": d.deviation_norm}


def _columns(rows: list[dict], task: list[float], weights: RewardWeights, limit: float,
             jt: np.ndarray, n: int, k: int, size: int, index: int) -> dict[str, np.ndarray]:
    shapes = {"observation": (size,), "feedback": (k,), "feedback_valid": (k,)}
    cols: dict[str, np.ndarray] = {}
    for name in COLUMNS[:13]:
        shape = shapes.get(name, () if name in ("time", "deviation_max", "deviation_norm")
                           else (n,))
        dtype = np.float32 if name == "observation" else bool if name == "feedback_valid" \
            else float
        cols[name] = (np.array([r[name] for r in rows], dtype) if rows
                      else np.zeros((0, *shape), dtype))
    terms = reward_terms(weights, np.asarray(task, float), cols["deviation_norm"], limit,
                         cols["u"], cols["acceleration"], jt)
    m = len(rows)
    cols["reward_task"] = np.where(np.isfinite(task), terms.task, np.nan) if m else np.zeros(0)
    cols["reward_deviation"] = np.asarray(terms.deviation, float).reshape(m)
    cols["reward_smoothness"] = np.asarray(terms.smoothness, float).reshape(m)
    cols["reward"] = cols["reward_task"] * cols["reward_deviation"] * cols["reward_smoothness"]
    cols["bag"] = np.full(m, index, np.int64)
    return cols


def write_table(bags: Sequence[str | Path], card: PolicyCard | str | Path, out: str | Path,
                reward: RewardWeights | None = None,
                watchdog: WatchdogConfig | None = None) -> Table:
    """Tables of ``bags`` concatenated and written to ``out`` (NPZ); the table."""
    card = card if isinstance(card, PolicyCard) else load_card(card)
    if not bags:
        raise DatasetError("no bags given")
    tables = [bag_table(b, card, reward, watchdog, i) for i, b in enumerate(bags)]
    cols = {name: np.concatenate([t.columns[name] for t in tables]) for name in COLUMNS}
    np.savez(out, **cols, bags=np.array([str(b) for b in bags]),
             joints=np.array(card.joints), features=np.array(card.feedback_features),
             observation_layout=np.array(card.observation_layout().describe()))
    return Table(cols)
