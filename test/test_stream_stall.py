# SPDX-License-Identifier: Apache-2.0
"""Stalls of and errors in the adapter's stream thread mid-motion, over real rclpy/DDS,
checked from outside.

The adapter runs in this process so that only its stream thread is blocked (the executor,
the middleware and the probe run on): once in its loop between two ticks (the thread idle,
as when the machine does not schedule it) and once inside the setpoint publish (the stall
falls between sampling a setpoint and sending it, so that command leaves late). Each for
50 ms and 300 ms while the arm follows the moving reference. Then an exception is raised
once at each of the two places: the stream must brake to rest (a ``stream_fault`` stop),
never fall silent.

An independent subscriber receives every setpoint with the middleware's source timestamp
(when the adapter handed it to DDS) and checks each command against the previous one sent:
the position, velocity and acceleration steps are within what the velocity, acceleration
and jerk limits allow over the smaller of the stamps' step and the real time between the
sends plus the adapter's ``stream_jitter`` (the mean value theorem: a motion within the
limits cannot change faster). After each stall the motion either goes on following or
brakes to rest with a latched stop; the stamps stay on the tick grid, strictly increasing.
"""
from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from enum import Enum
from typing import Any

import numpy as np
import pytest
import rclpy
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from trajectory_msgs.msg import JointTrajectory

import adapter_harness as h
from adaptive_streamer.nodes.common import reliable_qos

pytestmark = pytest.mark.ros

JITTER = 0.02   # the adapter's stream_jitter [s] (its default)


class Place(Enum):
    """Where in the stream thread a stall or an error is injected."""

    LOOP = "in the loop between ticks"
    PUBLISH = "in the setpoint publish"


@dataclass(frozen=True)
class Sent:
    """One setpoint as received: stamp and source timestamp [ns], p, v, a."""

    stamp_ns: int
    source_ns: int
    position: np.ndarray
    velocity: np.ndarray
    acceleration: np.ndarray


class SourceStamps(Node):
    """Records ``setpoints`` with the DDS source timestamp of each message."""

    def __init__(self) -> None:
        super().__init__("stall_listener")
        self.sent: list[Sent] = []
        self.create_subscription(JointTrajectory, "setpoints", self._on, reliable_qos(2000))

    def _on(self, msg: JointTrajectory, info: dict[str, Any]) -> None:
        pt, st = msg.points[0], msg.header.stamp
        self.sent.append(Sent(st.sec * 1_000_000_000 + st.nanosec, int(info["source_timestamp"]),
                              np.array(pt.positions), np.array(pt.velocities),
                              np.array(pt.accelerations)))


class Injector:
    """Blocks the adapter's stream thread once, or raises once, at a `Place` (test
    instrumentation: wraps the thread's clock and the setpoint publisher's publish of the
    adapter under test)."""

    def __init__(self, adapter: Any) -> None:
        self._pending: tuple[Place, float | None] | None = None
        self.done = threading.Event()
        thread = adapter._stream_timer
        next_due, pub = thread._next_due, adapter._setpoint_pub
        publish = pub.publish

        def injected_next_due() -> float:
            self._take(Place.LOOP)
            return next_due()

        def injected_publish(msg: Any) -> None:
            self._take(Place.PUBLISH)
            publish(msg)
        thread._next_due = injected_next_due
        pub.publish = injected_publish

    def stall(self, where: Place, seconds: float) -> None:
        """Block the thread at ``where`` once for ``seconds``; returns when it is over."""
        self._inject(where, seconds)

    def fail(self, where: Place) -> None:
        """Raise a RuntimeError once at ``where``; returns once it was raised."""
        self._inject(where, None)

    def _inject(self, where: Place, seconds: float | None) -> None:
        self.done.clear()
        self._pending = (where, seconds)
        assert self.done.wait(5.0), "the injection did not happen"

    def _take(self, where: Place) -> None:
        pending = self._pending
        if pending is None or pending[0] is not where:
            return
        self._pending = None
        self.done.set()
        if pending[1] is None:
            raise RuntimeError(f"injected failure {where.value}")
        time.sleep(pending[1])


@pytest.fixture(scope="module")
def cell(tmp_path_factory):
    rclpy.init()
    folder = tmp_path_factory.mktemp("stream_stall")
    # late decisions are what a stall makes, and the 300 ms ones latch the overruns stop
    # either way: 6 in 20 (not 3), and windows may be 0.5 s old (not 0.25), so that a machine
    # loaded by other work does not stop the arm before a stall or in a re-approach
    c = h.Cell(folder, h.write_card(folder, "tracker", "tracker"), adapter_in_process=True,
               watchdog__max_overruns=6, watchdog__overrun_window=20,
               watchdog__reference_timeout=0.5)
    listener = SourceStamps()
    ex = SingleThreadedExecutor()
    ex.add_node(listener)
    spinner = threading.Thread(target=ex.spin, daemon=True)
    spinner.start()
    try:
        c.start_following()
        c.start_reference()
        c.listener = listener
        c.injector = Injector(c.adapter)
        yield c
    finally:
        try:
            c.close()
            ex.shutdown(timeout_sec=2.0)
            listener.destroy_node()
        finally:
            rclpy.shutdown()


