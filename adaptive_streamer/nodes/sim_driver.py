# SPDX-License-Identifier: Apache-2.0
"""``sim_driver`` node: a simulated robot driver for the demo cell and the tests.

Takes the adapter's driver output on one command topic (chosen by ``command_interface``),
tracks it with the core plant (`adaptive_streamer.sim.plant`: transport delay,
second-order lag, measurement noise, hold on command timeout) and publishes
``joint_states`` (sensor_msgs/JointState: name, position, velocity; effort empty) at
``rate``. All times are ROS time, so it runs under ``use_sim_time``.

Command topics (relative names, remap as usual):

- ``position``: ``driver/position_command``, std_msgs/Float64MultiArray, one position per
  joint in ``joints`` order [rad];
- ``velocity``: ``driver/velocity_command``, std_msgs/Float64MultiArray, one velocity per
  joint [rad/s], integrated by the plant while following;
- ``trajectory``: ``driver/trajectory_command``, trajectory_msgs/JointTrajectory with exactly
  one point, executed on receipt (``header.stamp`` is not used): the target moves linearly
  from where it is to the point's positions (matched to ``joints`` by ``joint_names``) over
  the point's ``time_from_start`` (0: at once); velocities/accelerations are not used.
- ``plan``: ``driver/plan``, trajectory_msgs/JointTrajectory, the adapter's plan-ahead
  output: knots at ``header.stamp + time_from_start`` with positions, velocities and
  accelerations; a plan applies from its first knot's time (or its arrival, if later) and
  replaces the previous one from there; the target between knots is their quintic Hermite
  interpolant (`adaptive_streamer.sim.plan_target`), and after the last knot it holds there
  at rest. The plan is its own timeout: ``command_timeout`` does not apply.

A malformed command (wrong length, unknown or missing joints, non-finite values, not one
point) is dropped, counted and logged. Ticks lie on a grid ``t0 + k / rate`` anchored at
the first timer call; a late timer call steps every tick it owes (catch-up), a clock jump of
more than ``MAX_LAG_S`` forward or any jump back re-anchors the grid (and, back, forgets the
last command, so the plant holds). ``joint_states`` is stamped with the tick time.

Parameters (read-only):
  joints              joint names (default j1..j6)
  initial_positions   start positions [rad], one per joint (default all 0)
  rate                tick and publish rate [Hz] (default 250)
  command_interface   position | velocity | trajectory (default position)
  command_timeout     hold when the latest command is older than this [s] (default 0.1)
  delay_ticks         transport delay [ticks] (default 2)
  natural_frequency   lag natural frequency wn [rad/s] (default 60)
  damping             lag damping ratio zeta (default 0.7)
  position_noise      measured-position noise std [rad] (default 2e-5)
  velocity_noise      measured-velocity noise std [rad/s] (default 2e-3)
  seed                noise seed (default 0)
  command_qos         reliable | best_effort | sensor_data (default reliable)
  joint_states_qos    reliable | best_effort | sensor_data (default reliable)
  stall               fault injection (settable at runtime): while true, joint_states is not
                      published (the plant keeps running), as when a driver's feedback stalls
  publish_followed    also publish ``driver/followed`` every tick (default false): a
                      one-point JointTrajectory stamped with the tick time holding the
                      noise-free target the plant follows (positions; with ``plan`` also the
                      interpolated velocities and accelerations), so a test or the demo can
                      check the motion the driver really made of its commands

Diagnostics (``/diagnostics``, about 1 Hz, name ``sim_driver``): state (following /
holding), commands received and rejected, timeouts, ticks, catch-up ticks, clock re-anchors.
"""
from __future__ import annotations

import math
from typing import Any, Iterable

from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from adaptive_streamer.sim.plan_target import PlanTarget, PlanTargetError
from adaptive_streamer.sim.plant import PlantConfig, PlantError, SimPlant

from ..io.param_specs import SIM_DRIVER
from .common import (OK, WARN, DiagnosticsReporter, SetupNode, declare, qos_by_name,
                     run_nodes)

TOPICS = {"position": "driver/position_command", "velocity": "driver/velocity_command",
          "trajectory": "driver/trajectory_command", "plan": "driver/plan"}
MAX_LAG_S = 0.5          # behind the clock by more than this: re-anchor instead of catching up
_LOG_THROTTLE_S = 5.0


class SimDriverError(ValueError):
    """The sim_driver parameters are missing, mistyped or out of range."""


def _number(node: Node, name: str) -> float:
    value = declare(node, SIM_DRIVER[name])
    if not math.isfinite(value):
        raise SimDriverError(f"parameter '{name}': expected a finite number, got {value!r}")
    return float(value)


