# SPDX-License-Identifier: Apache-2.0
"""Node ``watchdog``: watches the adapter's output from outside.

Subscribes ``setpoints`` (the adapter's one-point JointTrajectory stream) and
``joint_states`` (the driver's measurement; each message judged on the joints it carries)
and checks them with
`adaptive_streamer.core.monitor.StreamMonitor`: every setpoint against the limits and for
continuity with the previous one, every joint state against the command
``command_latency`` earlier (``following_error``). Findings go to ``/diagnostics`` (status
name ``watchdog``). With ``stop_on_violation`` the node also calls the adapter's stop
service (``stop_service``, std_srvs/Trigger) asynchronously, at most once a second.

This is a second opinion, not a safety function: keep a certified emergency stop.

Parameters (read-only):
  limits_file          limits YAML or URDF (required)
  limits_dynamics      limits YAML with acceleration/jerk beside a URDF
  following_error      threshold [rad] (default: the adapter's default)
  command_latency      driver latency assumed [s] (default: the adapter's default)
  stop_on_violation    call stop_service on a violation (default false)
  stop_service         the adapter's stop service (default 'adapter/stop')
  joint_states_qos     QoS of the joint_states subscription (default 'sensor_data')
"""
from __future__ import annotations

import sys
import time
from typing import Any

import numpy as np
from sensor_msgs.msg import JointState
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.core.limits import JointLimits, LimitsError
from adaptive_streamer.core.monitor import StreamMonitor
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.core.watchdog import WatchdogConfig, WatchdogError
from adaptive_streamer.io.joint_states import JointStateError, joint_positions

from ..io.param_specs import WATCHDOG
from .common import (ERROR, OK, DiagnosticsReporter, SetupNode, declare, now_sec,
                     qos_by_name, reliable_qos, run_nodes)
from ..io.stamps import stamp_to_sec

STOP_INTERVAL_S = 1.0


class WatchdogMonitorError(ValueError):
    """The watchdog node's parameters are missing or invalid."""


