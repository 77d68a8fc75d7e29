# SPDX-License-Identifier: Apache-2.0
"""The watchdog: triggers, the latched stop and the reset rules.

Each trigger has its own threshold parameter and reason text. The first trigger latches a
`Trip` (reason, time, message, values); the decision cycle then brakes to rest through the
limit stage (IEC 60204-1 stop category 2 behaviour: a controlled stop with power kept) and
holds until a reset. `reset` refuses while a persistent cause is still present (stale
inputs, following error, an unexpected input publisher, an external stop still requested)
and says which.

The stop topic cannot say who sent a message (the installed rclpy's message info has no
publisher id), so its ``false`` cannot prove it comes from the node that asked for the
stop: a ``true`` latches the stop request (`request_stop_topic`), ``false`` is ignored, and
only the operator's reset releases it, refused while a ``true`` came within ``reset_hold``
(the requester still holds it).

Triggers and their parameters (`WatchdogConfig`):

==================  ========================================  ===========================
kind                condition                                 parameter
==================  ========================================  ===========================
deviation           planned end state vs reference, per       ``deviation_joint`` [rad],
                    joint or as a norm (in-cycle check)       ``deviation_norm`` [rad]
following_error     measured joint_states vs the command      ``following_error`` [rad],
                    ``command_latency`` earlier               ``command_latency`` [s]
joint_states_stale  no joint_states newer than the timeout    ``joint_states_timeout`` [s]
feedback_stale      a feature the policy needs is stale       ``feedback_timeout`` [s]
reference_stale     no reference window newer than timeout,   ``reference_timeout`` [s]
                    or the window ends before the horizon
policy_fault        NaN/inf/wrong size output or exception    (always on)
overruns            too many late decisions in a window       ``max_overruns`` in
                                                              ``overrun_window`` decisions
external_stop       ``~/stop`` service or the stop topic      (always on)
setpoint_guard      an outgoing setpoint failed the guard     (always on)
stream_fault        an error in the stream thread's loop or   (always on)
                    tick, or in the process's executor
input_source        an input has a publisher that is not      ``sources.*`` (allow-lists;
                    expected (an extra or a changed node),    empty: the one at activation),
                    or a reference window is off the whole    ``path_tolerance`` [rad]
                    reference path
==================  ========================================  ===========================
"""
from __future__ import annotations

import math
import threading
from collections import deque
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

KINDS = ("deviation", "following_error", "joint_states_stale", "feedback_stale",
         "reference_stale", "policy_fault", "overruns", "external_stop", "setpoint_guard",
         "stream_fault", "input_source")
EVENTS_KEPT = 1000   # watchdog events kept (the latest); `Watchdog.total_events` counts all
PERSISTENT = ("following_error", "joint_states_stale", "feedback_stale", "reference_stale",
              "external_stop", "input_source")


# thresholds that stop sooner when lowered (`Watchdog.tighten` changes them while running)
TIGHTER_WHEN_LOWER = ("deviation_joint", "deviation_norm", "following_error",
                      "joint_states_timeout", "feedback_timeout", "reference_timeout",
                      "max_overruns")


class WatchdogError(ValueError):
    """A watchdog parameter is invalid."""


@dataclass(frozen=True)
class WatchdogConfig:
    """Thresholds of every trigger (validated; errors name the parameter)."""

    deviation_joint: float = 0.05
    deviation_norm: float = 0.08
    following_error: float = 0.05
    command_latency: float = 0.012
    joint_states_timeout: float = 0.1
    feedback_timeout: float = 0.25
    reference_timeout: float = 0.25
    max_overruns: int = 3
    overrun_window: int = 20
    feedback_frozen: float = 0.0   # feedback values unchanged this long while moving: stale (0: off)
    reset_hold: float = 0.5        # inputs fresh (feedback changing) this long before a reset
    path_tolerance: float = 0.01   # window points this far from reference/path: off it (0: off)

    def __post_init__(self) -> None:
        for name in ("deviation_joint", "deviation_norm", "following_error",
                     "joint_states_timeout", "feedback_timeout", "reference_timeout"):
            x = getattr(self, name)
            if not (isinstance(x, (int, float)) and math.isfinite(x) and x > 0):
                raise WatchdogError(f"watchdog parameter '{name}' must be a positive number, got {x!r}")
        if not (math.isfinite(self.command_latency) and self.command_latency >= 0):
            raise WatchdogError(f"watchdog parameter 'command_latency' must be >= 0, "
                                f"got {self.command_latency!r}")
        for name in ("feedback_frozen", "reset_hold", "path_tolerance"):
            x = getattr(self, name)
            if not (math.isfinite(x) and x >= 0):
                raise WatchdogError(f"watchdog parameter '{name}' must be >= 0 (0 disables "
                                    f"the check), got {x!r}")
        if int(self.max_overruns) < 1 or int(self.overrun_window) < int(self.max_overruns):
            raise WatchdogError("watchdog parameters need 1 <= max_overruns <= overrun_window, got "
                                f"{self.max_overruns} and {self.overrun_window}")


