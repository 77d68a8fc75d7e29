# SPDX-License-Identifier: Apache-2.0
"""reference_server over real rclpy/DDS: window contents and timing against the core,
smoothness of pause/resume/override on received windows, services, runtime parameters,
the transient-local path, diagnostics, and refusal of bad files and parameters."""
from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import rclpy
from diagnostic_msgs.msg import DiagnosticArray
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from rclpy.parameter import Parameter
from rclpy.parameter_client import AsyncParameterClient
from rosgraph_msgs.msg import Clock
from sensor_msgs.msg import JointState
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.core.feasibility import ensure_feasible
from adaptive_streamer.core.limits import JointLimits
from adaptive_streamer.core.playback import Playback
from adaptive_streamer.io.reference_bags import load_reference
from adaptive_streamer.nodes.common import reliable_qos
from adaptive_streamer.nodes.reference_server import ReferenceServer, ReferenceServerError
from adaptive_streamer.io.trajectory_conversions import msg_to_window

pytestmark = pytest.mark.ros

DATA = Path(__file__).parent / "data"
LIMITS_FILE = str(DATA / "reference_limits.yaml")
PERIOD = 0.05
PERIOD_NS = 50_000_000
HORIZON = 8
RAMP = 0.5


@pytest.fixture(scope="module")
def ros():
    rclpy.init()
    yield
    rclpy.shutdown()


def params(**values) -> list[Parameter]:
    base = {"limits_file": LIMITS_FILE, "decision_period": PERIOD, "horizon": HORIZON,
            "override_ramp_time": RAMP}
    base.update(values)
    return [Parameter(k, value=v) for k, v in base.items()]


class Harness:
    """The server plus a probe node in one executor; the probe drives /clock in sim time."""

    def __init__(self, overrides: list[Parameter], sim_time: bool, clock_ns: int = 10_000_000_000):
        self.ex = SingleThreadedExecutor()
        self.probe = Node("reference_probe")
        self.windows: list[JointTrajectory] = []
        self.paths: list[JointTrajectory] = []
        self.diags: list = []
        self.probe.create_subscription(JointTrajectory, "reference/window", self.windows.append,
                                       reliable_qos(100))
        self.probe.create_subscription(DiagnosticArray, "/diagnostics", self._diag, 50)
        self.clock_pub = self.probe.create_publisher(Clock, "/clock", 10)
        self.clock_ns = clock_ns
        if sim_time:
            overrides = overrides + [Parameter("use_sim_time", value=True)]
        self.server = ReferenceServer(parameter_overrides=overrides)
        self.ex.add_node(self.probe)
        self.ex.add_node(self.server)
        # subscribed after the server published: transient-local must still deliver it
        self.probe.create_subscription(JointTrajectory, "reference/path", self.paths.append,
                                       reliable_qos(1, transient_local=True))
        self.params = AsyncParameterClient(self.probe, "reference_server")

    def _diag(self, msg: DiagnosticArray) -> None:
        self.diags += [s for s in msg.status if s.name == "reference_server"]

    def close(self) -> None:
        for n in (self.server, self.probe):
            self.ex.remove_node(n)
            n.destroy_node()
        self.ex.shutdown()

    def spin_until(self, cond, what: str, timeout: float = 15.0, kick=None) -> None:
        end = time.monotonic() + timeout
        last_kick = 0.0
        while not cond():
            if time.monotonic() > end:
                raise AssertionError(f"timed out waiting for {what}")
            if kick is not None and time.monotonic() - last_kick > 0.2:
                kick()
                last_kick = time.monotonic()
            self.ex.spin_once(timeout_sec=0.01)

    def publish_clock(self) -> None:
        msg = Clock()
        msg.clock.sec, msg.clock.nanosec = divmod(self.clock_ns, 1_000_000_000)
        self.clock_pub.publish(msg)

    def tick(self) -> JointTrajectory:
        """Advance sim time by one period and return the window stamped at the new time."""
        self.clock_ns += PERIOD_NS
        return self.await_window()

    def await_window(self) -> JointTrajectory:
        target = self.clock_ns

        def got() -> bool:
            return any(w.header.stamp.sec * 1_000_000_000 + w.header.stamp.nanosec == target
                       for w in self.windows[-3:])
        self.spin_until(got, f"window at {target} ns", kick=self.publish_clock)
        return self.windows[-1]

    @property
    def now(self) -> float:
        return self.clock_ns * 1e-9  # the server's now_sec() gives the same float

    def call(self, name: str) -> Trigger.Response:
        cli = self.probe.create_client(Trigger, f"/reference_server/{name}")
        self.spin_until(lambda: cli.service_is_ready(), f"service {name}")
        fut = cli.call_async(Trigger.Request())
        self.spin_until(fut.done, f"response of {name}")
        self.probe.destroy_client(cli)
        return fut.result()

    def set_override(self, value: float):
        self.spin_until(lambda: self.params.services_are_ready(), "parameter services",
                        timeout=15.0)
        fut = self.params.set_parameters([Parameter("speed_override", value=value)])
        self.spin_until(fut.done, "set_parameters")
        return fut.result().results[0]


