# SPDX-License-Identifier: Apache-2.0
"""Driver outputs of the adapter: the command stream in the form a robot driver takes.

Configured as a list of names (parameter ``outputs``), each with its own parameters::

    outputs: [position]
    position.type: position        # position | velocity | trajectory | plan
    position.topic: driver/position_command
    position.joints: []            # the driver's joint order (empty: the adapter's order)
    position.qos: reliable         # reliable | best_effort | sensor_data
    position.depth: 1

Semantics (one message per stream tick, for the nominal tick time t):

* ``position``: ``std_msgs/Float64MultiArray``, ``data`` = commanded positions p(t) [rad]
  in the configured driver joint order; ``layout.dim[0].label`` = the joint names joined
  by commas, ``size`` = number of joints.
* ``velocity``: the same with commanded velocities v(t) [rad/s].
* ``trajectory``: ``trajectory_msgs/JointTrajectory`` with one point: ``header.stamp`` = 0
  (execute on receipt), ``time_from_start`` = one stream period, and the point holds the
  plan at t + one stream period (positions, velocities, accelerations), so a driver that
  interpolates to it over one period is on the plan without an extra period of lag.
* ``plan`` (plan-ahead output, one message per committed decision, not per tick):
  ``trajectory_msgs/JointTrajectory``, ``header.stamp`` = the absolute time of
  ``points[0]`` (the decision instant, on the same clock as ``setpoints``); the points are
  knots one decision period apart with positions, velocities and accelerations: the
  committed segment, then the braking continuation to rest (the last point at rest);
  ``time_from_start`` strictly increasing from 0. A new message replaces the previous one
  from its first point's time on; after the last point the arm holds there. Between knots
  the motion is a constant-jerk segment, reproduced exactly by quintic Hermite
  interpolation of the two knots (`adaptive_streamer.core.plan_ahead`). The adapter sends
  each message at least ``plan_lead`` seconds before its first point's time.

Outputs are reliable, keep-last 1 by default. Incompatible-QoS events and outputs without a
subscriber are counted per output and reported on /diagnostics.
"""
from __future__ import annotations

from typing import Any, Sequence

import numpy as np
from rclpy.event_handler import PublisherEventCallbacks
from rclpy.node import Node
from std_msgs.msg import Float64MultiArray, MultiArrayDimension
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from adaptive_streamer.core.plan_ahead import PlanKnots
from adaptive_streamer.core.segment import MotionState

from ..io.param_specs import ADAPTER
from ..io.plan_messages import PlanEncoder
from ..io.stamps import sec_to_stamp
from .common import declare, qos_by_name

OUTPUT_TYPES = ("position", "velocity", "trajectory", "plan")
DEFAULT_TOPICS = {"position": "driver/position_command", "velocity": "driver/velocity_command",
                  "trajectory": "driver/trajectory_command", "plan": "driver/plan"}


class OutputConfigError(ValueError):
    """A driver output is configured wrongly."""


