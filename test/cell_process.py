# SPDX-License-Identifier: Apache-2.0
"""The test cell's own process: reference_server, sim_driver and the fault relay.

Run as ``python cell_process.py CONFIG.json`` by `adapter_harness.Cell`. A real cell runs the
driver apart from the adapter; so do the tests, so that neither the simulated arm nor the
relays share the adapter's interpreter (one Python process could not carry the driver's
250 Hz joint states, the relays and the adapter's stream at once on a 2-core machine).

CONFIG holds ``reference`` and ``driver`` (parameter name -> value) and ``remaps`` (extra
``from:=to`` ROS remappings for both). The relay node ``cell_relay`` passes
``sim/joint_states`` -> ``joint_states`` and ``raw/reference/window`` -> ``reference/window``;
its parameters inject faults: ``js_block`` (drop), ``js_offset`` (added to positions; empty
for none), ``ref_block``, ``ref_offset`` (added to every point's positions),
``ref_truncate`` (only the first point). It says ``ready`` on stdout once it spins.
"""
from __future__ import annotations

import json
import sys
from typing import Any

import numpy as np
from rcl_interfaces.msg import SetParametersResult
from rclpy.node import Node
from rclpy.parameter import Parameter
from sensor_msgs.msg import JointState
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.bringup import end_with_parent
from adaptive_streamer.nodes import common
from adaptive_streamer.nodes.common import reliable_qos
from adaptive_streamer.nodes.reference_server import ReferenceServer
from adaptive_streamer.nodes.sim_driver import SimDriver

RELAY_DEFAULTS: dict[str, Any] = {"js_block": False, "js_offset": [0.0], "ref_block": False,
                                  "ref_offset": 0.0, "ref_truncate": False}


class Relay(Node):
    """Relays joint states and reference windows, with the faults its parameters ask for."""

    def __init__(self) -> None:
        super().__init__("cell_relay")
        for name, value in RELAY_DEFAULTS.items():
            self.declare_parameter(name, value)
        self._faults = dict(RELAY_DEFAULTS)
        self.add_on_set_parameters_callback(self._on_set)
        self.js_pub = self.create_publisher(JointState, "joint_states", 10)
        self.ref_pub = self.create_publisher(JointTrajectory, "reference/window", reliable_qos(5))
        self.create_subscription(JointState, "sim/joint_states", self._relay_js, 10)
        self.create_subscription(JointTrajectory, "raw/reference/window", self._relay_ref,
                                 reliable_qos(5))

    def _on_set(self, params: list[Parameter]) -> SetParametersResult:
        for p in params:
            self._faults[p.name] = p.value
        return SetParametersResult(successful=True)

    def _relay_js(self, msg: JointState) -> None:
        if self._faults["js_block"]:
            return
        offset = np.asarray(self._faults["js_offset"], float)
        if offset.size == len(msg.position) and np.any(offset):
            msg.position = (np.array(msg.position) + offset).tolist()
        self.js_pub.publish(msg)

    def _relay_ref(self, msg: JointTrajectory) -> None:
        if self._faults["ref_block"]:
            return
        if self._faults["ref_offset"]:
            for pt in msg.points:
                pt.positions = (np.array(pt.positions) + self._faults["ref_offset"]).tolist()
        if self._faults["ref_truncate"]:
            msg.points = msg.points[:1]
        self.ref_pub.publish(msg)


def overrides(values: dict[str, Any]) -> list[Parameter]:
    """Parameters from a name -> value mapping."""
    return [Parameter(k, value=v) for k, v in values.items()]


def main(argv: list[str]) -> int:
    """Run the cell's nodes until SIGINT/SIGTERM."""
    end_with_parent()
    config = json.loads(open(argv[1]).read())
    remaps = [a for r in config.get("remaps", []) for a in ("-r", r)]

    def reference() -> ReferenceServer:
        return ReferenceServer(parameter_overrides=overrides(config["reference"]),
                               cli_args=["--ros-args", "-r",
                                         "reference/window:=raw/reference/window", *remaps])

    def driver() -> SimDriver:
        return SimDriver(parameter_overrides=overrides(config["driver"]),
                         cli_args=["--ros-args", "-r", "joint_states:=sim/joint_states",
                                   *remaps])

    def ready(nodes: list[Node]) -> None:  # noqa: ARG001
        print("ready", flush=True)

    return common.run_nodes([reference, driver, Relay], [], after_start=ready)


if __name__ == "__main__":
    raise SystemExit(main(sys.argv))