def independent_reference(path: Path, ends: str = "rest"):
    limits = JointLimits.from_file(LIMITS_FILE)
    ref = load_reference(path, limits=limits, ends=ends)
    return ensure_feasible(ref, limits)[0], limits


def test_windows_match_core_and_stay_smooth_in_sim_time(ros):
    h = Harness(params(reference_file=str(DATA / "reference_smooth.csv")), sim_time=True)
    try:
        events: list[tuple] = []  # in order: ("window", msg) or (command, time)
        h.await_window()
        events.append(("window", h.windows[-1]))
        for _ in range(4):
            events.append(("window", h.tick()))
        resp = h.call("pause")
        assert not resp.success and "not running (state: waiting)" in resp.message
        resp = h.call("start")
        assert resp.success and resp.message.startswith("started")
        events.append(("start", h.now))
        resp = h.call("start")
        assert not resp.success and "already started" in resp.message
        for _ in range(20):
            events.append(("window", h.tick()))
        res = h.set_override(0.5)
        assert res.successful
        events.append(("override", h.now, 0.5))
        res = h.set_override(1.5)
        # refused by the range in its ROS descriptor, with the range and the value
        assert not res.successful and "speed_override out of range" in res.reason
        assert "Min: 0.05, Max: 1.0, value: 1.5" in res.reason, res.reason
        for _ in range(20):
            events.append(("window", h.tick()))
        assert h.call("pause").success
        events.append(("pause", h.now))
        for _ in range(20):
            events.append(("window", h.tick()))
        assert h.call("resume").success
        events.append(("resume", h.now))
        resp = h.call("resume")
        assert not resp.success and "not paused" in resp.message
        while True:
            events.append(("window", h.tick()))
            if h.server.playback.state == "finished" and len(events) > 200:
                break
            assert len(events) < 400
        for _ in range(25):  # one diagnostics period (1 s of ROS time) after finishing
            events.append(("window", h.tick()))
        h.spin_until(lambda: any(d for d in h.diags if _kv(d)["state"] == "finished"),
                     "diagnostics 'finished'", kick=h.publish_clock)

        # ---- every window equals the core playback replayed with the same commands
        ref, limits = independent_reference(DATA / "reference_smooth.csv")
        pb = Playback(ref, PERIOD, HORIZON, ramp_time=RAMP)
        received = []
        for ev in events:
            if ev[0] == "window":
                w = msg_to_window(ev[1])
                exp = pb.window(w.stamp)
                np.testing.assert_allclose(w.times, np.arange(HORIZON) * PERIOD, atol=1e-9)
                np.testing.assert_allclose(w.positions, exp.positions, atol=1e-12)
                np.testing.assert_allclose(w.velocities, exp.velocities, atol=1e-12)
                np.testing.assert_allclose(w.accelerations, exp.accelerations, atol=1e-12)
                assert w.names == ref.names
                received.append(w)
            elif ev[0] == "start":
                pb.start(ev[1])
            elif ev[0] == "override":
                pb.set_override(ev[2], ev[1])
            elif ev[0] == "pause":
                pb.pause(ev[1])
            elif ev[0] == "resume":
                pb.resume(ev[1])

        # ---- smoothness on the received stream. With s <= 1 and ramps that do not overlap,
        # |a| <= peak|a_ref| + peak|s_dot| peak|v_ref| and |da/dt| <= J = peak|j_ref| +
        # 3 peak|s_dot| peak|a_ref| + peak|s_ddot| peak|v_ref|, where the quintic smoothstep
        # over D has peak rate 1.875/D and peak second derivative 10/sqrt(3)/D^2
        # (Biagiotti & Melchiorri 2008, sec. 2.1.5, from memory). So consecutive windows'
        # velocities differ by at most T * a_bound, and by Taylor's theorem by at most
        # T^2/2 * J from T * a_k; a step in s would jump by ds * |v_ref|.
        pk = ref.peaks()
        sd, sdd = 1.875 / RAMP, 10 / np.sqrt(3) / RAMP**2
        a_bound = pk.acceleration + sd * pk.velocity
        j_bound = pk.jerk + 3 * sd * pk.acceleration + sdd * pk.velocity
        stamps = np.array([w.stamp for w in received])
        assert np.allclose(np.diff(stamps), PERIOD, atol=1e-9)
        v0 = np.array([w.velocities[0] for w in received])
        a0 = np.array([w.accelerations[0] for w in received])
        dv = np.diff(v0, axis=0)
        assert np.all(np.abs(dv) <= PERIOD * a_bound * (1 + 1e-9))
        tol = PERIOD**2 / 2 * j_bound
        assert np.all(np.abs(dv - PERIOD * a0[:-1]) <= tol * (1 + 1e-9))
        # a step in s at the override change (1 -> 0.5) would have broken this
        i_ov = int(np.argmin(np.abs(stamps - events_time(events, "override"))))
        assert np.all(0.5 * np.abs(v0[i_ov]) > 2 * tol)
        # paused: at rest, position frozen
        i_p = int(np.argmin(np.abs(stamps - events_time(events, "resume")))) - 1
        assert np.all(received[i_p].velocities == 0.0)
        np.testing.assert_allclose(received[i_p].positions, received[i_p - 5].positions)
        # finished: holding the final point at rest
        last = received[-1]
        np.testing.assert_allclose(last.positions, np.repeat(ref.positions[-1:], HORIZON, 0),
                                   atol=1e-12)
        assert np.all(last.velocities == 0.0) and np.all(last.accelerations == 0.0)
        # waiting windows held the first point at rest
        np.testing.assert_allclose(received[0].positions[0], ref.positions[0], atol=1e-12)
        assert np.all(received[0].velocities == 0.0)

        # ---- the path (transient local), resampled at the decision period
        h.spin_until(lambda: h.paths, "reference/path")
        path = h.paths[0]
        expected = ref.resample(PERIOD)
        got = np.array([p.positions for p in path.points])
        np.testing.assert_allclose(got, expected.positions, atol=1e-12)
        tfs = np.array([p.time_from_start.sec + p.time_from_start.nanosec * 1e-9
                        for p in path.points])
        np.testing.assert_allclose(tfs, expected.times, atol=1e-9)

        # ---- diagnostics report state and progress
        final = _kv([d for d in h.diags if _kv(d)["state"] == "finished"][-1])
        assert float(final["progress"]) == 1.0 and final["speed_override"] == "0.5"
    finally:
        h.close()


