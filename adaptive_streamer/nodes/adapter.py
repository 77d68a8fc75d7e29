# SPDX-License-Identifier: Apache-2.0
"""Node ``adapter`` (lifecycle): runs the policy every decision period and streams setpoints.

A thin shell around `adaptive_streamer.core.session.StreamingSession`: it converts messages,
owns parameters, timers and services, and calls the core.

Transitions (drive them with the lifecycle services, e.g. from Python with
`adaptive_streamer.nodes.lifecycle_client`):

* configure: load limits and the policy card, validate everything; refuse with a message.
* activate: refused unless ``joint_states`` is fresh and the arm nearly still, and unless
  each input has no more publishers than its ``sources.*`` allow-list admits; the plan
  starts from the measured state, holds, approaches the reference's current point with a
  jerk-limited move at reduced limits, then follows with the policy.
* deactivate / shutdown: a controlled stop while the stream keeps running; the managed
  publishers are deactivated only once at rest (or after ``stop_timeout``).

Threads: the stream runs in its own thread (`stream_thread`), sleeping to absolute tick
times; one executor thread (`threads.make_executor`) runs the subscriptions, the services
and the decision (triggered by a guard condition when the stream enters the last committed
segment). Callbacks only store the latest message; conversions are in
`adaptive_streamer.io` and every decision and check is in the core.

Input provenance: while active, a timer in the io callback group (every
`SOURCES_PERIOD`) reads the publishers of each input from the ROS graph and stops the arm
(``input_source``) on one that is not expected (`adaptive_streamer.core.provenance`).
``~/reset`` is refused until the inputs have been fresh, the feedback changing, for
``watchdog.reset_hold`` (`adaptive_streamer.core.input_hold`), and while a publisher is
unexpected. Each decision's reference window is checked against the whole path the
reference server published (``reference/path``, `adaptive_streamer.core.path_agreement`):
a window off it stops the arm as ``input_source`` (after the cycle's own deviation check,
so a large jump still stops as ``deviation``). A ``false`` on the ``stop`` topic does not
release a stop (the message does not say who sent it): ``~/reset`` does.
"""
from __future__ import annotations

import os
import sys
import threading
import time
from typing import Any, Callable

import numpy as np
from lifecycle_msgs.msg import State as StateMsg
from rcl_interfaces.msg import SetParametersResult
from rclpy.callback_groups import MutuallyExclusiveCallbackGroup
from rclpy.executors import Executor
from rclpy.lifecycle import LifecycleNode, LifecycleState, TransitionCallbackReturn
from rclpy.node import Node
from rclpy.parameter import Parameter
from sensor_msgs.msg import JointState
from std_msgs.msg import Bool, Float64MultiArray, MultiArrayDimension, String
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.core import decision_record
from adaptive_streamer.core.activation import check_activation, first_tick
from adaptive_streamer.core.adapter_setup import DEFAULTS, build_session
from adaptive_streamer.core.adapter_status import (CycleTimings, StatusLevel, session_summary,
                                                   session_values)
from adaptive_streamer.core.input_hold import InputHold
from adaptive_streamer.core.path_agreement import PathError, ReferencePath
from adaptive_streamer.core.playback import Window
from adaptive_streamer.core.provenance import (UNIDENTIFIED, InputTopic, expected_sources,
                                               source_fault)
from adaptive_streamer.core.segment import MotionState
from adaptive_streamer.core.session import SessionInputs, StreamingSession
from adaptive_streamer.core.stream import StreamClock, StreamTimeline
from adaptive_streamer.io.joint_states import JointStateMerger, cdr_decoder

from . import common
from ..io.adapter_inputs import LatestInputs
from ..io.param_specs import ADAPTER
from ..io.trajectory_conversions import TrajectoryMessageError, msg_to_window
from .common import OK, WARN, ERROR, declare, now_sec, qos_by_name, refuse_undeclared
from .lifecycle_guard import guard_change_state
from .policy_swap import PolicyLoader
from .driver_outputs import DriverOutput, fill_setpoint, output_type, setpoint_message
from .stream_thread import StreamThread
from .threads import make_executor, prepare_process, set_thread_priority

LEVELS = {StatusLevel.OK: OK, StatusLevel.WARN: WARN, StatusLevel.ERROR: ERROR}
JOINT_STATES_DEPTH = 100  # joint_states messages queued (0.2 s at 500 Hz)
SOURCES_PERIOD = 0.5      # how often the inputs' publishers are read from the graph [s]
UNNAMED_NODE = "_NODE_NAME_UNKNOWN_"   # the graph's node name of a not yet identified publisher


