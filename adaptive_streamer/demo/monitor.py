# SPDX-License-Identifier: Apache-2.0
"""The demo's observer and operator: an rclpy node that records what the stack does and
drives it (lifecycle, start, fault injection). It only converts and stores; the figures
are computed in `adaptive_streamer.demo.summary`.
"""
from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray
from geometry_msgs.msg import PointStamped
from rcl_interfaces.msg import Parameter as ParameterMsg
from rcl_interfaces.msg import ParameterType, ParameterValue
from rcl_interfaces.srv import SetParameters
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from ..core import decision_record
from ..core.cycle import Decision
from ..io.stamps import stamp_to_sec
from ..nodes.common import reliable_qos
from ..nodes.lifecycle_client import LifecycleClient
from ..io.trajectory_conversions import fill_trajectory, msg_to_window


WINDOW_TOPIC = "reference/window"
SOURCE_WINDOW_TOPIC = "reference/window_source"
# the reference server's remapping when the monitor relays its windows
RELAY_REMAP = {f"reference_server:{WINDOW_TOPIC}": SOURCE_WINDOW_TOPIC}


class WindowRelay:
    """Passes reference windows on unchanged, or with one joint moved once a jump is set:
    every window after the jump carries it, so no decision can see an unjumped window
    (a jump republished beside the server's own windows lasts only until the server's
    next window, and a decision may fall before it or after it)."""

    def __init__(self, publisher: Any) -> None:
        self._pub = publisher
        self.jump: tuple[int, float] | None = None
        self.relayed = 0

    def relay(self, msg: JointTrajectory) -> None:
        """Publish ``msg`` on, jumped if a jump is set."""
        if self.jump is not None:
            joint, offset = self.jump
            w = msg_to_window(msg)
            pos = w.positions.copy()
            pos[:, joint] += offset
            msg = JointTrajectory()
            fill_trajectory(msg, w.stamp, w.names, w.times, pos, w.velocities, w.accelerations)
        self._pub.publish(msg)
        self.relayed += 1


@dataclass
class Recorded:
    """Everything the monitor received (lists of tuples, turned into arrays later)."""

    setpoints: list[tuple[float, float, list, list, list]] = field(default_factory=list)
    joint_states: list[tuple[float, list]] = field(default_factory=list)
    decisions: list[Decision] = field(default_factory=list)
    readings: list[tuple[float, float, float]] = field(default_factory=list)
    # driver/followed: (stamp [int ns], positions, velocities, accelerations; the last two
    # empty with the stream output)
    followed: list[tuple[int, list, list, list]] = field(default_factory=list)
    diagnostics: dict[str, dict[str, str]] = field(default_factory=dict)
    diag_messages: dict[str, str] = field(default_factory=dict)
    diag_counts: dict[str, int] = field(default_factory=dict)   # messages per status name


