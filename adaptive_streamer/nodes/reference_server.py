# SPDX-License-Identifier: Apache-2.0
"""``reference_server`` node: plays a reference trajectory as a rolling window.

Loads a reference (CSV, own YAML points or waypoints, or a rosbag2 topic; see
`adaptive_streamer.io.reference_bags`), checks it against the joint limits (refusing it,
or slowing it down when ``slow_down`` is set), and every decision period publishes the
next ``horizon`` points on ``reference/window`` (trajectory_msgs/JointTrajectory;
header.stamp = when points[0] applies, points[i].time_from_start = i * decision_period,
positions/velocities/accelerations filled). Before start the window holds the first point
at rest; after the end (``end_mode: hold``) it holds the final point at rest.

Also: ``reference/path`` (transient-local, once): the whole reference resampled at the
decision period (time_from_start = reference time at override 1); services ``~/start``,
``~/pause``, ``~/resume`` (std_srvs/Trigger); ``speed_override`` settable at runtime
(refused outside [0.05, 1]); state and progress on ``/diagnostics`` about once a second.
All times are ROS time (``use_sim_time`` works).

Parameters (read-only unless noted):
  reference_file      CSV / YAML / rosbag2 path (required)
  bag_topic           topic to read when reference_file is a bag
  joint_names         expected joints and their order (default: the file's)
  limits_file         joint limits YAML or URDF (required; feasibility and waypoint timing)
  horizon             points per window (default 10)
  decision_period     spacing of window points and publish period [s] (default 0.05)
  speed_override      time-scaling factor in [0.05, 1] (default 1.0; settable at runtime)
  override_ramp_time  duration of each override ramp [s] (default 1.0)
  end_mode            'hold' or 'loop' (default 'hold'; loop uses a periodic spline)
  start_mode          'service' (wait for ~/start) or 'immediate' (default 'service')
  slow_down           slow an infeasible reference down instead of refusing it (default false)
  limit_fraction      fraction of the limits used by waypoint timing and by the slow-down (0.8)
  max_gap             largest allowed time between file samples [s]; 0 disables (default 1.0)
  start_condition     'none' (start on request) or 'lock_on' (default 'none'): with lock_on,
                      ~/start (or start_mode immediate) waits until the task feedback has
                      settled (`adaptive_streamer.core.lock_on`), then starts; if it does not
                      within lock_on.timeout the state is 'lock_failed' with the reason
                      (diagnostics, log) and ~/start may be called again
  lock_on.feature     the feature of ``feedback`` (sensor_msgs/JointState, a name) to judge
  lock_on.tolerance   largest |value| that counts as settled (feature unit; default 0.001)
  lock_on.hold        how long every reading must be settled [s] (default 0.5)
  lock_on.timeout     how long to wait [s] (default 10.0)
  lock_on.max_age     longest gap between readings, and oldest last reading [s] (default 0.1)
"""
from __future__ import annotations

import math
import sys
from typing import Any, Callable

from rcl_interfaces.msg import SetParametersResult
from rclpy.parameter import Parameter
from sensor_msgs.msg import JointState
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.core.feasibility import FeasibilityError, ensure_feasible
from adaptive_streamer.core.limits import JointLimits, LimitsError
from adaptive_streamer.core.lock_on import (LockOn, LockOnConfig, LockOnError, LockState,
                                            LockVerdict)
from adaptive_streamer.core.playback import Playback, PlaybackError, validate_override
from adaptive_streamer.io.reference_bags import ReferenceFileError, load_reference

from ..io.param_specs import REFERENCE_SERVER
from .common import (ERROR, OK, WARN, DiagnosticsReporter, SetupNode, declare, now_sec,
                     reliable_qos, run_nodes)
from ..io.trajectory_conversions import samples_to_msg, window_to_msg



class ReferenceServerError(RuntimeError):
    """The reference server cannot start with the given parameters or files."""


