# SPDX-License-Identifier: Apache-2.0
"""The pre-flight's judgements, each one row of the table (no ROS: figures in, row out).

Every function takes what was loaded or observed and returns a `Check` with the figure it
judged and, on a failure, the first thing to fix.
"""
from __future__ import annotations

import enum
from dataclasses import dataclass
from typing import Sequence

import numpy as np

RATE_RANGE = (125.0, 1000.0)  # driver command rates [Hz] (common practice)
TIMEOUT_PERIODS = 5           # a driver's command timeout must span this many stream periods
START_BOUND = 0.1             # default largest start distance per joint [rad or m]


class Status(enum.Enum):
    """Outcome of one check."""

    PASS = "pass"
    FAIL = "FAIL"
    SKIP = "skip"


@dataclass(frozen=True)
class Check:
    """One row of the pre-flight table."""

    name: str
    status: Status
    detail: str
    fix: str = ""

    @property
    def failed(self) -> bool:
        """True for a failure (a skipped check is not a failure)."""
        return self.status is Status.FAIL


def passed(name: str, detail: str) -> Check:
    """A passing row."""
    return Check(name, Status.PASS, detail)


def failed(name: str, detail: str, fix: str) -> Check:
    """A failing row with its first fix."""
    return Check(name, Status.FAIL, detail, fix)


def skipped(name: str, why: str) -> Check:
    """A row that could not be checked because an earlier one failed."""
    return Check(name, Status.SKIP, why)


@dataclass(frozen=True)
class JointStatesSeen:
    """What the pre-flight observed on ``joint_states`` for the commanded joints."""

    messages: int
    seen: tuple[bool, ...]          # per commanded joint: named in some message
    first: float                    # receive time of the first message [s] (nan: none)
    last: tuple[float, ...]         # per joint: last receive time [s] (nan: never)
    longest_gap: tuple[float, ...]  # per joint: longest gap between its messages [s]
    updates: tuple[int, ...]        # per joint: messages that named it
    end: float                      # when observation ended [s], same clock
    other_names: tuple[str, ...]    # names seen that are not commanded


def joint_names(joints: Sequence[str], seen: JointStatesSeen, topic: str) -> Check:
    """Every commanded joint is named in some ``joint_states`` message."""
    name = "joint_states names"
    if seen.messages == 0:
        return failed(name, f"no message on '{topic}'",
                      "start the driver, or remap joint_states to the topic it publishes")
    missing = [j for j, s in zip(joints, seen.seen) if not s]
    if missing:
        others = f"; names seen that are not commanded: {list(seen.other_names)}" \
            if seen.other_names else ""
        return failed(name, f"commanded joint(s) {missing} never named in {seen.messages} "
                            f"messages{others}",
                      "make the limits / 'joints' name the driver's joints (or have the "
                      "driver publish them)")
    return passed(name, f"all {len(joints)} commanded joints named ({seen.messages} messages)")


def joint_states_timing(joints: Sequence[str], seen: JointStatesSeen, timeout: float) -> Check:
    """Fresh at the end and no gap longer than the adapter's ``joint_states_timeout``."""
    name = "joint_states fresh"
    if seen.messages == 0:
        return failed(name, "nothing received while waiting",
                      "start the driver's state publisher; check the topic and its QoS")
    if not all(seen.seen):
        return skipped(name, "a commanded joint is never published")
    age = seen.end - np.asarray(seen.last)
    window = seen.end - seen.first
    gap = np.maximum(np.asarray(seen.longest_gap), age)
    j = int(np.argmax(gap))
    rate = min(seen.updates) / window if window > 0 else float("nan")
    detail = (f"slowest joint '{joints[j]}': longest gap {gap[j] * 1e3:.0f} ms "
              f"(limit {timeout * 1e3:.0f} ms), {rate:.0f} Hz over {window:.2f} s")
    if gap[j] > timeout:
        return failed(name, detail, "publish joint_states faster than 1/joint_states_timeout "
                                    "(or raise watchdog.joint_states_timeout if the driver is slow)")
    return passed(name, detail)


def start_distance(joints: Sequence[str], measured: np.ndarray, start: np.ndarray,
                   tolerance: float, bound: float) -> Check:
    """The reference starts within ``bound`` of the measured position on every joint."""
    name = "reference start"
    d = np.abs(np.asarray(start) - np.asarray(measured))
    j = int(np.argmax(d))
    detail = f"farthest joint '{joints[j]}': {d[j]:.4g} from the arm (bound {bound:g})"
    if d[j] > bound:
        return failed(name, detail, f"jog the arm to the reference start ({joints[j]} = "
                                    f"{start[j]:.6g}) or check the reference file")
    if d[j] > tolerance:
        detail += "; the adapter approaches it first"
    return passed(name, detail)


def stream_rate(rate: float, period: float, command_timeout: float | None,
                per_decision: bool) -> Check:
    """The stream rate is a common driver rate and the driver's command timeout spans enough
    periods of what it receives (stream periods, or decision periods for a plan output)."""
    name = "stream rate"
    lo, hi = RATE_RANGE
    if not lo <= rate <= hi:
        return failed(name, f"stream_rate {rate:g} Hz outside {lo:g}-{hi:g} Hz",
                      "set stream_rate to the driver's command rate")
    sent = period if per_decision else 1.0 / rate
    what = "decision" if per_decision else "stream"
    if command_timeout is None:
        return passed(name, f"{rate:g} Hz (no driver command timeout given)")
    detail = (f"{rate:g} Hz; driver command timeout {command_timeout * 1e3:.0f} ms = "
              f"{command_timeout / sent:.1f} {what} periods")
    if command_timeout < TIMEOUT_PERIODS * sent:
        return failed(name, detail, f"the driver's command timeout should span at least "
                                    f"{TIMEOUT_PERIODS} {what} periods "
                                    f"({TIMEOUT_PERIODS * sent * 1e3:.0f} ms)")
    return passed(name, detail)
