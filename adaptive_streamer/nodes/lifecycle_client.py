# SPDX-License-Identifier: Apache-2.0
"""Driving a lifecycle node (the adapter) from Python, without the ``ros2`` CLI.

Example (any rclpy node can host the clients)::

    import rclpy
    from rclpy.node import Node
    from adaptive_streamer.nodes.lifecycle_client import LifecycleClient

    rclpy.init()
    node = Node("operator")
    adapter = LifecycleClient(node, "adapter")       # or "/cell/adapter"
    adapter.configure()                              # True on success
    adapter.activate()                               # refused while the arm moves
    ...
    adapter.deactivate()                             # controlled stop, returns at rest

Calls spin ``node`` until the answer arrives (or ``timeout``); with ``spun_elsewhere=True``
(the node is spun by an executor in another thread) they only wait. Do not call them from a
callback of the executor that spins ``node``.
"""
from __future__ import annotations

import time

import rclpy
from lifecycle_msgs.msg import Transition
from lifecycle_msgs.srv import ChangeState, GetState
from rclpy.node import Node

TRANSITIONS = {"configure": Transition.TRANSITION_CONFIGURE,
               "activate": Transition.TRANSITION_ACTIVATE,
               "deactivate": Transition.TRANSITION_DEACTIVATE,
               "cleanup": Transition.TRANSITION_CLEANUP,
               "shutdown": Transition.TRANSITION_UNCONFIGURED_SHUTDOWN}
GOAL_STATES = {"configure": "inactive", "activate": "active", "deactivate": "inactive",
               "cleanup": "unconfigured", "shutdown": "finalized"}


class LifecycleClientError(RuntimeError):
    """A lifecycle service did not answer."""


class LifecycleClient:
    """Clients for ``<target>/change_state`` and ``<target>/get_state``."""

    def __init__(self, node: Node, target: str, spun_elsewhere: bool = False) -> None:
        self._node = node
        self._spun_elsewhere = spun_elsewhere
        self.target = target.rstrip("/")
        self._change = node.create_client(ChangeState, f"{self.target}/change_state")
        self._get = node.create_client(GetState, f"{self.target}/get_state")

    def wait(self, timeout: float = 10.0) -> bool:
        """Wait for the lifecycle services to appear."""
        return self._change.wait_for_service(timeout) and self._get.wait_for_service(timeout)

    def state(self, timeout: float = 5.0) -> str:
        """Current state label ('unconfigured', 'inactive', 'active', ...)."""
        res = self._call(self._get, GetState.Request(), timeout)
        return res.current_state.label

    def transition(self, name: str, timeout: float = 15.0) -> bool:
        """Request a transition by name; True when the node accepted it.

        A change_state request is never sent twice; if its answer does not arrive in time
        (lost while discovery settles), the node's state tells whether it happened.
        """
        req = ChangeState.Request()
        req.transition.id = TRANSITIONS[name]
        try:
            return bool(self._call(self._change, req, timeout).success)
        except LifecycleClientError:
            if self.state(5.0) == GOAL_STATES.get(name):
                return True
            raise

    def configure(self, timeout: float = 15.0) -> bool:
        """configure transition."""
        return self.transition("configure", timeout)

    def activate(self, timeout: float = 15.0) -> bool:
        """activate transition."""
        return self.transition("activate", timeout)

    def deactivate(self, timeout: float = 30.0) -> bool:
        """deactivate transition (the adapter stops smoothly first)."""
        return self.transition("deactivate", timeout)

    def _call(self, client, request, timeout: float):
        """Call and wait; get_state is re-sent every second, because a response can be lost
        while discovery of the reply topic is still under way (seen on a loaded machine)."""
        if not client.wait_for_service(timeout):
            raise LifecycleClientError(f"service {client.srv_name} not available")
        deadline = time.monotonic() + timeout
        resend = isinstance(request, GetState.Request)
        future = client.call_async(request)
        sent = time.monotonic()
        while not future.done():
            now = time.monotonic()
            if now > deadline:
                raise LifecycleClientError(f"no answer from {client.srv_name} within {timeout:g} s")
            if resend and now - sent > 1.0:
                future = client.call_async(request)
                sent = now
            if self._spun_elsewhere:
                time.sleep(0.01)
            else:
                rclpy.spin_once(self._node, timeout_sec=0.05)
        return future.result()