class WatchdogMonitor(SetupNode):
    """Converts messages for a `StreamMonitor` and reports what it finds."""

    param_error = WatchdogMonitorError

    def __init__(self, **kwargs: Any) -> None:
        super().__init__("watchdog", **kwargs)

    def _setup(self) -> None:
        limits_file = declare(self, WATCHDOG["limits_file"])
        dynamics = declare(self, WATCHDOG["limits_dynamics"])
        following = declare(self, WATCHDOG["following_error"])
        latency = declare(self, WATCHDOG["command_latency"])
        self._stop_on = bool(declare(self, WATCHDOG["stop_on_violation"]))
        stop_service = declare(self, WATCHDOG["stop_service"])
        js_qos = declare(self, WATCHDOG["joint_states_qos"])
        try:
            limits = JointLimits.from_file(limits_file, dynamics or None)
        except LimitsError as exc:
            raise WatchdogMonitorError(f"parameter 'limits_file': {exc}") from None
        if limits.left_out:
            self.get_logger().info(limits.left_out)
        try:
            config = WatchdogConfig(following_error=float(following),
                                    command_latency=float(latency))
        except WatchdogError as exc:
            raise WatchdogMonitorError(str(exc)) from None
        try:
            qos = qos_by_name(js_qos, 100)  # deep: joints may come in several streams
        except ValueError as exc:
            raise WatchdogMonitorError(f"parameter 'joint_states_qos': {exc}") from None
        self.monitor = StreamMonitor(limits, config)
        self._joints = list(limits.names)
        self._order: dict[tuple[str, ...], np.ndarray] = {}
        self._bad_messages = 0
        self._stop_calls = 0
        self._last_stop = -float("inf")
        self._stop_client = self.create_client(Trigger, stop_service) if self._stop_on else None
        self.create_subscription(JointTrajectory, "setpoints", self._on_setpoint,
                                 reliable_qos(100))
        self.create_subscription(JointState, "joint_states", self._on_joint_state, qos)
        self._diag = DiagnosticsReporter(self, "watchdog", values=self._diag_values)
        self._diag.set(OK, "no violation")
        self.get_logger().info(f"watching setpoints and joint_states of {len(self._joints)} "
                               f"joints (limits {limits_file}); stop_on_violation "
                               f"{self._stop_on}")

    # ------------------------------------------------------------------ conversions
    def _index(self, names: list[str]) -> np.ndarray:
        key = tuple(names)
        idx = self._order.get(key)
        if idx is None:
            missing = [j for j in self._joints if j not in names]
            if missing:
                raise ValueError(f"joints {missing} missing (message has {names})")
            idx = np.array([names.index(j) for j in self._joints])
            self._order[key] = idx
        return idx

    def _on_setpoint(self, msg: JointTrajectory) -> None:
        try:
            if len(msg.points) != 1:
                raise ValueError(f"expected one point, got {len(msg.points)}")
            idx = self._index(list(msg.joint_names))
            pt = msg.points[0]
            sp = MotionState(np.asarray(pt.positions, float)[idx],
                             np.asarray(pt.velocities, float)[idx],
                             np.asarray(pt.accelerations, float)[idx])
        except (ValueError, IndexError) as exc:
            self._bad(f"setpoints: {exc}")
            return
        reason = self.monitor.setpoint(stamp_to_sec(msg.header.stamp), sp)
        if reason is not None:
            self._violation(f"setpoint: {reason}")

    def _on_joint_state(self, msg: JointState) -> None:
        try:
            got = joint_positions(msg, self._joints)
        except JointStateError as exc:
            self._bad(f"joint_states: {exc}")
            return
        if not got.present.any():  # e.g. a message of the gripper alone
            return
        reason = self.monitor.joint_state(got.stamp, got.position, got.present,
                                          arrival=now_sec(self))
        if reason is not None:
            self._violation(f"following: {reason}")

    def _bad(self, what: str) -> None:
        self._bad_messages += 1
        self.get_logger().warn(f"message ignored: {what}", throttle_duration_sec=5.0)

    # ------------------------------------------------------------------ reactions
    def _violation(self, reason: str) -> None:
        self._diag.set(ERROR, reason)
        self.get_logger().error(reason, throttle_duration_sec=1.0)
        client = self._stop_client
        now = time.monotonic()
        if client is None or now - self._last_stop < STOP_INTERVAL_S:
            return
        self._last_stop = now
        if not client.service_is_ready():
            self.get_logger().warn(f"stop service '{client.srv_name}' not available")
            return
        self._stop_calls += 1
        client.call_async(Trigger.Request()).add_done_callback(self._stop_done)

    def _stop_done(self, future: Any) -> None:
        try:
            res = future.result()
            self.get_logger().info(f"stop requested: {res.message}")
        except Exception as exc:  # never let a callback raise
            self.get_logger().warn(f"stop request failed: {exc}")

    def _diag_values(self) -> list[tuple[str, Any]]:
        s = self.monitor.stats
        return [("setpoints_checked", s.setpoints),
                ("setpoint_violations", s.setpoint_violations),
                ("last_setpoint_violation", s.last_setpoint_violation or "none"),
                ("joint_states_checked", s.joint_states),
                ("joint_states_judged", s.judged),
                ("joint_states_clock_offset", self.monitor.driver_clock.estimate),
                ("following_violations", s.following_violations),
                ("following_error_max", s.following_error_max),
                ("last_following_violation", s.last_following_violation or "none"),
                ("stop_on_violation", self._stop_on),
                ("stop_calls", self._stop_calls),
                ("bad_messages", self._bad_messages)]


def main(args: list[str] | None = None) -> int:
    """Run the watchdog node until Ctrl-C; a bad setup prints one error line, exit 1."""
    return run_nodes([WatchdogMonitor], args=args)


if __name__ == "__main__":
    sys.exit(main())