class DemoMonitor(Node):
    """Subscribes to the stack's outputs; clients for the operator's actions."""

    def __init__(self, joints: list[str], relay_windows: bool = False) -> None:
        """``relay_windows``: the reference server publishes on `SOURCE_WINDOW_TOPIC` and
        this node passes its windows on to `WINDOW_TOPIC` (the reference jump fault)."""
        super().__init__("demo_monitor")
        self.joints = joints
        self.data = Recorded()
        self.recording = False
        q = reliable_qos(1000)
        self.create_subscription(JointTrajectory, "setpoints", self._on_setpoint, q)
        self.create_subscription(JointState, "joint_states", self._on_joint_state, q)
        self.create_subscription(JointTrajectory, "driver/followed", self._on_followed, q)
        self.create_subscription(Float64MultiArray, "adapter/decisions", self._on_decision, q)
        self.create_subscription(PointStamped, "edge_sensor/offset", self._on_reading, 50)
        self.create_subscription(DiagnosticArray, "/diagnostics", self._on_diag, 50)
        self._relay: WindowRelay | None = None
        if relay_windows:
            self._relay = WindowRelay(self.create_publisher(JointTrajectory, WINDOW_TOPIC, q))
            self.create_subscription(JointTrajectory, SOURCE_WINDOW_TOPIC, self._relay.relay, q)
        self.adapter = LifecycleClient(self, "adapter", spun_elsewhere=True)
        self._triggers = {name: self.create_client(Trigger, name)
                          for name in ("reference_server/start", "adapter/stop", "adapter/reset")}
        self._param_clients: dict[str, Any] = {}

    # ------------------------------------------------------------------ receiving
    def _on_setpoint(self, msg: JointTrajectory) -> None:
        if self.recording and msg.points:
            pt = msg.points[0]
            self.data.setpoints.append((time.monotonic(), stamp_to_sec(msg.header.stamp),
                                        list(pt.positions), list(pt.velocities),
                                        list(pt.accelerations)))

    def _on_joint_state(self, msg: JointState) -> None:
        if self.recording:
            names = list(msg.name)
            try:
                q = [msg.position[names.index(j)] for j in self.joints]
            except (ValueError, IndexError):
                return
            self.data.joint_states.append((stamp_to_sec(msg.header.stamp), q))

    def _on_followed(self, msg: JointTrajectory) -> None:
        if not (self.recording and msg.points):
            return
        names = list(msg.joint_names)
        try:
            order = [names.index(j) for j in self.joints]
        except ValueError:
            return
        pt = msg.points[0]
        stamp = msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec
        try:
            self.data.followed.append((stamp, [pt.positions[i] for i in order],
                                       [pt.velocities[i] for i in order] if pt.velocities else [],
                                       [pt.accelerations[i] for i in order]
                                       if pt.accelerations else []))
        except IndexError:
            return

    def _on_decision(self, msg: Float64MultiArray) -> None:
        if self.recording:
            try:
                self.data.decisions.append(decision_record.decode(np.asarray(msg.data)))
            except decision_record.DecisionRecordError:
                pass

    def _on_reading(self, msg: PointStamped) -> None:
        if self.recording:
            self.data.readings.append((stamp_to_sec(msg.header.stamp), msg.point.y, msg.point.z))

    def _on_diag(self, msg: DiagnosticArray) -> None:
        for status in msg.status:
            self.data.diagnostics[status.name] = {kv.key: kv.value for kv in status.values}
            self.data.diag_messages[status.name] = status.message
            self.data.diag_counts[status.name] = self.data.diag_counts.get(status.name, 0) + 1

    # ------------------------------------------------------------------ acting
    def start(self) -> None:
        """Spin this node in a background thread (every callback, as messages arrive)."""
        self._executor = SingleThreadedExecutor()
        self._executor.add_node(self)
        self._thread = threading.Thread(target=self._executor.spin, daemon=True,
                                        name="demo-monitor")
        self._thread.start()

    def stop(self) -> None:
        """Stop the background executor."""
        self._executor.shutdown(timeout_sec=2.0)

    @staticmethod
    def spin_for(seconds: float) -> None:
        """Let the background executor work for a while."""
        time.sleep(seconds)

    @staticmethod
    def wait_for(what: str, condition: Any, timeout: float) -> bool:  # noqa: ARG004
        """Wait until ``condition()`` or ``timeout``."""
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if condition():
                return True
            time.sleep(0.02)
        return bool(condition())

    def trigger(self, name: str, timeout: float = 5.0) -> tuple[bool, str]:
        """Call a std_srvs/Trigger service and wait for its answer."""
        client = self._triggers[name]
        if not client.wait_for_service(timeout):
            return False, f"service {name} not available"
        future = client.call_async(Trigger.Request())
        if not self.wait_for(name, future.done, timeout):
            return False, f"no answer from {name}"
        res = future.result()
        return bool(res.success), res.message

    def set_param(self, node: str, name: str, value: bool | str, timeout: float = 5.0) -> bool:
        """Set one bool or string parameter of ``node`` (asynchronously answered)."""
        client = self._param_clients.get(node)
        if client is None:
            client = self._param_clients[node] = self.create_client(
                SetParameters, f"{node}/set_parameters")
        if not client.wait_for_service(timeout):
            return False
        if isinstance(value, bool):
            pv = ParameterValue(type=ParameterType.PARAMETER_BOOL, bool_value=value)
        else:
            pv = ParameterValue(type=ParameterType.PARAMETER_STRING, string_value=value)
        future = client.call_async(SetParameters.Request(parameters=[ParameterMsg(name=name, value=pv)]))
        self.wait_for("set_parameters", future.done, timeout)
        return bool(future.done() and future.result().results[0].successful)

    def start_jump(self, joint: int, offset: float) -> bool:
        """From now on pass every reference window on with ``joint`` moved by ``offset``
        (a faulty reference source); False when no window has been relayed yet."""
        relay = self._relay
        if relay is None or relay.relayed == 0:
            return False
        relay.jump = (joint, offset)
        return True

    def wait_fresh_status(self, node: str, timeout: float = 2.5) -> bool:
        """Wait for the next diagnostics status of ``node`` (a trip shortly before the end
        of the pass is then in `adapter_status`)."""
        n = self.data.diag_counts.get(node, 0)
        return self.wait_for(f"{node} diagnostics",
                             lambda: self.data.diag_counts.get(node, 0) > n, timeout)

    def adapter_status(self) -> dict[str, str]:
        """Latest adapter diagnostics values."""
        return self.data.diagnostics.get("adapter", {})

    def reference_status(self) -> dict[str, str]:
        """Latest reference_server diagnostics values."""
        return self.data.diagnostics.get("reference_server", {})

    def last_mode(self) -> str:
        """Mode of the latest decision record ('' before any)."""
        return self.data.decisions[-1].next_mode if self.data.decisions else ""