def moving(cell: h.Cell) -> None:
    """Wait until the arm follows the moving reference (reset after a latched stop)."""
    if cell.mode() in ("stopping", "stopped"):
        cell.wait_rest()
        res = cell.trigger("/adapter/reset")
        assert res.success, res.message
        cell.wait_mode("following")
        cell.start_reference()
    cell.wait_mode("following")
    h.wait_until(lambda: np.abs(cell.probe.setpoints[-1].velocity).max() > 0.1,
                 "motion", timeout=10.0)


def step_violations(sent: list[Sent], jitter: float = JITTER) -> list[str]:
    """Each command against the previous one sent (see the module docstring)."""
    lim = h.LIMITS
    out = []
    for prev, cur in zip(sent, sent[1:]):
        stamps = (cur.stamp_ns - prev.stamp_ns) * 1e-9
        real = (cur.source_ns - prev.source_ns) * 1e-9 + jitter
        span = min(stamps, real) * (1 + h.REL_TOL) + 1e-6   # + float stamp resolution
        for label, step, bound in (
                ("position", cur.position - prev.position, lim.velocity_max * span),
                ("velocity", cur.velocity - prev.velocity, lim.acceleration_max * span),
                ("acceleration", cur.acceleration - prev.acceleration, lim.jerk_max * span)):
            bad = np.abs(step) > bound + h.ABS_TOL
            if bad.any():
                i = int(np.argmax(bad))
                out.append(f"{label} step {step[i]:.6g} on {lim.names[i]} over {stamps * 1e3:.1f} "
                           f"ms of stamps, {real * 1e3:.1f} ms real (+jitter): at most "
                           f"{bound[i]:.6g}")
    return out


@pytest.mark.parametrize("where, seconds", [
    (Place.LOOP, 0.05), (Place.PUBLISH, 0.05), (Place.LOOP, 0.3), (Place.PUBLISH, 0.3)])
def test_a_stalled_stream_never_jumps_and_resumes_or_stops(cell, where, seconds):
    moving(cell)
    sent = cell.listener.sent
    start = len(sent) - 1   # from the last command before the stall
    cell.injector.stall(where, seconds)
    resumed = time.monotonic()
    # after the stall: following again with motion, or braked to rest
    h.wait_until(lambda: len(sent) > start + 250, "the stream after the stall", timeout=10.0)
    tail = sent[start:]
    problems = step_violations(tail)
    assert not problems, problems[:5]
    ticks = np.array([s.stamp_ns for s in tail]) * 1e-9 * h.RATE
    assert np.all(np.diff(ticks) > 0.5), "stamps do not increase"
    assert np.all(np.abs(ticks - np.round(ticks)) < 1e-3), "stamps off the tick grid"
    gaps = np.diff([s.source_ns for s in tail]) * 1e-9
    assert gaps.max() > 0.8 * seconds, f"no gap of {seconds} s in the stream: no stall"
    mode = cell.mode()
    if mode in ("stopping", "stopped"):
        rest = cell.wait_rest(hold=0.2)
        assert h.at_rest(rest[-5:])
    else:
        assert mode == "following", mode
        h.wait_until(lambda: np.abs(sent[-1].velocity).max() > 0.05, "motion after the stall",
                     timeout=5.0)   # the reference turns round at times
    diag = cell.wait_diag(lambda v: "stream_retimes" in v, "adapter diagnostics")[3]
    print(f"{where.value} {seconds * 1e3:.0f} ms: {mode}, trip {diag['trip']}, retimes "
          f"{diag['stream_retimes']}, lag {diag['stream_lag']} s, late decisions "
          f"{diag['late_decisions']}, largest send gap {gaps.max() * 1e3:.1f} ms, "
          f"{time.monotonic() - resumed:.1f} s observed")


@pytest.mark.parametrize("where", [Place.LOOP, Place.PUBLISH])
def test_an_error_in_the_stream_thread_brakes_to_rest(cell, where):
    moving(cell)
    t0 = cell.now()
    cell.injector.fail(where)
    vals = cell.wait_diag(lambda v: v.get("trip") == "stream_fault", "a stream_fault stop")[3]
    assert "injected failure" in vals["trip_message"], vals["trip_message"]
    cell.wait_rest(hold=0.2)
    stop = cell.samples_since(t0 - 0.2)
    check = h.check_stream(stop)
    assert check.ok, check.describe()
    # moving when the fault came (the setpoints of the 50 ms before it; the first samples
    # of the window, 0.2 s earlier, can be near a turn of the reference)
    near = [s for s in stop if t0 - 0.05 <= s.stamp_ns * 1e-9 <= t0]
    assert near and max(np.abs(s.velocity).max() for s in near) > 0.01, "was not moving"
    assert h.at_rest(stop[-5:])
    print(f"error {where.value}: braked to rest in {(stop[-1].stamp - t0):.2f} s, "
          f"{check.describe()}")
