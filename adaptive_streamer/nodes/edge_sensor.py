# SPDX-License-Identifier: Apache-2.0
"""``edge_sensor`` node: the demo cell's simulated line sensor at the nozzle.

Subscribes ``joint_states`` (the measured state from the driver), computes the nozzle pose
with the demo arm's forward kinematics and, at the sensor rate, takes a sample of the
nozzle's lateral offset from the real panel edge and of the edge angle relative to the
sensor's travel axis (`adaptive_streamer.sim.line_sensor`). Each sample is
published ``latency`` seconds later on ``edge_sensor/offset`` as geometry_msgs/PointStamped:

    point.x = 0 (unused)   point.y = lateral offset [m]   point.z = edge angle [rad]
    header.stamp = the time the sample represents (stamp of the joint state it used)

A sample is taken on each sensor tick for which a newer joint state has arrived; it is
delivered on the first tick at or after ``stamp + latency``. Out-of-range samples (no edge
under the sensor) are not published, only counted. The real panel placement is drawn from
the run seed unless given; it is logged at start and reported in the diagnostics, so a run
can be reproduced. All times are ROS time (``use_sim_time`` works).

Parameters (read-only):
  scenario           scenario YAML (default: the demo's config/demo/scenario.yaml)
  seed               run seed; -1 (default) = the scenario file's seed
  panel_offset_mm    real lateral offset [mm]; NaN (default) = drawn from the seed
  panel_angle_deg    real rotation [deg]; NaN (default) = drawn from the seed
  joint_states_qos   reliable | best_effort | sensor_data (default reliable)
  output_qos         reliable | best_effort | sensor_data (default reliable)
  dropout            fault injection (settable at runtime): while true no reading is published

Diagnostics (``/diagnostics``, about 1 Hz, name ``edge_sensor``): placement, seed, joint
states received/rejected, samples, published, out of range, the last reading.
"""
from __future__ import annotations

import math
from typing import Any, Iterable

import numpy as np
from geometry_msgs.msg import PointStamped
from sensor_msgs.msg import JointState

from adaptive_streamer.sim.arm import DEMO_ARM
from adaptive_streamer.sim.config import ScenarioError, load_scenario
from adaptive_streamer.sim.line_sensor import LineSensor, true_edge_reading

from ..io.stamps import sec_to_stamp, stamp_to_sec
from ..io.param_specs import EDGE_SENSOR
from .common import (OK, WARN, DiagnosticsReporter, SetupNode, declare, qos_by_name,
                     run_nodes)

_LOG_THROTTLE_S = 5.0


class EdgeSensorError(ValueError):
    """The edge_sensor parameters or its scenario file are invalid."""


