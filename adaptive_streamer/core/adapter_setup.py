# SPDX-License-Identifier: Apache-2.0
"""The adapter's streaming session, built from its parameter values (no ROS).

`build_session` IS the adapter node's configure step (``nodes/adapter.py`` calls it with
its parameter values) and the offline replay's: the same parameter names and `DEFAULTS`,
limits, running configuration, policy, approach tracker, watchdog and cycle settings, so a
replay decides exactly as the live node did. (`adaptive_streamer.io.params_files` reads the
adapter's section of a standard ROS 2 params file.)

Policies: a card path, or a built-in kind (``tracker``, ``hold``) (e.g. replay's
``--policy``).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping


from .cycle import CycleConfig
from .feedback import FeedbackParser
from .limits import JointLimits
from .policies import BUILT_IN_KINDS, build_policy, load_card, load_policy, policy_for_kind
from .policies.base import RunningConfig
from .session import StreamingSession
from .watchdog import WatchdogConfig

WATCHDOG_PARAMS = ("deviation_joint", "deviation_norm", "following_error", "command_latency",
                   "joint_states_timeout", "feedback_timeout", "reference_timeout",
                   "max_overruns", "overrun_window", "feedback_frozen", "reset_hold",
                   "path_tolerance")
_WD = WatchdogConfig()
DEFAULTS: dict[str, Any] = {
    "policy": "", "shadow_policy": "", "limits_file": "", "limits_dynamics": "",
    "joints": [""], "decision_period": 0.05, "stream_rate": 250.0, "horizon": 10,
    "limit_scale": 1.0, "features": [""], "outputs": ["position"],
    "approach_scale": 0.3, "approach_tolerance": 2e-3, "approach_bandwidth": 4.0,
    "plan_lead": 0.01, "stream_jitter": 0.02,
    **{f"watchdog.{k}": getattr(_WD, k) for k in WATCHDOG_PARAMS},
}


class SetupError(ValueError):
    """The adapter parameters or the policy cannot make a session (names the parameter)."""


@dataclass
class SessionSetup:
    """A configured session and what was used to build it."""

    session: StreamingSession
    running: RunningConfig
    parser: FeedbackParser | None
    rate: float
    policy_label: str
    params: dict[str, Any] = field(default_factory=dict)
    limits_note: str = ""  # URDF joints left out of the limits (one line; '' when none)

    @property
    def joints(self) -> tuple[str, ...]:
        """Joint order of the session."""
        return self.running.joints

    @property
    def period(self) -> float:
        """Decision period [s]."""
        return self.running.decision_period


def _get(params: Mapping[str, Any], name: str) -> Any:
    return params.get(name, DEFAULTS[name])


def _limits(params: Mapping[str, Any], robot_description: str | None) -> JointLimits:
    path = _get(params, "limits_file")
    dyn = _get(params, "limits_dynamics") or None
    joints = [j for j in _get(params, "joints") if j]
    if path:
        return JointLimits.from_file(path, dyn, joints=joints)
    if robot_description is None:
        raise SetupError("limits_file is empty and no robot_description was received")
    if not dyn:
        raise SetupError("limits from robot_description need limits_dynamics (a limits "
                         "YAML with acceleration and jerk)")
    return JointLimits.from_urdf_string(robot_description, dyn, joints=joints)


def plan_outputs(params: Mapping[str, Any]) -> list[str]:
    """Names of the configured outputs of type ``plan`` (``<name>.type`` in ``params``)."""
    return [n for n in _get(params, "outputs") if n and params.get(f"{n}.type") == "plan"]


def build_session(params: Mapping[str, Any], policy: str | None = None,
                  robot_description: str | None = None) -> SessionSetup:
    """The session the adapter builds at configure for ``params``.

    ``policy`` (a card path or a built-in kind) replaces the ``policy`` parameter.
    """
    try:
        limits = _limits(params, robot_description)
        period = float(_get(params, "decision_period"))
        rate = float(_get(params, "stream_rate"))
        if not 125.0 <= rate <= 1000.0:
            raise SetupError(f"stream_rate must be within 125-1000 Hz, got {rate:g}")
        if not (0.001 <= period <= 1.0):
            raise SetupError(f"decision_period must be within 1 ms - 1 s, got {period:g}")
        horizon = int(_get(params, "horizon"))
        card = policy if policy else _get(params, "policy")
        if not card:
            raise SetupError("parameter 'policy' (path of a policy card) is empty; pass "
                             "--policy CARD|KIND")
        features = [f for f in _get(params, "features") if f]
        if card in BUILT_IN_KINDS:
            running = RunningConfig(limits.names, period, limits, horizon, tuple(features))
            main = policy_for_kind(card, running)
            label = f"built-in {card}"
        else:
            parsed = load_card(card)
            running = RunningConfig(limits.names, period, limits, horizon,
                                    tuple(features or parsed.feedback_features))
            main = build_policy(parsed, running)
            label = str(card)
        shadow_card = _get(params, "shadow_policy")
        shadow = load_policy(shadow_card, running) if shadow_card else None
        w = 2.0 * float(_get(params, "approach_bandwidth"))
        approach = policy_for_kind("tracker", running, kp=(w / 2) ** 2, kd=w)
        wd = WatchdogConfig(**{k: _get(params, f"watchdog.{k}") for k in WATCHDOG_PARAMS})
        cc = CycleConfig(horizon=horizon, approach_scale=float(_get(params, "approach_scale")),
                         approach_tolerance=float(_get(params, "approach_tolerance")),
                         approach_bandwidth=float(_get(params, "approach_bandwidth")))
        session = StreamingSession(limits, period, main, approach, cc, wd,
                                   float(_get(params, "limit_scale")), shadow)
        try:
            session.set_stream_timing(rate, float(_get(params, "stream_jitter")))
        except ValueError as exc:
            raise SetupError(f"parameter 'stream_jitter': {exc}") from None
        if plan_outputs(params):
            try:
                session.enable_plan_ahead(float(_get(params, "plan_lead")))
            except ValueError as exc:
                raise SetupError(f"parameter 'plan_lead': {exc}") from None
    except SetupError:
        raise
    except (ValueError, TypeError, RuntimeError) as exc:  # Limits/Policy/Card/Watchdog errors
        raise SetupError(str(exc)) from None
    parser = FeedbackParser(running.features) if running.features else None
    return SessionSetup(session, running, parser, rate, label, dict(params), limits.left_out)
