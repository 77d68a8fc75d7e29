# SPDX-License-Identifier: Apache-2.0
"""A test driver process for the invented "tern" arm (test/data/urdf/tern_arm_gripper.urdf).

Publishes the robot description once at start (std_msgs/String, transient local), prints
``ready``, then sends ``joint_states`` as a real driver may: the arm joints and both gripper
fingers in one message at RATE Hz (names in an order of its own, velocity and effort empty)
and the flange joint alone in another at 50 Hz (effort given, velocity empty). Its
measurement is the latest streamed setpoint (``setpoints``; the start pose before any).
While ``tern_driver/flange_paused`` (std_msgs/Bool) is true the flange messages stop.
On SIGINT it prints the messages sent as JSON and exits.

Run: ``python tern_driver.py URDF RATE Q1 ... Q6`` (start pose of the arm joints in URDF order).
"""
from __future__ import annotations

import json
import signal
import sys
import threading
import xml.etree.ElementTree as ET

import rclpy
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from rclpy.signals import SignalHandlerOptions
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
from sensor_msgs.msg import JointState
from std_msgs.msg import Bool, String
from trajectory_msgs.msg import JointTrajectory

ARM_ORDER = ["tern_finger_b", "tern_wrist_pitch", "tern_base_yaw", "tern_finger_a",
             "tern_forearm_pitch", "tern_arm_pitch", "tern_wrist_roll"]
FLANGE = "tern_flange_roll"
FINGER_OPEN = 0.012  # m
FLANGE_RATE = 50.0   # Hz


class TernDriver(Node):
    """See the module docstring."""

    def __init__(self, urdf: str, start: list[float], rate: float) -> None:
        super().__init__("tern_driver")
        movable = [j.get("name") for j in ET.fromstring(urdf).findall("joint")
                   if j.get("type") != "fixed" and j.find("mimic") is None
                   and not j.get("name").startswith("tern_finger")]
        self.q = dict(zip(movable, start))
        self.lock = threading.Lock()
        self.sent = {"arm": 0, "flange": 0, "setpoints_received": 0}
        self.setpoint_names: set[tuple[str, ...]] = set()
        self.flange_paused = False
        latched = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                             durability=DurabilityPolicy.TRANSIENT_LOCAL)
        self.description_pub = self.create_publisher(String, "robot_description", latched)
        self.description_pub.publish(String(data=urdf))
        self.pub = self.create_publisher(JointState, "joint_states", 50)
        reliable = QoSProfile(depth=10, reliability=ReliabilityPolicy.RELIABLE)
        self.create_subscription(JointTrajectory, "setpoints", self._on_setpoint, reliable)
        self.create_subscription(Bool, "tern_driver/flange_paused", self._on_pause, reliable)
        self._ticks = 0
        self._every = max(1, round(rate / FLANGE_RATE))
        self.create_timer(1.0 / rate, self._tick)

    def _on_setpoint(self, msg: JointTrajectory) -> None:
        with self.lock:
            self.sent["setpoints_received"] += 1
            self.setpoint_names.add(tuple(msg.joint_names))
            self.q.update(zip(msg.joint_names, msg.points[0].positions))

    def _on_pause(self, msg: Bool) -> None:
        self.flange_paused = bool(msg.data)

    def _send(self, names: list[str], effort: list[float]) -> None:
        with self.lock:
            pos = [self.q.get(n, FINGER_OPEN) for n in names]
        msg = JointState(name=names, position=pos, velocity=[], effort=effort)
        msg.header.stamp = self.get_clock().now().to_msg()
        self.pub.publish(msg)

    def _tick(self) -> None:
        self._send(ARM_ORDER, [])
        self.sent["arm"] += 1
        self._ticks += 1
        if self._ticks % self._every == 0 and not self.flange_paused:
            self._send([FLANGE], [0.4])
            self.sent["flange"] += 1


def main() -> int:
    """Run until SIGINT; print the counts."""
    urdf = open(sys.argv[1]).read()
    rate = float(sys.argv[2])
    start = [float(x) for x in sys.argv[3:]]
    rclpy.init(signal_handler_options=SignalHandlerOptions.NO)
    node = TernDriver(urdf, start, rate)
    print("ready", flush=True)
    stop = threading.Event()
    signal.signal(signal.SIGINT, lambda *_: stop.set())
    executor = SingleThreadedExecutor()
    executor.add_node(node)
    spinner = threading.Thread(target=executor.spin, daemon=True)
    spinner.start()
    stop.wait()
    executor.shutdown(timeout_sec=5.0)
    spinner.join(timeout=5.0)
    report = dict(node.sent, setpoint_names=sorted(map(list, node.setpoint_names)))
    print(json.dumps(report), flush=True)
    node.destroy_node()
    rclpy.try_shutdown()
    return 0


if __name__ == "__main__":
    sys.exit(main())