def events_time(events: list[tuple], kind: str) -> float:
    return next(ev[1] for ev in events if ev[0] == kind)


def _kv(status) -> dict[str, str]:
    return {kv.key: kv.value for kv in status.values}


def test_wall_clock_immediate_loop(ros):
    h = Harness(params(reference_file=str(DATA / "reference_loop_waypoints.yaml"),
                       end_mode="loop", start_mode="immediate"), sim_time=False)
    try:
        h.spin_until(lambda: len(h.windows) >= 40, "40 windows")
        assert h.server.playback.state == "running"
        ws = [msg_to_window(m) for m in h.windows[-30:]]
        ref, _ = independent_reference(DATA / "reference_loop_waypoints.yaml", ends="periodic")
        assert h.server.reference.duration == pytest.approx(ref.duration)
        pk = ref.peaks()
        sd, sdd = 1.875 / RAMP, 10 / np.sqrt(3) / RAMP**2  # smoothstep peaks (B&M 2008, from memory)
        j_bound = pk.jerk + 3 * sd * pk.acceleration + sdd * pk.velocity
        for w in ws:
            np.testing.assert_allclose(w.times, np.arange(HORIZON) * PERIOD, atol=1e-9)
            # trapezoid rule along each window: |dp - T (v_i + v_i+1) / 2| <= T^3 / 12 max|da/dt|
            # (common practice), so positions and velocities are consistent within a window
            dp = np.diff(w.positions, axis=0)
            trap = (w.velocities[1:] + w.velocities[:-1]) * PERIOD / 2
            assert np.all(np.abs(dp - trap) <= PERIOD**3 / 12 * j_bound * (1 + 1e-9) + 1e-12)
        assert np.all(np.diff([w.stamp for w in ws]) > 0)
        assert max(np.abs(w.velocities).max() for w in ws) > 0.0
    finally:
        h.close()