class EdgeSensor(SetupNode):
    """Publishes simulated line-sensor readings computed from the measured joint states."""

    param_error = EdgeSensorError

    def __init__(self, **kwargs: Any) -> None:
        super().__init__("edge_sensor", **kwargs)

    def _setup(self) -> None:
        path = declare(self, EDGE_SENSOR["scenario"])
        seed = declare(self, EDGE_SENSOR["seed"])
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < -1:
            raise EdgeSensorError(f"parameter 'seed': expected an integer >= -1, got {seed!r}")
        override = {}
        for name in ("panel_offset_mm", "panel_angle_deg"):
            value = declare(self, EDGE_SENSOR[name])
            if isinstance(value, bool) or not isinstance(value, (int, float)) \
                    or math.isinf(value):
                raise EdgeSensorError(f"parameter '{name}': expected a finite number or NaN, "
                                      f"got {value!r}")
            override[name] = None if math.isnan(value) else float(value)
        if not isinstance(path, str):
            raise EdgeSensorError(f"parameter 'scenario': expected a file path, got {path!r}")
        try:
            scenario = load_scenario(path or None)
        except ScenarioError as exc:
            raise EdgeSensorError(f"parameter 'scenario': {exc}") from None
        run_seed = None if seed == -1 else seed
        self.seed = scenario.seed if run_seed is None else run_seed
        self.panel = scenario.panel(run_seed, override["panel_offset_mm"],
                                    override["panel_angle_deg"])
        self.sensor = LineSensor(scenario.sensor, self.panel.length,
                                 scenario.sensor_seed(run_seed))
        qos = {}
        for name in ("joint_states_qos", "output_qos"):
            value = declare(self, EDGE_SENSOR[name])
            try:
                qos[name] = qos_by_name(str(value), depth=10)
            except ValueError as exc:
                raise EdgeSensorError(f"parameter '{name}': {exc}") from None
        self._joints = list(DEMO_ARM.joints)
        self._index: tuple[list[str], list[int]] | None = None
        self._q: np.ndarray | None = None
        self._q_stamp: float | None = None
        self._sampled_stamp: float | None = None
        self._last: tuple[float, float] | None = None
        self.joint_states_received = 0
        self.joint_states_rejected = 0
        self.published = 0
        self.ticks = 0
        self._pub = self.create_publisher(PointStamped, "edge_sensor/offset", qos["output_qos"])
        self.create_subscription(JointState, "joint_states", self._on_joint_state,
                                 qos["joint_states_qos"])
        self.create_timer(1.0 / scenario.sensor.rate, self._on_tick)
        declare(self, EDGE_SENSOR["dropout"])
        self._diag = DiagnosticsReporter(self, "edge_sensor", values=self._diag_values)
        self._diag.set(OK, "waiting for joint_states")
        self.get_logger().info(
            f"panel placement: offset {1e3 * self.panel.offset:+.3f} mm, angle "
            f"{math.degrees(self.panel.angle):+.4f} deg (seed {self.seed}; reproduce with "
            f"panel_offset_mm/panel_angle_deg or seed); sensor {scenario.sensor.rate:g} Hz, "
            f"latency {1e3 * scenario.sensor.latency:g} ms, scenario {scenario.source}")

    # ------------------------------------------------------------------ input
    def _on_joint_state(self, msg: JointState) -> None:
        names = list(msg.name)
        if self._index is None or self._index[0] != names:
            if any(j not in names for j in self._joints):
                self._reject(f"needs positions for {self._joints}, got names {names}")
                return
            self._index = (names, [names.index(j) for j in self._joints])
        if len(msg.position) != len(names):
            self._reject(f"{len(names)} names but {len(msg.position)} positions")
            return
        q = np.asarray(msg.position, dtype=float)[self._index[1]]
        if not np.all(np.isfinite(q)):
            self._reject(f"non-finite positions {q.tolist()}")
            return
        self.joint_states_received += 1
        self._q, self._q_stamp = q, stamp_to_sec(msg.header.stamp)

    def _reject(self, reason: str) -> None:
        self.joint_states_rejected += 1
        self.get_logger().warning(f"joint_states: dropped a message: {reason}",
                                  throttle_duration_sec=_LOG_THROTTLE_S)

    # ------------------------------------------------------------------ sensor ticks
    def _on_tick(self) -> None:
        self.ticks += 1
        now = self.get_clock().now().nanoseconds * 1e-9
        if now < (self._sampled_stamp or -math.inf) - 1.0:   # clock jumped back (sim restart)
            self.sensor.clear()
            self._sampled_stamp = None
        if self._q is not None and self._q_stamp != self._sampled_stamp:
            offset, angle, along = true_edge_reading(DEMO_ARM, self.panel, self._q)
            self.sensor.sample(self._q_stamp, offset[0], angle[0], along[0])
            self._sampled_stamp = self._q_stamp
        dropout = self.get_parameter("dropout").value
        for reading in self.sensor.due(now):
            if not reading.valid or dropout:
                continue
            msg = PointStamped()
            sec_to_stamp(reading.stamp, msg.header.stamp)
            msg.point.y, msg.point.z = reading.offset, reading.angle
            self._pub.publish(msg)
            self.published += 1
            self._last = (reading.offset, reading.angle)
        if self.sensor.samples:
            in_range = self.sensor.samples - self.sensor.out_of_range
            self._diag.set(OK if in_range else WARN,
                           f"{in_range} of {self.sensor.samples} sample(s) in range")

    def _diag_values(self) -> Iterable[tuple[str, Any]]:
        values: list[tuple[str, Any]] = [
            ("panel_offset_mm", 1e3 * self.panel.offset),
            ("panel_angle_deg", math.degrees(self.panel.angle)), ("seed", self.seed),
            ("joint_states_received", self.joint_states_received),
            ("joint_states_rejected", self.joint_states_rejected),
            ("samples", self.sensor.samples), ("published", self.published),
            ("out_of_range", self.sensor.out_of_range)]
        if self._last is not None:
            values += [("last_offset_mm", 1e3 * self._last[0]),
                       ("last_angle_deg", math.degrees(self._last[1]))]
        return values


def main(args: list[str] | None = None) -> int:
    """Entry point of the ``edge_sensor`` executable."""
    return run_nodes([EdgeSensor], args)


if __name__ == "__main__":
    raise SystemExit(main())