class DriverOutput:
    """One configured output: publisher, joint mapping and a reused message."""

    def __init__(self, node: Node, name: str, joints: Sequence[str], rate: float,
                 callback_group: Any = None, managed: bool = True) -> None:
        kind = output_type(node, name)
        if kind not in OUTPUT_TYPES:
            raise OutputConfigError(f"output '{name}': type '{kind}' is not one of {list(OUTPUT_TYPES)}")
        topic = _declared(node, name, "topic", DEFAULT_TOPICS[kind])
        order = list(_declared(node, name, "joints"))
        order = [j for j in order if j] or list(joints)
        missing = [j for j in order if j not in joints]
        if missing or len(set(order)) != len(order) or len(order) != len(joints):
            raise OutputConfigError(
                f"output '{name}': joints {order} must be the adapter's joints {list(joints)} "
                "in the driver's order, each once")
        qos_name = _declared(node, name, "qos")
        depth = int(_declared(node, name, "depth"))
        try:
            qos = qos_by_name(qos_name, depth)
        except ValueError as exc:
            raise OutputConfigError(f"output '{name}': {exc}") from None
        self.name, self.kind, self.topic = name, kind, topic
        self.index = np.array([list(joints).index(j) for j in order])
        self.incompatible_qos = 0
        self.dt = 1.0 / rate
        events = PublisherEventCallbacks(incompatible_qos=self._on_incompatible)
        msg_type = JointTrajectory if kind in ("trajectory", "plan") else Float64MultiArray
        create = node.create_lifecycle_publisher if managed else node.create_publisher
        self.publisher = create(msg_type, topic, qos, callback_group=callback_group,
                                event_callbacks=events)
        if kind == "plan":
            self._plan_encoder = PlanEncoder(order)
        elif kind == "trajectory":
            self._msg = JointTrajectory(joint_names=order)
            self._msg.points = [JointTrajectoryPoint()]
            self._msg.points[0].time_from_start.nanosec = int(round(self.dt * 1e9))
        else:
            self._msg = Float64MultiArray()
            self._msg.layout.dim = [MultiArrayDimension(label=",".join(order), size=len(order),
                                                        stride=len(order))]

    def _on_incompatible(self, event: Any) -> None:  # noqa: ARG002
        self.incompatible_qos += 1

    def publish(self, now: MotionState, ahead: MotionState) -> None:
        """Publish for a tick: ``now`` = plan at t, ``ahead`` = plan at t + one period (a
        plan output publishes per decision instead, `publish_plan`)."""
        idx = self.index
        if self.kind == "plan":
            return
        if self.kind == "position":
            self._msg.data = now.position[idx].tolist()
        elif self.kind == "velocity":
            self._msg.data = now.velocity[idx].tolist()
        else:
            pt = self._msg.points[0]
            pt.positions = ahead.position[idx].tolist()
            pt.velocities = ahead.velocity[idx].tolist()
            pt.accelerations = ahead.acceleration[idx].tolist()
        self.publisher.publish(self._msg)

    def publish_plan(self, knots: PlanKnots) -> None:
        """Publish a plan message (plan outputs only; the others ignore it)."""
        if self.kind != "plan":
            return
        self.publisher.publish(self._plan_encoder.encode(knots, self.index))

    def status(self) -> dict[str, Any]:
        """Diagnostics values for this output."""
        return {f"output.{self.name}.topic": self.topic,
                f"output.{self.name}.subscribers": self.publisher.get_subscription_count(),
                f"output.{self.name}.incompatible_qos": self.incompatible_qos}


def output_type(node: Node, name: str) -> str:
    """The ``<name>.type`` parameter of output ``name`` (declared on first use)."""
    return _declared(node, name, "type")


def _declared(node: Node, output: str, member: str, default: Any = None) -> Any:
    """Parameter ``<output>.<member>`` (the adapter's table), declared on first use (outputs
    are rebuilt on each configure); ``default`` replaces the table's."""
    spec = ADAPTER.member("outputs", output, member)
    if node.has_parameter(spec.name):
        return node.get_parameter(spec.name).value
    return declare(node, spec) if default is None else declare(node, spec, default)


def fill_setpoint(msg: JointTrajectory, t: float, sp: MotionState) -> None:
    """Fill the one-point ``setpoints`` message in place (stamp = nominal time)."""
    sec_to_stamp(t, msg.header.stamp)
    pt = msg.points[0]
    pt.positions = sp.position.tolist()
    pt.velocities = sp.velocity.tolist()
    pt.accelerations = sp.acceleration.tolist()


def setpoint_message(joints: Sequence[str]) -> JointTrajectory:
    """A reusable one-point setpoint message (time_from_start = 0)."""
    msg = JointTrajectory(joint_names=list(joints))
    msg.points = [JointTrajectoryPoint()]
    return msg