def _strings(node: Node, name: str) -> list[str]:
    value = declare(node, SIM_DRIVER[name])
    if len(set(value)) != len(value):
        raise SimDriverError(f"parameter '{name}': names must be unique, got {list(value)}")
    return list(value)


def _numbers(node: Node, name: str, count: int) -> list[float]:
    value = declare(node, SIM_DRIVER[name], [0.0] * count)
    if len(value) != count or not all(math.isfinite(v) for v in value):
        raise SimDriverError(f"parameter '{name}': expected {count} finite numbers (one per "
                             f"joint), got {value!r}")
    return [float(v) for v in value]


class SimDriver(SetupNode):
    """Steps a `SimPlant` on a timer and publishes its measured state as ``joint_states``."""

    param_error = SimDriverError

    def __init__(self, **kwargs: Any) -> None:
        super().__init__("sim_driver", **kwargs)

    def _setup(self) -> None:
        self._joints = _strings(self, "joints")
        n = len(self._joints)
        q0 = _numbers(self, "initial_positions", n)
        rate = _number(self, "rate")
        interface = declare(self, SIM_DRIVER["command_interface"])
        try:
            config = PlantConfig(
                dt=1.0 / rate,
                natural_frequency=_number(self, "natural_frequency"),
                damping=_number(self, "damping"),
                delay_ticks=int(declare(self, SIM_DRIVER["delay_ticks"])),
                command_timeout=_number(self, "command_timeout"),
                position_noise=_number(self, "position_noise"),
                velocity_noise=_number(self, "velocity_noise"),
                interface="velocity" if interface == "velocity" else "position")
            self.plant = SimPlant(config, q0, seed=int(declare(self, SIM_DRIVER["seed"])))
        except PlantError as exc:
            raise SimDriverError(f"sim_driver parameters: {exc}") from None
        qos = {}
        for name in ("command_qos", "joint_states_qos"):
            value = declare(self, SIM_DRIVER[name])
            try:
                qos[name] = qos_by_name(str(value), depth=10)
            except ValueError as exc:
                raise SimDriverError(f"parameter '{name}': {exc}") from None
        self._interface = interface
        self._plan = PlanTarget(n) if interface == "plan" else None
        self._followed_pub = None
        if declare(self, SIM_DRIVER["publish_followed"]):
            self._followed_pub = self.create_publisher(JointTrajectory, "driver/followed",
                                                       qos["joint_states_qos"])
            self._followed = JointTrajectory(joint_names=self._joints,
                                             points=[JointTrajectoryPoint()])
        self._period_ns = int(round(1e9 / rate))
        self._t0_ns: int | None = None
        self._ticks = 0
        self.rejected = 0
        self.catch_up_ticks = 0
        self.reanchors = 0
        self._pub = self.create_publisher(JointState, "joint_states", qos["joint_states_qos"])
        declare(self, SIM_DRIVER["stall"])
        msg_type = JointTrajectory if interface in ("trajectory", "plan") else Float64MultiArray
        sub = self.create_subscription(msg_type, TOPICS[interface], self._on_command,
                                       qos["command_qos"])
        self._topic = sub.topic_name
        self.create_timer(self._period_ns * 1e-9, self._on_tick)
        self._diag = DiagnosticsReporter(self, "sim_driver", values=self._diag_values)
        self._update_status()
        self.get_logger().info(f"simulating {n} joints at {rate:g} Hz, {interface} commands on "
                               f"{self._topic}")

    # ------------------------------------------------------------------ commands
    def _on_command(self, msg: Any) -> None:
        now = self.get_clock().now().nanoseconds * 1e-9
        try:
            if self._plan is not None:
                self._accept_plan(msg, now)
            elif self._interface == "trajectory":
                values = self._trajectory_positions(msg)
                tfs = msg.points[0].time_from_start
                self.plant.command(values, now, reach_in=tfs.sec + tfs.nanosec * 1e-9)
            else:
                self.plant.command(list(msg.data), now)
        except (PlantError, PlanTargetError, SimDriverError) as exc:
            self.rejected += 1
            self.get_logger().warning(f"{self._topic}: dropped a command: {exc}",
                                      throttle_duration_sec=_LOG_THROTTLE_S)

    def _accept_plan(self, msg: JointTrajectory, now: float) -> None:
        names = list(msg.joint_names)
        if sorted(names) != sorted(self._joints) or len(set(names)) != len(names):
            raise SimDriverError(f"joint_names {names} must be the driver's joints "
                                 f"{self._joints} (any order)")
        if not msg.points:
            raise SimDriverError("a plan needs at least one point")
        order = [names.index(j) for j in self._joints]
        n = len(names)
        rows = []
        for k, pt in enumerate(msg.points):
            if not (len(pt.positions) == len(pt.velocities) == len(pt.accelerations) == n):
                raise SimDriverError(f"point {k}: expected {n} positions, velocities and "
                                     "accelerations")
            rows.append((list(pt.positions), list(pt.velocities), list(pt.accelerations)))
        stamp_ns = msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec
        times = [(stamp_ns + pt.time_from_start.sec * 1_000_000_000
                  + pt.time_from_start.nanosec) * 1e-9 for pt in msg.points]
        p, v, a = ([[r[i][j] for j in order] for r in rows] for i in range(3))
        self._plan.accept(now, times, p, v, a)

    def _trajectory_positions(self, msg: JointTrajectory) -> list[float]:
        if len(msg.points) != 1:
            raise SimDriverError(f"expected a trajectory with exactly one point, got "
                                 f"{len(msg.points)}")
        names = list(msg.joint_names)
        if sorted(names) != sorted(self._joints) or len(set(names)) != len(names):
            raise SimDriverError(f"joint_names {names} must be the driver's joints "
                                 f"{self._joints} (any order)")
        positions = list(msg.points[0].positions)
        if len(positions) != len(names):
            raise SimDriverError(f"the point has {len(positions)} positions for "
                                 f"{len(names)} joint names")
        by_name = dict(zip(names, positions))
        return [by_name[j] for j in self._joints]

    # ------------------------------------------------------------------ ticks
    def _on_tick(self) -> None:
        now_ns = self.get_clock().now().nanoseconds
        if self._t0_ns is None:
            self._anchor(now_ns)
        owed = (now_ns - self._t0_ns + self._period_ns // 2) // self._period_ns - self._ticks
        if owed < 0 or owed * self._period_ns > MAX_LAG_S * 1e9:
            if owed < 0:
                self.plant.forget_commands()
            self.reanchors += 1
            self.get_logger().warning(f"clock jumped by {owed * self._period_ns * 1e-9:+.3f} s; "
                                      "re-anchoring the tick grid")
            self._anchor(now_ns)
            owed = 0
        if owed > 1:
            self.catch_up_ticks += owed - 1
        for _ in range(int(owed)):
            self._ticks += 1
            self._step(self._t0_ns + self._ticks * self._period_ns)

    def _anchor(self, now_ns: int) -> None:
        """Start the tick grid at ``now`` and publish tick 0 there."""
        self._t0_ns, self._ticks = now_ns, 0
        self._step(now_ns)

    def _step(self, t_ns: int) -> None:
        was_following = self.plant.following
        target = self._plan.at(t_ns * 1e-9) if self._plan is not None else None
        if target is not None:
            self.plant.command(target.position, t_ns * 1e-9)
        sample = self.plant.step(t_ns * 1e-9)
        if self._followed_pub is not None:
            self._publish_followed(t_ns, target)
        msg = JointState()
        msg.header.stamp.sec, msg.header.stamp.nanosec = divmod(t_ns, 1_000_000_000)
        msg.name = self._joints
        msg.position = sample.position.tolist()
        msg.velocity = sample.velocity.tolist()
        if not self.get_parameter("stall").value:
            self._pub.publish(msg)
        if was_following != self.plant.following:
            self._update_status()

    def _publish_followed(self, t_ns: int, target: Any) -> None:
        msg = self._followed
        msg.header.stamp.sec, msg.header.stamp.nanosec = divmod(t_ns, 1_000_000_000)
        pt = msg.points[0]
        if target is None:
            pt.positions = self.plant.target.tolist()
        else:
            pt.positions = target.position.tolist()
            pt.velocities = target.velocity.tolist()
            pt.accelerations = target.acceleration.tolist()
        self._followed_pub.publish(msg)

    # ------------------------------------------------------------------ diagnostics
    def _update_status(self) -> None:
        p = self.plant
        if p.following:
            self._diag.set(OK, f"following {self._interface} commands")
        elif p.timeouts:
            self._diag.set(WARN, f"holding: no command for more than "
                                 f"{p.config.command_timeout:g} s ({p.timeouts} timeout(s))")
        else:
            self._diag.set(OK, "holding at the initial positions; waiting for commands")

    def _diag_values(self) -> Iterable[tuple[str, Any]]:
        p = self.plant
        return [("state", "following" if p.following else "holding"),
                ("command_interface", self._interface), ("command_topic", self._topic),
                ("commands_received", p.commands_received), ("commands_rejected", self.rejected),
                ("timeouts", p.timeouts), ("ticks", self._ticks),
                ("catch_up_ticks", self.catch_up_ticks), ("clock_reanchors", self.reanchors),
                ("plans_received", self._plan.plans_received if self._plan else 0)]


def main(args: list[str] | None = None) -> int:
    """Entry point of the ``sim_driver`` executable."""
    return run_nodes([SimDriver], args)


if __name__ == "__main__":
    raise SystemExit(main())