def test_slow_down_option_applies_factor(ros):
    fast = str(DATA / "reference_bad_too_fast.csv")
    with pytest.raises(ReferenceServerError, match=r"joint 'j1' velocity reaches .*enable the "
                                                   r"slow-down option"):
        ReferenceServer(parameter_overrides=params(reference_file=fast))
    node = ReferenceServer(parameter_overrides=params(reference_file=fast, slow_down=True))
    try:
        assert node.slow_down_factor > 1.0
        assert node.reference.duration == pytest.approx(0.2 * node.slow_down_factor)
        assert node.feasibility.peak_ratio == pytest.approx(0.8)
    finally:
        node.destroy_node()


def write_joint_state_bag(path: Path) -> Path:
    from rosbags.rosbag2 import Writer
    from rosbags.typesys import Stores, get_typestore
    ts = get_typestore(Stores.ROS2_JAZZY)
    T = ts.types
    with Writer(path, version=9) as w:
        conn = w.add_connection("/js", "sensor_msgs/msg/JointState", typestore=ts)
        for k in range(5):
            msg = T["sensor_msgs/msg/JointState"](
                header=T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](
                    sec=1, nanosec=k * 100_000_000), frame_id=""),
                name=["j1", "j2", "j3"], position=np.array([0.001 * k, 0.0, 0.0]),
                velocity=np.zeros(0), effort=np.zeros(0))
            w.write(conn, k, ts.serialize_cdr(msg, "sensor_msgs/msg/JointState"))
    return path