class AdapterNode(LifecycleNode):
    """The adapter lifecycle node (see the module docstring)."""

    def __init__(self, name: str = "adapter", **kwargs: Any) -> None:
        super().__init__(name, **kwargs)
        guard_change_state(self, lambda: self._state_machine.current_state[1])
        self._timeline: StreamTimeline | None = None
        self._anchor_timeline()
        self._declare_parameters()
        self._priority_note = set_thread_priority(
            int(self.get_parameter("decision_priority").value))
        self._stream_group = MutuallyExclusiveCallbackGroup()
        self._decide_group = MutuallyExclusiveCallbackGroup()
        self._io_group = MutuallyExclusiveCallbackGroup()
        self.session: StreamingSession | None = None
        self._internal_set = threading.local()
        self._latest_inputs: LatestInputs | None = None
        self._stream_timer = None
        self._decide_gc = None
        self._ticks: StreamClock | None = None
        self._paused_for: object | None = None
        self._counters = {"guard_failures": 0, "bad_joint_states": 0, "bad_windows": 0,
                          "decision_errors": 0, "stream_errors": 0, "policy_swaps_failed": 0}
        self._timings = CycleTimings()
        self._status = "unconfigured"
        self._loader = PolicyLoader(int(self.get_parameter("decision_priority").value))
        self.add_on_set_parameters_callback(self._on_set_parameters)
        self._diag = common.DiagnosticsReporter(self, "adapter", values=self._diag_values)
        self._robot_description: str | None = None
        self._js_merger: JointStateMerger | None = None
        self.create_subscription(String, "robot_description", self._on_robot_description,
                                 common.reliable_qos(1, transient_local=True),
                                 callback_group=self._io_group)
        self._sources_timer = None
        self._expected: dict[InputTopic, tuple[str, ...]] = {}
        self._source_faults: dict[InputTopic, str | None] = {}
        self._autostart_timer = None
        if self.get_parameter("autostart").value:
            self.start_autostart()

    def start_autostart(self) -> None:
        """Configure and activate from a timer (activation retried until joint_states is
        fresh and the arm still)."""
        if self._autostart_timer is None:
            self._autostart_timer = self.create_timer(0.5, self._autostart,
                                                      callback_group=self._io_group)

    # ------------------------------------------------------------------ parameters
    def _declare_parameters(self) -> None:
        """Declare every parameter of the adapter's table; refuse overrides it does not
        read (a params-file typo must not pass silently)."""
        for spec in ADAPTER.params:
            declare(self, spec)
        refuse_undeclared(self, ADAPTER)

    def _param(self, name: str) -> Any:
        return self.get_parameter(name).value

    def _set_internal(self, name: str, value: Any) -> None:
        self._internal_set.on = True
        try:
            self.set_parameters([Parameter(name, value=value)])
        finally:
            self._internal_set.on = False

    def _on_set_parameters(self, params: list[Parameter]) -> SetParametersResult:
        """Judge a parameter change as a whole before it is applied: each value against its
        table entry, and against the lifecycle state (`Param.change_problem`: configure-time
        parameters only change while unconfigured, `limit_scale` and the watchdog thresholds
        only go down while configured); a policy swap's card is read and checked first. The
        refusal names the parameter and is the answer's reason; nothing is applied unless
        everything is accepted."""
        if getattr(self._internal_set, "on", False):
            return SetParametersResult(successful=True)
        state = self._state_machine.current_state[1]
        swaps: list[tuple[str, str, Any]] = []
        for p in params:
            if p.name == "policy_active":
                return self._refuse("policy_active is read-only (set 'policy')")
            spec = ADAPTER.lookup(p.name, {})
            if spec is None or not self.has_parameter(p.name):
                continue   # rclpy's own, or being declared (`declare` checks it)
            problem = spec.problem(p.value) or spec.change_problem(
                self._param(p.name), p.value, state)
            if problem is not None:
                return self._refuse(f"{p.name} {problem}")
            if p.name in ("policy", "shadow_policy"):
                refusal, card = self._judge_swap(p.name, p.value, state)
                if refusal:
                    self._counters["policy_swaps_failed"] += 1
                    return self._refuse(f"{p.name} '{p.value}' refused, keeping "
                                        f"'{self._param(p.name)}': {refusal}")
                swaps.append((p.name, p.value, card))
        self._apply_changes(params, swaps)
        return SetParametersResult(successful=True)

    def _refuse(self, reason: str) -> SetParametersResult:
        self.get_logger().warning(f"set_parameters refused: {reason}")
        return SetParametersResult(successful=False, reason=reason)

    def _judge_swap(self, which: str, path: str, state: str) -> tuple[str, Any]:
        """(refusal, checked card) for setting ``which`` to ``path``: unconfigured, the file
        must exist (configure loads it); configured, the card is read and checked against
        the running configuration (`policy_swap`; the model is built after the answer)."""
        if path and not os.path.isfile(path):
            return f"no such policy card file '{path}'", None
        if self.session is None:
            return "", None
        if not path:
            return ("policy must name a card", None) if which == "policy" else ("", None)
        verdict = self._loader.check(path, self._running)
        return verdict.refusal, verdict.card

    def _apply_changes(self, params: list[Parameter],
                       swaps: list[tuple[str, str, Any]]) -> None:
        """Apply accepted changes that act on a running session; a swap's policy is built
        in its own thread and takes over at the next decision (`policy_swap`)."""
        session = self.session
        if session is None:
            return
        for p in params:
            if p.name == "limit_scale":
                session.set_limit_scale(float(p.value))
                self.get_logger().info(f"limit_scale -> {p.value:g} (takes effect once the "
                                       f"motion fits)")
            elif p.name.startswith("watchdog.") and p.value != self._param(p.name):
                session.watchdog.tighten(p.name.removeprefix("watchdog."), p.value)
                self.get_logger().info(f"{p.name} -> {p.value:g} (from the next check)")
        for which, path, card in swaps:
            if card is None:   # an empty shadow_policy: no shadow from the next decision
                session.shadow_policy, session.shadow = None, None
                continue
            old = self._param(which)
            self._loader.build(card, self._running,
                               lambda policy, w=which, p=path: self._built(session, w, p, policy),
                               lambda why, w=which, p=path, o=old: self._build_failed(w, p, o, why))

    def _built(self, session: StreamingSession, which: str, path: str, policy: Any) -> None:
        """A swap's policy is built (its own thread): it takes over at the next decision."""
        if session is not self.session:
            return   # cleaned up meanwhile: the next configure loads the parameter's card
        if which == "policy":
            session.swap_policy(policy)
            self._set_internal("policy_active", path)
        else:
            session.shadow_policy, session.shadow = policy, None
        self.get_logger().info(f"{which} -> '{path}' (switching at the next decision)")

    def _build_failed(self, which: str, path: str, old: str, why: str) -> None:
        """A checked card whose model failed to build (its own thread): reported, counted,
        and the parameter set back; the old policy never stopped running."""
        self._counters["policy_swaps_failed"] += 1
        self.get_logger().error(f"{which} '{path}' refused after its card was accepted, "
                                f"keeping '{old}': {why}")
        if self._param(which) == path:
            self._set_internal(which, old)

    # ------------------------------------------------------------------ lifecycle
    def _autostart(self) -> None:
        state = self._state_machine.current_state[1]
        if state == "unconfigured":
            if self.trigger_configure() != TransitionCallbackReturn.SUCCESS:
                return
        state = self._state_machine.current_state[1]
        if state == "inactive":
            self.trigger_activate()
        elif state == "active":
            self._autostart_timer.cancel()

    def on_configure(self, state: LifecycleState) -> TransitionCallbackReturn:
        try:
            self._configure()
        except Exception as exc:
            self._destroy_configured()
            self.get_logger().error(f"configure refused: {exc}")
            self._status = f"configure refused: {exc}"
            self._diag.set(ERROR, self._status)
            return TransitionCallbackReturn.FAILURE
        self._status = "configured"
        self._diag.set(OK, "configured")
        return super().on_configure(state)

    def _configure(self) -> None:
        params = {n: self._param(n) for n in DEFAULTS}
        params.update({f"{name}.type": output_type(self, name)
                       for name in self._param("outputs") if name})
        setup = build_session(params, robot_description=self._robot_description)
        if setup.limits_note:
            self.get_logger().info(setup.limits_note)
        self.session, self._running = setup.session, setup.running
        card, rate = params["policy"], setup.rate
        self._set_internal("policy_active", card)
        self._joints = list(self._running.joints)
        self._js_merger = JointStateMerger(self._joints, decode=cdr_decoder())
        self._rate = rate
        self._latest_inputs = LatestInputs(self._joints, setup.parser)
        self._hold = InputHold()
        self._allowed = {t: [n for n in self._param(t.parameter) if n] for t in InputTopic}
        self._outputs = [DriverOutput(self, name, self._joints, rate, self._stream_group)
                         for name in self._param("outputs") if name]
        self._setpoint_pub = self.create_lifecycle_publisher(
            JointTrajectory, "setpoints", common.reliable_qos(1), callback_group=self._stream_group)
        self._shadow_pub = self.create_lifecycle_publisher(
            JointTrajectory, "shadow/setpoints", common.reliable_qos(1),
            callback_group=self._stream_group)
        self._decision_pub = self.create_lifecycle_publisher(
            Float64MultiArray, "~/decisions", common.reliable_qos(100),
            callback_group=self._decide_group)
        self._setpoint_msg = setpoint_message(self._joints)
        self._shadow_msg = setpoint_message(self._joints)
        self._decision_msg = Float64MultiArray()
        self._decision_msg.layout.dim = [MultiArrayDimension(label=decision_record.LABEL)]
        self._input_subs = {
            # deep: a driver may send its joints in several streams on the topic, and a
            # message of a slow stream must not be dropped behind a fast one
            InputTopic.JOINT_STATES: self.create_subscription(
                JointState, "joint_states", self._on_joint_states,
                qos_by_name(self._param("joint_states_qos"), JOINT_STATES_DEPTH),
                callback_group=self._io_group, raw=True),
            InputTopic.REFERENCE: self.create_subscription(
                JointTrajectory, "reference/window", self._on_window, common.reliable_qos(5),
                callback_group=self._io_group),
            InputTopic.FEEDBACK: self.create_subscription(
                JointState, "feedback", self._on_feedback,
                qos_by_name(self._param("feedback_qos"), 5), callback_group=self._io_group),
        }
        self._stop_sub = self.create_subscription(Bool, "stop", self._on_stop_topic,
                                                  common.reliable_qos(1),
                                                  callback_group=self._io_group)
        self._path: ReferencePath | None = None
        self._path_checked: Window | None = None
        path_sub = self.create_subscription(JointTrajectory, "reference/path", self._on_path,
                                            common.reliable_qos(1, transient_local=True),
                                            callback_group=self._io_group)
        self._subs = [*self._input_subs.values(), self._stop_sub, path_sub]
        self._adapter_services = [
            self.create_service(Trigger, "~/stop", self._on_stop, callback_group=self._io_group),
            self.create_service(Trigger, "~/reset", self._on_reset, callback_group=self._io_group),
        ]
        pause = self._param("reference_pause_service")
        self._pause_client = (self.create_client(Trigger, pause, callback_group=self._io_group)
                              if pause else None)

    def on_activate(self, state: LifecycleState) -> TransitionCallbackReturn:
        session = self.session
        self._anchor_timeline()
        now = self._now()
        js = self._joint_state()
        wd = session.watchdog.config
        check = check_activation(
            now, self._joints, session.limits, js[0] if js else None, js[2] if js else None,
            js[3] if js else None, wd.joint_states_timeout,
            self._latest_inputs.window_received, wd.reference_timeout,
            float(self._param("activation_velocity")), session.cycle.policy.needs_feedback,
            self._latest_inputs.feedback_received, wd.feedback_timeout)
        refusal = check.refusal or self._pin_sources()
        if refusal is not None:
            self.get_logger().error(f"activate refused: {refusal}")
            return TransitionCallbackReturn.FAILURE
        if self._path is None and wd.path_tolerance > 0.0:
            self.get_logger().warning("no reference/path received: the reference windows are "
                                      "not checked against the whole path")
        positions = js[2]
        z = np.zeros(len(self._joints))
        t0 = first_tick(now, self._rate)
        session.begin(t0, MotionState(positions, z, z))
        self._ticks = StreamClock(t0, self._rate)
        self._decide_gc = self.create_guard_condition(self._on_decide,
                                                      callback_group=self._decide_group)
        ticks = self._ticks
        self._stream_timer = StreamThread(self._now,
                                          lambda: ticks.time_of(ticks.last_index + 1),
                                          self._on_stream, self._on_stream_error,
                                          priority=int(self._param("stream_priority")))
        self._stream_timer.start()
        self._sources_timer = self.create_timer(SOURCES_PERIOD, self._check_sources,
                                                callback_group=self._io_group)
        self._status = "active"
        self._diag.set(OK, "active: approaching the reference")
        result = super().on_activate(state)
        self._publish_plan(session)  # the managed publishers are active from here on
        return result

    def _stop_and_wait(self, spin: Callable[[], None] | None = None) -> bool:
        """Start the controlled stop and wait until the stream has sent the plan's rest
        (at most ``stop_timeout``). Decides here meanwhile (this may run in the executor
        thread); ``spin`` runs the process's executor too, so that nodes sharing it (a
        driver in the same process) go on while the arm brakes."""
        session = self.session
        if session is None or self._stream_timer is None:
            return True
        session.request_stop()
        deadline = time.monotonic() + float(self._param("stop_timeout"))
        rest_from: float | None = None  # the plan is at rest from this time on
        while time.monotonic() < deadline:
            if session.mode == "stopped" and session.cycle.at_rest:
                if rest_from is None:   # in the stream's time: the plan's plus the re-timing lag
                    rest_from = session.next_decision_time + session.stream_lag
                ticks = self._ticks  # the plan runs ahead: wait until the stream got there
                if ticks is None or ticks.time_of(ticks.last_index) >= rest_from - 1e-9:
                    return True
            self._on_decide()
            if spin is None:
                time.sleep(0.005)
            else:
                spin()
        self.get_logger().error("stop_timeout: deactivating before the plan reached rest")
        return False

    def stop_at_rest(self, spin: Callable[[], None] | None = None) -> None:
        """Bring the arm to rest, then stop the stream (process shutdown; ``spin`` as in
        `_stop_and_wait`)."""
        self._stop_and_wait(spin)
        self._teardown_timers()

    def destroy_node(self) -> None:
        """Destroying an active adapter first brings the arm to rest and ends the stream
        thread (which would otherwise tick on, holding the node and its DDS participant)."""
        self.stop_at_rest()
        super().destroy_node()

    def on_deactivate(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._stop_and_wait()
        self._teardown_timers()
        self._status = "inactive"
        self._diag.set(OK, "inactive (at rest)")
        return super().on_deactivate(state)

    def _teardown_timers(self) -> None:
        if self._sources_timer is not None:
            self.destroy_timer(self._sources_timer)
            self._sources_timer = None
        if self._stream_timer is not None:
            self._stream_timer.stop()
            self._stream_timer = None
        if self._decide_gc is not None:
            self.destroy_guard_condition(self._decide_gc)
            self._decide_gc = None

    def on_cleanup(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._destroy_configured()
        self._status = "unconfigured"
        return super().on_cleanup(state)

    def _destroy_configured(self) -> None:
        """Destroy what `_configure` created, so that a later configure can create it anew."""
        pubs = [getattr(self, n, None) for n in ("_setpoint_pub", "_shadow_pub", "_decision_pub")]
        pubs += [out.publisher for out in getattr(self, "_outputs", [])]
        for pub in pubs:
            if pub is not None:
                self.destroy_lifecycle_publisher(pub)
        for sub in getattr(self, "_subs", []):
            self.destroy_subscription(sub)
        for srv in getattr(self, "_adapter_services", []):
            self.destroy_service(srv)
        if getattr(self, "_pause_client", None) is not None:
            self.destroy_client(self._pause_client)
        self._setpoint_pub = self._shadow_pub = self._decision_pub = self._pause_client = None
        self._outputs, self._subs, self._adapter_services = [], [], []
        self._latest_inputs = None
        self._js_merger = None
        self._expected, self._source_faults = {}, {}
        self._path = self._path_checked = None
        self.session = None

    def on_shutdown(self, state: LifecycleState) -> TransitionCallbackReturn:
        if state.state_id == StateMsg.PRIMARY_STATE_ACTIVE:
            self._stop_and_wait()
        self._teardown_timers()
        return super().on_shutdown(state)

    # ------------------------------------------------------------------ inputs
    def _on_robot_description(self, msg: String) -> None:
        self._robot_description = msg.data

    def _on_joint_states(self, data: bytes) -> None:
        """Store the raw message (merged with the others when a decision needs it)."""
        merger, session = self._js_merger, self.session
        if merger is not None and session is not None:
            now = self._now()
            merger.add(data, now)
            self._hold.note(InputTopic.JOINT_STATES, now,
                            session.watchdog.config.joint_states_timeout)

    def _joint_state(self) -> tuple[float, np.ndarray, np.ndarray, np.ndarray | None] | None:
        """Merged joint state: (oldest received, stamp per joint, positions, velocities) in
        joint order; None until every joint has been seen."""
        merger = self._js_merger
        if merger is None:
            return None
        js = merger.state()
        self._counters["bad_joint_states"] += merger.take_rejected()
        return None if js is None else (js.received, js.stamps, js.position, js.velocity)

    def _on_window(self, msg: JointTrajectory) -> None:
        latest, session = self._latest_inputs, self.session
        if latest is not None and session is not None:
            now = self._now()
            latest.set_window(now, msg)
            self._hold.note(InputTopic.REFERENCE, now, session.watchdog.config.reference_timeout)

    def _on_feedback(self, msg: JointState) -> None:
        latest, session = self._latest_inputs, self.session
        if latest is not None and session is not None:
            now = self._now()
            latest.set_feedback(now, msg)
            self._hold.note(InputTopic.FEEDBACK, now, session.watchdog.config.feedback_timeout,
                            msg.position)

    def _on_stop_topic(self, msg: Bool) -> None:
        """``true`` latches a stop; ``false`` is ignored (it does not say who sent it, so it
        could release another node's stop): ``~/reset`` releases the stop."""
        session = self.session
        if session is None:
            return
        now = self._now()
        if not msg.data:
            if session.watchdog.stop_requested is not None:
                self.get_logger().warning(
                    "stop topic false ignored: the message does not say which node sent it; "
                    "release the stop with ~/reset", throttle_duration_sec=5.0)
            return
        if session.watchdog.request_stop_topic(now):
            nodes = ", ".join(f"'{n}'" for n in self._publisher_nodes(self._stop_sub))
            session.stop(now, "external_stop",
                         f"stop requested on the stop topic (its publishers: {nodes or 'none'})")

    def _on_path(self, msg: JointTrajectory) -> None:
        """The whole reference (transient local): the path the windows must lie on."""
        try:
            path = msg_to_window(msg, self._joints)
            self._path = ReferencePath(path.positions, self._joints)
            self._path_checked = None
        except (TrajectoryMessageError, PathError) as exc:
            self._path = None
            self.get_logger().error(f"reference/path ignored (the windows are not checked "
                                    f"against it): {exc}")

    def _path_fault(self, window: Window | None) -> str | None:
        """Why ``window`` is off the reference path (None: on it, or nothing to check)."""
        path, session = self._path, self.session
        if path is None or window is None or session is None:
            return None
        tolerance = session.watchdog.config.path_tolerance
        return None if tolerance <= 0.0 else path.check(window.positions, tolerance).reason

    def _check_path(self, session: StreamingSession, window: Window | None) -> None:
        """After a decision: a new window off the path stops the arm (``input_source``)."""
        if window is None or window is self._path_checked or session.watchdog.tripped \
                or session.mode not in ("approaching", "following"):
            return
        self._path_checked = window
        fault = self._path_fault(window)
        if fault is not None:
            session.stop(self._now(), "input_source", fault)

    # ------------------------------------------------------------------ input sources
    def _publisher_nodes(self, sub: Any) -> list[str]:
        """Fully qualified node names of the publishers of ``sub``'s topic (graph query);
        `UNIDENTIFIED` for one whose node the graph has not named yet (the middleware
        reports the placeholder name ``_NODE_NAME_UNKNOWN_`` until then)."""
        return [UNIDENTIFIED if info.node_name == UNNAMED_NODE
                else f"{info.node_namespace.rstrip('/')}/{info.node_name}"
                for info in self.get_publishers_info_by_topic(sub.topic_name)]

    def _checked_inputs(self) -> list[InputTopic]:
        """The inputs the running policy reads (feedback only when it reads features)."""
        session = self.session
        needs = session is not None and bool(session.cycle.policy.needs_feedback)
        return [t for t in InputTopic if t is not InputTopic.FEEDBACK or needs]

    def _pin_sources(self) -> str | None:
        """At activation: the expected publishers of each input, or the refusal."""
        expected = {t: expected_sources(t, self._allowed[t],
                                        self._publisher_nodes(self._input_subs[t]))
                    for t in self._checked_inputs()}
        refusals = [e.refusal for e in expected.values() if e.refusal is not None]
        if refusals:
            return "; ".join(refusals)
        self._expected = {t: e.nodes for t, e in expected.items()}
        self._source_faults = {}
        return None

    def _source_problems(self) -> list[tuple[InputTopic, str]]:
        """(input, reason) for every input with a publisher that is not expected now."""
        out = []
        for topic, expected in self._expected.items():
            fault = source_fault(topic, expected, self._publisher_nodes(self._input_subs[topic]))
            if fault is not None:
                out.append((topic, fault))
        return out

    def _check_sources(self) -> None:
        """The sources timer: a new provenance fault stops the arm (``input_source``)."""
        session = self.session
        try:
            if session is None or session.cycle.state is None:
                return
            faults = dict(self._source_problems())
            for topic in self._expected:
                fault = faults.get(topic)
                if fault is not None and fault != self._source_faults.get(topic):
                    session.stop(self._now(), "input_source", fault)
                self._source_faults[topic] = fault
        except Exception as exc:  # never let an exception escape a callback
            self.get_logger().error(f"input source check failed: {exc}",
                                    throttle_duration_sec=5.0)
            if session is not None and session.cycle.state is not None:
                session.stop(self._now(), "input_source", f"input source check failed: {exc}")

    def _inputs(self, now: float) -> SessionInputs:
        latest = self._latest_inputs
        win = latest.window()
        if win.error is not None:
            self._counters["bad_windows"] += 1
            self.get_logger().warn(win.error, throttle_duration_sec=5.0)
        fb = latest.feedback()
        js = self._joint_state()
        return SessionInputs(win.window, win.received, fb.feedback, fb.valid_since,
                             js[2] if js else None, js[1] if js else None, js[0] if js else None)

    # ------------------------------------------------------------------ stream & decide
    def _on_stream(self, now: float) -> None:
        try:
            clock, session = self._ticks, self.session
            if clock is None or session is None:
                return
            i = clock.due(now)
            if i is None:
                last = clock.time_of(clock.last_index)
                if now < last - 1.0 / clock.rate:  # sim time went back (a bag restarted)
                    self.get_logger().error(
                        f"ROS time went back to {now:.3f} s, before the last setpoint "
                        f"({last:.3f} s): no setpoint until the clock passes it again (the "
                        "driver holds on its command timeout)", throttle_duration_sec=5.0)
                return
            t = clock.time_of(i)
            self._timings.lateness.append(now - t)
            sim = self._timeline is None  # the arm lives on sim time then
            sp, reason = session.sample(t, None if sim else time.monotonic())
            if reason is None:
                fill_setpoint(self._setpoint_msg, t, sp)
                self._setpoint_pub.publish(self._setpoint_msg)
                ahead = None
                for out in self._outputs:
                    if out.kind == "trajectory" and ahead is None:
                        ahead = session.commanded_at(t + out.dt) or sp
                    out.publish(sp, ahead or sp)
                if not sim:
                    session.sent(time.monotonic())
            else:
                self._counters["guard_failures"] += 1
            shadow = session.sample_shadow(t)
            if shadow is not None:
                fill_setpoint(self._shadow_msg, t, shadow)
                self._shadow_pub.publish(self._shadow_msg)
            if self._decide_gc is not None and session.decision_due(t):
                self._decide_gc.trigger()
        except Exception as exc:  # never let an exception escape the stream callback
            self._on_stream_error(exc)

    def _on_stream_error(self, exc: Exception) -> None:
        """An error in the stream tick or the stream thread's loop: count and log it, and
        start the controlled stop (the thread goes on ticking, so the braking reaches the
        driver)."""
        self._counters["stream_errors"] += 1
        self.get_logger().error(f"stream tick failed: {type(exc).__name__}: {exc}",
                                throttle_duration_sec=1.0)
        session = self.session
        if session is not None and session.cycle.state is not None \
                and not session.watchdog.tripped:
            session.stop(self._now(), "stream_fault",
                         f"stream tick failed: {type(exc).__name__}: {exc}")

    def _on_decide(self) -> None:
        session = self.session
        if session is None:
            return
        try:
            t0 = time.perf_counter()
            now = self._now()
            inputs = self._inputs(now)
            d = session.decide(now, inputs, self._now)
            self._check_path(session, inputs.window)
            if d is not None:
                self._publish_plan(session)
                self._decision_msg.data = decision_record.encode(d).tolist()
                self._decision_pub.publish(self._decision_msg)
            self._timings.decision.append(time.perf_counter() - t0)
            self._react(session)
        except Exception as exc:  # never let an exception escape the decision callback
            self._counters["decision_errors"] += 1
            self.get_logger().error(f"decision failed: {exc}", throttle_duration_sec=1.0)
            if self.session is not None:
                self.session.stop(self._now(), "policy_fault", f"decision failed: {exc}")

    def _now(self) -> float:
        """The adapter's time [s]: ROS time as of the last anchor (node start, activation)
        carried forward on the monotonic clock, or the ROS clock itself under sim time.
        Input receive times, decisions and setpoint stamps are all on it, so a step of the
        system clock neither stops nor bunches the stream (not named ``_clock``, which is
        rclpy's own attribute)."""
        if self._timeline is None:
            return now_sec(self)
        return self._timeline.at(time.monotonic_ns())

    def _anchor_timeline(self) -> None:
        """Re-read ROS time as the anchor of the adapter's time (see `_now`); no anchor
        under sim time."""
        clock = self.get_clock()
        self._timeline = (None if clock.ros_time_is_active else
                          StreamTimeline(clock.now().nanoseconds, time.monotonic_ns()))

    def _publish_plan(self, session: StreamingSession) -> None:
        """Send the plan of the last commit on every plan output."""
        knots = session.last_plan
        if knots is not None:
            for out in self._outputs:
                out.publish_plan(knots)

    def _react(self, session: StreamingSession) -> None:
        for trip in session.new_trips():
            self.get_logger().error(f"watchdog: {trip.kind} at {trip.time:.3f} s: {trip.message}")
        trip = session.watchdog.trip
        if trip is not None:
            self._diag.set(ERROR, f"stopped by {trip.kind}: {trip.message}")
            if self._paused_for is not trip:
                self._paused_for = trip
                self._pause_reference()

    def _pause_reference(self) -> None:
        client = self._pause_client
        if client is None:
            return
        if not client.service_is_ready():
            self.get_logger().warn(f"reference pause service '{client.srv_name}' not available")
            return
        future = client.call_async(Trigger.Request())

        def done(f: Any) -> None:
            try:
                res = f.result()
                if res.success:  # one severity per call site (rclpy refuses a change)
                    self.get_logger().info(f"reference pause: {res.message}")
                else:
                    self.get_logger().warn(f"reference pause: {res.message}")
            except Exception as exc:
                self.get_logger().warn(f"reference pause failed: {exc}")
        future.add_done_callback(done)

    # ------------------------------------------------------------------ services
    def _on_stop(self, request: Trigger.Request, response: Trigger.Response) -> Trigger.Response:
        """Latch the external stop; the answer says whether anything was moving."""
        session = self.session
        response.success = True
        if session is None or self._stream_timer is None:
            response.message = f"nothing was moving: the adapter is not active ({self._status})"
            return response
        moving = not (session.mode == "stopped" and session.cycle.at_rest)
        session.stop(self._now(), "external_stop", "stop requested via ~/stop")
        response.message = ("controlled stop started" if moving else
                            "nothing was moving: the plan is at rest (stop latched)")
        return response

    def _on_reset(self, request: Trigger.Request, response: Trigger.Response) -> Trigger.Response:
        session = self.session
        if session is None or session.cycle.state is None:
            response.success, response.message = False, "not streaming (activate first)"
            return response
        now = self._now()
        wd = session.watchdog.config
        timeouts = {InputTopic.JOINT_STATES: wd.joint_states_timeout,
                    InputTopic.REFERENCE: wd.reference_timeout,
                    InputTopic.FEEDBACK: wd.feedback_timeout}
        inputs = self._inputs(now)
        extra = [("input_source", reason) for _, reason in self._source_problems()]
        off_path = self._path_fault(inputs.window)
        if off_path is not None:
            extra.append(("input_source", off_path))
        extra += [("reset_hold", reason) for reason in self._hold.problems(
            now, wd.reset_hold, timeouts, self._checked_inputs())]
        ok, msg = session.reset_on(now, inputs, extra)
        if ok:
            self._diag.set(OK, "reset: approaching the reference")
            self._paused_for = None
        response.success, response.message = ok, msg
        self.get_logger().info(msg)
        return response

    # ------------------------------------------------------------------ diagnostics
    def _diag_values(self) -> list[tuple[str, Any]]:
        s = self.session
        vals: list[tuple[str, Any]] = [("status", self._status)]
        if s is None:
            return vals
        vals += [("policy_active", self._param("policy_active")),
                 ("stream_thread", self._stream_timer.priority_note if self._stream_timer
                  else "not running"),
                 ("decision_thread", self._priority_note)]
        vals += session_values(s, self._timings, self._ticks.skipped if self._ticks else 0)
        vals += list(self._counters.items())
        vals += [(t.parameter, ", ".join(nodes)) for t, nodes in self._expected.items()]
        vals += [("stop_request", s.watchdog.stop_requested or "none"),
                 ("reference_path", "none (windows not checked)" if self._path is None
                  else f"{self._path.samples} samples")]
        for out in getattr(self, "_outputs", []):
            vals += list(out.status().items())
        summary = session_summary(s, self._counters["guard_failures"])
        if summary is not None:
            self._diag.set(LEVELS[summary.level], summary.message)
        return vals


def bring_to_rest(nodes: list[Node], executor: Executor) -> None:
    """Bring every adapter among ``nodes`` to rest with the controlled stop while
    ``executor`` keeps running the other nodes (`common.run_nodes`' ``before_shutdown``).
    An error of another node's callback while spinning is logged and the stop goes on."""
    def spin() -> None:
        try:
            executor.spin_once(timeout_sec=0.005)
        except Exception as exc:
            print(f"error while bringing the arm to rest: {exc}", file=sys.stderr)
            time.sleep(0.005)
    for node in nodes:
        if isinstance(node, AdapterNode):
            node.stop_at_rest(spin)


def main(args: list[str] | None = None) -> int:
    """Run the adapter node until Ctrl-C or SIGTERM, or until an error ends the process;
    every way out brings the arm to rest first."""
    prepare_process()
    return common.run_nodes([AdapterNode], args, executor=make_executor,
                            before_shutdown=bring_to_rest)


if __name__ == "__main__":
    raise SystemExit(main())
