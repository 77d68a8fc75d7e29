# SPDX-License-Identifier: Apache-2.0
"""A lifecycle node's ``change_state`` service that refuses, with the reason, a transition
that is not valid in the current state, instead of ending the process.

The installed rclpy triggers the requested transition without checking it; an invalid one
(e.g. ``configure`` while active) raises inside the service callback, the executor re-raises
it and the process exits while the arm moves. `guard_change_state` replaces the callback of
the node's own ``change_state`` service (rclpy keeps it as ``_service_change_state``: the one
private name used here, checked when the guard is installed so that a changed rclpy fails
loudly at startup, never silently) with one that checks the transition against the standard
lifecycle graph and runs valid ones through the node's public ``trigger_*`` methods.
"""
from __future__ import annotations

from typing import Any

from lifecycle_msgs.msg import Transition
from lifecycle_msgs.srv import ChangeState
from rclpy.lifecycle import LifecycleNode, TransitionCallbackReturn

T = Transition
# the standard lifecycle graph: per primary state, the transitions it offers (id -> trigger)
VALID = {
    "unconfigured": {T.TRANSITION_CONFIGURE: "configure",
                     T.TRANSITION_UNCONFIGURED_SHUTDOWN: "shutdown"},
    "inactive": {T.TRANSITION_CLEANUP: "cleanup", T.TRANSITION_ACTIVATE: "activate",
                 T.TRANSITION_INACTIVE_SHUTDOWN: "shutdown"},
    "active": {T.TRANSITION_DEACTIVATE: "deactivate", T.TRANSITION_ACTIVE_SHUTDOWN: "shutdown"},
}


class LifecycleGuardError(RuntimeError):
    """The installed rclpy does not have the change_state service this module replaces."""


def transition_name(state: str, transition_id: int, label: str) -> tuple[str | None, str]:
    """The trigger for a request in ``state`` (None when it is not valid there), and the
    reason it is refused ('' when valid)."""
    offered = VALID.get(state, {})
    names = sorted(set(offered.values()))
    if label:
        if label in offered.values():
            return label, ""
        return None, (f"transition '{label}' is not valid in state '{state}' (valid: "
                      f"{', '.join(names) or 'none'})")
    if transition_id in offered:
        return offered[transition_id], ""
    return None, (f"transition id {transition_id} is not valid in state '{state}' (valid: "
                  f"{', '.join(f'{i} {n}' for i, n in sorted(offered.items())) or 'none'})")


def guard_change_state(node: LifecycleNode, state: Any) -> None:
    """Install the checked ``change_state`` callback on ``node``; ``state()`` gives the
    node's current primary state label."""
    service = getattr(node, "_service_change_state", None)
    if service is None or not hasattr(service, "callback"):
        raise LifecycleGuardError("this rclpy's lifecycle node has no change_state service "
                                  "object to guard; invalid transitions would end the process")

    def on_change_state(req: ChangeState.Request, resp: ChangeState.Response
                        ) -> ChangeState.Response:
        try:
            current = state()
            name, reason = transition_name(current, int(req.transition.id),
                                           str(req.transition.label))
            if name is None:
                node.get_logger().warn(f"change_state refused: {reason}")
                resp.success = False
                return resp
            resp.success = getattr(node, f"trigger_{name}")() == TransitionCallbackReturn.SUCCESS
        except Exception as exc:  # never let a service callback raise
            node.get_logger().error(f"change_state failed: {type(exc).__name__}: {exc}")
            resp.success = False
        return resp

    service.callback = on_change_state