@pytest.mark.parametrize("overrides, fragment", [
    (dict(), "parameter 'reference_file' is empty; expected a non-empty string"),
    (dict(reference_file="x.csv", limits_file=""), "parameter 'limits_file' is empty"),
    (dict(reference_file=str(DATA / "reference_smooth.csv"), limits_file="/nonexistent.yaml"),
     "parameter 'limits_file': cannot read limits file '/nonexistent.yaml'"),
    (dict(reference_file=str(DATA / "reference_bad_unknown_joint.csv")),
     "reference_bad_unknown_joint.csv: unknown joint 'j9'"),
    (dict(reference_file=str(DATA / "reference_bad_non_monotonic.csv")),
     "line 4: time 0.1 s is not after the previous time"),
    (dict(reference_file=str(DATA / "reference_bad_nan.csv")), "line 3: joint 'j2' position is nan"),
    (dict(reference_file=str(DATA / "reference_bad_gap.csv")), "line 4: gap of 2.5 s"),
    (dict(reference_file=str(DATA / "reference_bad_gap.csv"), max_gap=3.0, slow_down=True), None),
    (dict(reference_file=str(DATA / "reference_bad_outside_limits.csv")),
     "line 3: joint 'j2' position 2.3 is outside its limits"),
    (dict(reference_file=str(DATA / "reference_smooth.csv"), joint_names=["j1", "j2"]),
     "unknown joint 'j3'; expected joints"),
    (dict(reference_file=str(DATA / "reference_smooth.csv"), end_mode="bounce"),
     "parameter 'end_mode' is 'bounce'; expected one of hold, loop"),
    (dict(reference_file=str(DATA / "reference_smooth.csv"), start_mode="later"),
     "parameter 'start_mode'"),
    (dict(reference_file=str(DATA / "reference_smooth.csv"), speed_override=1.5),
     "parameter 'speed_override' is 1.5; expected a number in [0.05, 1]"),
    (dict(reference_file=str(DATA / "reference_smooth.csv"), horizon=0),
     "parameter 'horizon' is 0; expected an integer in [1, inf)"),
    (dict(reference_file=str(DATA / "reference_smooth.csv"), decision_period=0.0),
     "parameter 'decision_period' is 0.0; expected a number in (0, inf)"),
    (dict(reference_file=str(DATA / "reference_points.yaml"), end_mode="loop"),
     "needs the last sample to equal the first (it is refused, not blended); joint 'j1'"),
    (dict(reference_file="BAG", bag_topic="/missing"), "no topic '/missing' in the bag"),
    (dict(reference_file="BAG"), "a rosbag2 reference needs the topic to read"),
])
def test_bad_parameters_refused_at_startup(ros, tmp_path, overrides, fragment):
    if overrides.get("reference_file") == "BAG":
        overrides["reference_file"] = str(write_joint_state_bag(tmp_path / "bag"))
    if fragment is None:  # the same file accepted once the allowed gap is wider
        ReferenceServer(parameter_overrides=params(**overrides)).destroy_node()
        return
    with pytest.raises(ReferenceServerError) as err:
        ReferenceServer(parameter_overrides=params(**overrides))
    assert fragment in str(err.value)


def test_bag_reference_accepted(ros, tmp_path):
    bag = write_joint_state_bag(tmp_path / "bag")
    node = ReferenceServer(parameter_overrides=params(reference_file=str(bag), bag_topic="/js"))
    try:
        assert node.reference.duration == pytest.approx(0.4)
    finally:
        node.destroy_node()


def test_main_prints_error_and_exits_nonzero():
    env = dict(os.environ)
    proc = subprocess.run(
        [sys.executable, "-m", "adaptive_streamer.nodes.reference_server", "--ros-args",
         "-p", f"reference_file:={DATA / 'reference_bad_nan.csv'}", "-p", f"limits_file:={LIMITS_FILE}"],
        capture_output=True, text=True, timeout=60, env=env)
    assert proc.returncode == 1
    assert "Traceback" not in proc.stderr
    assert "error: ReferenceServerError: parameter 'reference_file':" in proc.stderr
    assert "reference_bad_nan.csv: line 3: joint 'j2' position is nan" in proc.stderr


def test_trajectory_conversions_round_trip_reuse_and_errors():
    from adaptive_streamer.core.playback import Window
    from adaptive_streamer.io.trajectory_conversions import (TrajectoryMessageError,
                                                                window_to_msg)
    rng = np.random.default_rng(3)
    names = ("a", "b", "c")
    w = Window(12.345678901, np.arange(4) * PERIOD, rng.normal(size=(4, 3)),
               rng.normal(size=(4, 3)), rng.normal(size=(4, 3)), names)
    msg = window_to_msg(w)
    points = list(msg.points)
    assert (msg.header.stamp.sec, msg.header.stamp.nanosec) == (12, 345678901)
    back = msg_to_window(msg)
    assert back.names == names and back.stamp == pytest.approx(w.stamp, abs=1e-9)
    for field in ("times", "positions", "velocities", "accelerations"):
        np.testing.assert_allclose(getattr(back, field), getattr(w, field), atol=1e-9)
    w2 = w._replace(positions=w.positions + 1.0)
    assert window_to_msg(w2, msg) is msg and all(p is q for p, q in zip(msg.points, points))
    np.testing.assert_allclose(msg_to_window(msg).positions, w2.positions)
    reordered = msg_to_window(msg, names=["c", "a"])
    np.testing.assert_allclose(reordered.velocities, w.velocities[:, [2, 0]])
    assert reordered.names == ("c", "a")
    with pytest.raises(TrajectoryMessageError, match="joint 'z' is not in the trajectory"):
        msg_to_window(msg, names=["z"])
    msg.points[2].accelerations = [0.0]
    with pytest.raises(TrajectoryMessageError, match="point 2 has 1 accelerations; expected 3"):
        msg_to_window(msg)
    with pytest.raises(TrajectoryMessageError, match="0 points"):
        msg_to_window(JointTrajectory(joint_names=["a"]))