class ReferenceServer(SetupNode):
    """Publishes reference windows from a core `Playback`; converts only."""

    param_error = ReferenceServerError

    def __init__(self, **kwargs: Any) -> None:
        super().__init__("reference_server", **kwargs)

    # ------------------------------------------------------------------ startup
    def _setup(self) -> None:
        ref_file = declare(self, REFERENCE_SERVER["reference_file"])
        topic = declare(self, REFERENCE_SERVER["bag_topic"])
        joints = declare(self, REFERENCE_SERVER["joint_names"])
        limits_file = declare(self, REFERENCE_SERVER["limits_file"])
        horizon = declare(self, REFERENCE_SERVER["horizon"])
        period = declare(self, REFERENCE_SERVER["decision_period"])
        override = declare(self, REFERENCE_SERVER["speed_override"])
        ramp = declare(self, REFERENCE_SERVER["override_ramp_time"])
        end_mode = declare(self, REFERENCE_SERVER["end_mode"])
        start_mode = declare(self, REFERENCE_SERVER["start_mode"])
        slow_down = declare(self, REFERENCE_SERVER["slow_down"])
        fraction = declare(self, REFERENCE_SERVER["limit_fraction"])
        max_gap = declare(self, REFERENCE_SERVER["max_gap"])
        condition = declare(self, REFERENCE_SERVER["start_condition"])
        lock_values = tuple(declare(self, REFERENCE_SERVER[f"lock_on.{name}"])
                            for name in ("feature", "tolerance", "hold", "timeout", "max_age"))

        for name, value in (("decision_period", period), ("override_ramp_time", ramp)):
            if not math.isfinite(value):
                raise ReferenceServerError(f"parameter '{name}': expected a finite time in "
                                           f"seconds, got {value}")
        self._lock: LockOn | None = None
        if condition == "lock_on":
            try:
                self._lock = LockOn(LockOnConfig(*lock_values))
            except LockOnError as exc:
                raise ReferenceServerError(f"parameters 'lock_on.*': {exc}") from None
        try:
            limits = JointLimits.from_file(limits_file)
        except LimitsError as exc:
            raise ReferenceServerError(f"parameter 'limits_file': {exc}") from None
        ends = "periodic" if end_mode == "loop" else "rest"
        try:
            reference = load_reference(ref_file, topic=topic or None, joints=joints or None,
                                       limits=limits, max_gap=max_gap or None, ends=ends,
                                       fraction=fraction)
            reference, self.slow_down_factor, self.feasibility = ensure_feasible(
                reference, limits, slow_down=slow_down, fraction=fraction)
        except (ReferenceFileError, FeasibilityError) as exc:
            raise ReferenceServerError(f"parameter 'reference_file': {exc}") from None
        try:
            self.playback = Playback(reference, period, horizon, end_mode=end_mode,
                                     override=override, ramp_time=ramp)
        except PlaybackError as exc:
            raise ReferenceServerError(f"parameters 'end_mode' / 'reference_file': {exc}") from None

        self.reference = reference
        self._source = f"{ref_file}" + (f" ({topic})" if topic else "")
        self._immediate = start_mode == "immediate"
        self._msg = JointTrajectory()
        self._published = 0
        self._error = ""
        self._last_state = ""
        self._window_pub = self.create_publisher(JointTrajectory, "reference/window",
                                                 reliable_qos(1))
        path_pub = self.create_publisher(JointTrajectory, "reference/path",
                                         reliable_qos(1, transient_local=True))
        path_pub.publish(samples_to_msg(reference.resample(period), now_sec(self)))
        self._path_pub = path_pub
        self._verdict = LockVerdict(LockState.IDLE)
        if self._lock is not None:
            self.create_subscription(JointState, "feedback", self._on_feedback, 50)
        self.create_service(Trigger, "~/start", self._service(self._start))
        self.create_service(Trigger, "~/pause", self._service(self.playback.pause))
        self.create_service(Trigger, "~/resume", self._service(self.playback.resume))
        self.add_on_set_parameters_callback(self._validate_params)
        self.add_post_set_parameters_callback(self._apply_params)
        self._diag = DiagnosticsReporter(self, "reference_server", values=self._diag_values)
        self.create_timer(period, self._tick)
        note = (f"; slowed down {self.slow_down_factor:.4g}x to fit the limits"
                if self.slow_down_factor > 1.0 else "")
        self.get_logger().info(
            f"reference {self._source}: {len(reference.names)} joints, "
            f"{reference.duration:.3f} s, {self.feasibility.summary()}{note}")

    # ------------------------------------------------------------------ callbacks
    def _start(self, t: float) -> str:
        """~/start: start now, or (with lock-on) once the feedback has settled."""
        lock = self._lock
        if lock is None or self.playback.state != "waiting":
            return self.playback.start(t)
        if lock.state is LockState.WAITING:
            return "already waiting for lock-on: " + self._verdict.reason
        lock.begin(t)
        self._verdict = lock.judge(t)
        return "start requested; " + self._verdict.reason

    def _on_feedback(self, msg: JointState) -> None:
        lock = self._lock
        if lock is None or lock.state is not LockState.WAITING:
            return
        try:
            i = list(msg.name).index(lock.config.feature)
            value = float(msg.position[i])
        except (ValueError, IndexError):
            value = math.nan   # the feature is missing from this message: not settled
        lock.add(now_sec(self), value)

    def _judge_lock(self, t: float) -> None:
        """Start the playback once locked on; log a failed lock-on once."""
        lock = self._lock
        if lock is None:
            return
        if self._immediate and lock.state is LockState.IDLE and self.playback.state == "waiting":
            lock.begin(t)
        if lock.state is not LockState.WAITING:
            return
        self._verdict = lock.judge(t)
        if self._verdict.state is LockState.LOCKED:
            self.get_logger().info(f"locked on ({self._verdict.reason}): "
                                   f"{self.playback.start(t)}")
        elif self._verdict.state is LockState.FAILED:
            self.get_logger().error(f"start refused: {self._verdict.reason}")

    def _state(self) -> str:
        """The playback state, or the lock-on's while it holds the start."""
        if self.playback.state == "waiting" and self._verdict.state is LockState.WAITING:
            return "locking"
        if self.playback.state == "waiting" and self._verdict.state is LockState.FAILED:
            return "lock_failed"
        return self.playback.state

    def _tick(self) -> None:
        try:
            t = now_sec(self)
            self._judge_lock(t)
            if self._immediate and self._lock is None and self.playback.state == "waiting":
                self.playback.start(t)
            window_to_msg(self.playback.window(t), self._msg)
            self._window_pub.publish(self._msg)
            self._published += 1
            self._error = ""
            self._update_status()
        except Exception as exc:  # never let a timer callback raise
            self._error = f"window not published: {exc}"
            self._last_state = ""
            self._diag.set(ERROR, self._error)
            self.get_logger().error(self._error, throttle_duration_sec=5.0)

    def _update_status(self) -> None:
        state = self._state()
        if state == self._last_state:
            return
        self._last_state = state
        if state == "lock_failed":
            self._diag.set(ERROR, f"{state}: {self._verdict.reason}")
        else:
            level = WARN if self.slow_down_factor > 1.0 else OK
            note = (f" (slowed down {self.slow_down_factor:.4g}x)"
                    if self.slow_down_factor > 1.0 else "")
            self._diag.set(level, state + note)
        self._diag.publish()   # a change of state is told at once

    def _service(self, request: Callable[[float], str]) -> Callable[[Any, Any], Any]:
        def handle(req: Trigger.Request, resp: Trigger.Response) -> Trigger.Response:
            try:
                resp.message = request(now_sec(self))
                resp.success = True
            except PlaybackError as exc:
                resp.success, resp.message = False, str(exc)
            except Exception as exc:  # never let a service callback raise
                resp.success, resp.message = False, f"internal error: {exc}"
            self.get_logger().info(f"{request.__name__}: {resp.message}")
            return resp
        return handle

    def _validate_params(self, params: list[Parameter]) -> SetParametersResult:
        for p in params:
            if p.name == "speed_override":
                try:
                    validate_override(p.value)
                except PlaybackError as exc:
                    return SetParametersResult(successful=False, reason=str(exc))
        return SetParametersResult(successful=True)

    def _apply_params(self, params: list[Parameter]) -> None:
        for p in params:
            if p.name == "speed_override":
                try:
                    self.get_logger().info(self.playback.set_override(p.value, now_sec(self)))
                except Exception as exc:  # never let a parameter callback raise
                    self.get_logger().error(f"speed_override {p.value} not applied: {exc}")

    def _diag_values(self) -> list[tuple[str, Any]]:
        st = self.playback.status()
        fz = self.feasibility
        return [
            ("state", self._state()),
            ("lock_on", self._verdict.reason or "none"),
            ("progress", st.progress),
            ("reference_time", st.reference_time),
            ("duration", st.duration),
            ("laps", st.laps),
            ("speed_override", st.override_target),
            ("override_now", st.override),
            ("windows_published", self._published),
            ("source", self._source),
            ("slow_down_factor", self.slow_down_factor),
            ("peak_velocity_ratio", float(fz.velocity_ratio.max())),
            ("peak_acceleration_ratio", float(fz.acceleration_ratio.max())),
            ("peak_jerk_ratio", float(fz.jerk_ratio.max())),
            ("last_error", self._error or "none"),
        ]


def main(args: list[str] | None = None) -> int:
    """Run the reference server until Ctrl-C; a bad setup prints one error line, exit 1."""
    return run_nodes([ReferenceServer], args=args)


if __name__ == "__main__":
    sys.exit(main())