@dataclass(frozen=True)
class Trip:
    """A latched stop: what fired, when, why, and the values that made it fire."""

    kind: str
    time: float
    message: str
    values: dict[str, Any] = field(default_factory=dict)


@dataclass
class InputAges:
    """Ages [s] of the latest inputs at one instant (``inf`` when never received)."""

    joint_states: float = math.inf
    feedback: float = math.inf
    reference: float = math.inf
    reference_margin: float = math.inf  # window end minus the last time the horizon needs
    feedback_needed: bool = False
    feedback_unchanged: float = 0.0     # how long the feedback values stayed identical while
    #                                     the arm moved


class Watchdog:
    """Evaluates triggers, latches the first trip, counts events and rules on resets."""

    def __init__(self, config: WatchdogConfig, joint_names: tuple[str, ...]) -> None:
        self.config = config
        self.joint_names = joint_names
        self.trip: Trip | None = None
        self.events: list[Trip] = []   # the latest EVENTS_KEPT, oldest first
        self.total_events = 0
        self.counts = {k: 0 for k in KINDS}
        self.stop_requested: str | None = None
        self._stop_topic_true: float | None = None   # latest `true` on the stop topic
        self._overruns: deque[bool] = deque(maxlen=int(config.overrun_window))
        self._deviation_joint = np.full(len(joint_names), float(config.deviation_joint))
        self._lock = threading.Lock()   # fire and reset: latch, counts and events together

    def tighten(self, name: str, value: float) -> None:
        """Lower the threshold ``name`` (one of `TIGHTER_WHEN_LOWER`) while running; takes
        effect at the next check. Raises `WatchdogError` for another name, a higher value
        or one the configuration refuses."""
        if name not in TIGHTER_WHEN_LOWER:
            raise WatchdogError(f"watchdog parameter '{name}' cannot change while running; "
                                f"the ones that can: {', '.join(TIGHTER_WHEN_LOWER)}")
        old = getattr(self.config, name)
        if not value <= old:
            raise WatchdogError(f"watchdog parameter '{name}' can only be lowered while "
                                f"running ({old:g} -> {value:g})")
        config = replace(self.config, **{name: type(old)(value)})
        if name == "deviation_joint":
            self._deviation_joint = np.full(len(self.joint_names), float(value))
        self.config = config

    # ------------------------------------------------------------------ trips
    @property
    def tripped(self) -> bool:
        """True while a trip is latched."""
        return self.trip is not None

    def fire(self, kind: str, time: float, message: str, **values: Any) -> Trip:
        """Latch a trip (the first one wins; later ones are counted and logged only)."""
        if kind not in KINDS:
            raise WatchdogError(f"unknown trigger '{kind}'")
        event = Trip(kind, time, message, values)
        with self._lock:   # the stream thread and the decision thread both fire
            self.counts[kind] += 1
            self.events.append(event)
            if len(self.events) > EVENTS_KEPT:
                del self.events[0]
            self.total_events += 1
            if self.trip is None:
                self.trip = event
        return event

    # ------------------------------------------------------------------ checks
    def deviation(self, planned: np.ndarray, reference: np.ndarray,
                  continuous: np.ndarray) -> tuple[float, float, str | None]:
        """Per-joint max and norm of the planned-vs-reference deviation, and a reason if over."""
        d = planned - reference
        if continuous.any():
            d = np.where(continuous, (d + np.pi) % (2 * np.pi) - np.pi, d)
        ad = np.abs(d)
        i = int(np.argmax(ad))
        worst, norm = float(ad[i]), float(np.sqrt(np.dot(d, d)))
        if ad[i] > self._deviation_joint[i]:
            return worst, norm, (f"planned deviation from the reference {worst:.4g} rad on joint "
                                 f"'{self.joint_names[i]}' exceeds deviation_joint "
                                 f"{self._deviation_joint[i]:.4g} rad")
        if norm > self.config.deviation_norm:
            return worst, norm, (f"planned deviation norm {norm:.4g} rad exceeds deviation_norm "
                                 f"{self.config.deviation_norm:.4g} rad")
        return worst, norm, None

    def following(self, measured: np.ndarray, commanded: np.ndarray) -> tuple[float, str | None]:
        """Largest |measured - commanded| and a reason if over ``following_error``."""
        err = np.abs(measured - commanded)
        i = int(np.argmax(err))
        if not np.isfinite(err[i]):
            return math.inf, f"measured joint_states of joint '{self.joint_names[i]}' is not finite"
        if err[i] > self.config.following_error:
            return float(err[i]), (f"following error {err[i]:.4g} rad on joint "
                                   f"'{self.joint_names[i]}' exceeds following_error "
                                   f"{self.config.following_error:.4g} rad (command "
                                   f"{self.config.command_latency * 1e3:.1f} ms earlier)")
        return float(err[i]), None

    def stale_inputs(self, ages: InputAges) -> list[tuple[str, str]]:
        """(kind, reason) for every input that is too old now."""
        c, out = self.config, []
        if ages.joint_states > c.joint_states_timeout:
            out.append(("joint_states_stale", _age_text("joint_states", ages.joint_states,
                                                        "joint_states_timeout", c.joint_states_timeout)))
        if ages.feedback_needed and ages.feedback > c.feedback_timeout:
            out.append(("feedback_stale", _age_text("feedback", ages.feedback, "feedback_timeout",
                                                    c.feedback_timeout)))
        elif (ages.feedback_needed and c.feedback_frozen > 0.0
              and ages.feedback_unchanged > c.feedback_frozen):
            out.append(("feedback_stale", f"feedback frozen: its values have not changed for "
                        f"{ages.feedback_unchanged:.3f} s while the arm moves (over "
                        f"feedback_frozen {c.feedback_frozen:g} s)"))
        if ages.reference > c.reference_timeout:
            out.append(("reference_stale", _age_text("reference/window", ages.reference,
                                                     "reference_timeout", c.reference_timeout)))
        elif ages.reference_margin < 0.0:
            out.append(("reference_stale", "reference/window ends "
                        f"{-ages.reference_margin * 1e3:.1f} ms before the decision horizon"))
        return out

    def overrun(self, late: bool) -> str | None:
        """Record whether a decision was late; a reason when too many were."""
        self._overruns.append(late)
        count = sum(self._overruns)
        if late and count >= self.config.max_overruns:
            return (f"{count} late decisions in the last {len(self._overruns)} (max_overruns "
                    f"{self.config.max_overruns} in overrun_window {self.config.overrun_window})")
        return None

    def request_stop_topic(self, now: float) -> bool:
        """A ``true`` on the stop topic at ``now``: latch the stop request (held until a
        reset at least ``reset_hold`` after the latest ``true``); True when it is new."""
        self._stop_topic_true = now
        if self.stop_requested is not None:
            return False
        self.stop_requested = "stop topic is true"
        return True

    # ------------------------------------------------------------------ reset
    def reset(self, persisting: list[tuple[str, str]],
              now: float | None = None) -> tuple[bool, str]:
        """Clear the latched trip unless a persistent cause is still present.

        ``persisting`` lists (kind, reason) of causes evaluated now by the caller (stale inputs,
        following error, a policy still failing its test inference...). Given ``now`` (the
        operator's reset of the live adapter), a stop requested on the stop topic is
        released unless a ``true`` came within ``reset_hold``; without it (a recorded reset)
        the request must have been withdrawn already.
        """
        if self.stop_requested is not None:
            held = self._stop_topic_true
            if now is None or (held is not None and now - held < self.config.reset_hold):
                since = ("" if now is None or held is None else
                         f" (the stop topic said true {(now - held) * 1e3:.0f} ms ago; "
                         f"reset_hold {self.config.reset_hold:g} s)")
                persisting = [("external_stop", "a stop is still requested: "
                               f"{self.stop_requested}{since}")] + list(persisting)
        if persisting:
            why = "; ".join(reason for _, reason in persisting)
            return False, f"reset refused: {why}"
        with self._lock:
            was = self.trip
            self.trip = None
            self.stop_requested = self._stop_topic_true = None
            self._overruns.clear()
        if was is None:
            return True, "nothing to reset"
        return True, f"reset after {was.kind}: {was.message}"


def _age_text(what: str, age: float, param: str, limit: float) -> str:
    if math.isinf(age):
        return f"no {what} received ({param} {limit:.3g} s)"
    return f"{what} is {age * 1e3:.0f} ms old (over {param} {limit * 1e3:.0f} ms)"