LOCK = dict(start_condition="lock_on", **{"lock_on.feature": "edge_offset",
                                          "lock_on.tolerance": 0.001, "lock_on.hold": 0.3,
                                          "lock_on.timeout": 2.0, "lock_on.max_age": 0.1})


def _feed(h: Harness, pub, value: float) -> JointTrajectory:
    """One period on: the clock, one feedback reading, the window of the new time."""
    h.clock_ns += PERIOD_NS
    h.publish_clock()
    msg = JointState(name=["edge_angle", "edge_offset"], position=[0.0, value])
    pub.publish(msg)
    return h.await_window()


def test_lock_on_starts_the_pass_once_the_feedback_has_settled(ros):
    h = Harness(params(reference_file=str(DATA / "reference_smooth.csv"), **LOCK), sim_time=True)
    pub = h.probe.create_publisher(JointState, "feedback", 10)
    try:
        h.await_window()
        answer = h.call("start")
        assert answer.success and "waiting for edge_offset within 0.001" in answer.message
        for _ in range(20):   # 1 s off by 5 mm: the pass must not start
            w = _feed(h, pub, 0.005)
        assert h.server.playback.state == "waiting"
        assert np.all(np.array(w.points[0].velocities) == 0.0)
        settled = []
        while "running" not in settled and len(settled) < 40:
            _feed(h, pub, 0.0004)   # settled: within 1 mm
            settled.append(h.server.playback.state)
        # not before 0.3 s of settled readings (7 readings 0.05 s apart), then it starts
        assert "running" in settled and settled.index("running") >= 6, settled
    finally:
        h.close()


def test_lock_on_that_never_settles_fails_with_its_reason_and_may_be_retried(ros):
    h = Harness(params(reference_file=str(DATA / "reference_smooth.csv"), **LOCK), sim_time=True)
    pub = h.probe.create_publisher(JointState, "feedback", 10)
    try:
        h.await_window()
        assert h.call("start").success
        for _ in range(45):   # 2.25 s, past the 2 s timeout
            _feed(h, pub, 0.003)
        assert h.server.playback.state == "waiting"
        h.spin_until(lambda: any(d.message.startswith("lock_failed") for d in h.diags),
                     "lock_failed diagnostics")
        failed = [d for d in h.diags if d.message.startswith("lock_failed")][-1]
        assert "no lock-on within 2 s" in failed.message and "largest 0.003" in failed.message
        again = h.call("start")
        assert again.success and "start requested" in again.message
    finally:
        h.close()


@pytest.mark.parametrize("overrides, fragment", [
    (dict(start_condition="later"), "parameter 'start_condition'"),
    (dict(LOCK, **{"lock_on.timeout": 0.2}), "'timeout' (0.2 s) must be longer than 'hold'"),
    (dict(LOCK, **{"lock_on.feature": ""}), "'feature' must name a feedback feature"),
])
def test_bad_lock_on_parameters_are_refused(ros, overrides, fragment):
    with pytest.raises(ReferenceServerError, match=re.escape(fragment)):
        ReferenceServer(parameter_overrides=params(reference_file=str(DATA / "reference_smooth.csv"),
                                                   **overrides))
