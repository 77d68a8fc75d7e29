# SPDX-License-Identifier: Apache-2.0
"""Ways out of a moving adapter's process, checked from the driver's side over real DDS
(and, first, ``~/stop`` on an adapter that is configured but not active: nothing moved).

The adapter runs in its own process, as in a cell (`adapter_harness.Cell`); the probe, a
subscriber on ``setpoints``, records what the driver gets. SIGINT (Ctrl-C), SIGTERM, and an
exception raised from a callback in the process's executor (a node beside the adapter,
test/crashing_adapter.py) must each end with the controlled stop: the last commands brake
within the limits (`adapter_harness.check_stream`) and end at rest before the process exits.
"""
from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import rclpy
import yaml
from lifecycle_msgs.msg import Transition
from std_msgs.msg import Empty

import adapter_harness as h

pytestmark = pytest.mark.ros

LATE_DECISIONS_ALLOWED = {"watchdog__max_overruns": 10, "watchdog__overrun_window": 20}


@pytest.fixture(scope="module")
def cell(tmp_path_factory):
    rclpy.init()
    folder = tmp_path_factory.mktemp("adapter_exits")
    policy = h.write_card(folder, "tracker", "tracker")
    # not about late decisions: a machine loaded by other work must not stop the arm first
    c = h.Cell(folder, policy, **LATE_DECISIONS_ALLOWED)
    c.adapter_params = h.adapter_values(policy, **LATE_DECISIONS_ALLOWED)
    try:
        yield c
    finally:
        try:
            c.close()
        finally:
            rclpy.shutdown()


def run_adapter(cell: h.Cell, crashing: bool = False) -> subprocess.Popen:
    """The adapter process following the moving reference: the cell's own while it runs,
    else (or for the crashing one) a new one in its place."""
    proc = cell.processes[1]
    if crashing:
        h.stop_process(proc)
        params = cell.folder / "adapter_params.yaml"
        params.write_text(yaml.safe_dump({"adapter": {"ros__parameters": cell.adapter_params}}))
        proc = subprocess.Popen([sys.executable, str(Path(__file__).parent / "crashing_adapter.py"),
                                 "--ros-args", "--params-file", str(params)],
                                stderr=subprocess.PIPE, text=True)
    elif proc.poll() is not None:
        proc = h.start_adapter_process(cell.folder, cell.adapter_params)
    cell.processes[1] = proc
    cell.start_following()
    cell.start_reference()
    h.wait_until(lambda: np.abs(cell.probe.setpoints[-1].velocity).max() > 0.1, "motion",
                 timeout=10.0)
    return proc


def check_braked_to_rest(cell: h.Cell, since: float) -> str:
    """The stream since ``since``: moving at first, within the limits, at rest at the end."""
    stop = cell.samples_since(since)
    check = h.check_stream(stop)
    assert check.ok, check.describe()
    assert max(np.abs(s.velocity).max() for s in stop[:10]) > 0.01, "was not moving"
    assert h.at_rest(stop[-1:]), (stop[-1].velocity, stop[-1].acceleration)
    moving = [s for s in stop if np.abs(s.velocity).max() > 1e-5]
    return (f"braked to rest in {(moving[-1].stamp - stop[0].stamp):.2f} s of stamps; "
            f"{check.describe()}")


def test_stop_on_an_inactive_adapter_says_nothing_was_moving(cell):
    cell.wait_cell()
    assert cell.transition(Transition.TRANSITION_CONFIGURE)
    res = cell.trigger("/adapter/stop")
    assert res.success and res.message.startswith("nothing was moving"), res.message
    assert "not active" in res.message


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_a_signal_brings_the_moving_arm_to_rest_before_the_process_exits(cell, signum):
    proc = run_adapter(cell)
    t0 = cell.now()
    proc.send_signal(signum)
    assert proc.wait(timeout=20.0) == 0
    time.sleep(0.2)   # the last messages reach the probe
    print(f"{signal.Signals(signum).name}: {check_braked_to_rest(cell, t0)}")


def test_an_error_raised_in_a_callback_ends_with_the_controlled_stop(cell):
    proc = run_adapter(cell, crashing=True)
    t0 = cell.now()
    pub = cell.probe.create_publisher(Empty, "crash", h.reliable_qos(1))
    h.wait_until(lambda: pub.get_subscription_count() > 0, "the crasher's subscription")
    pub.publish(Empty())
    assert proc.wait(timeout=20.0) == 1
    err = proc.stderr.read()
    assert "injected failure in a callback" in err, err[-2000:]
    time.sleep(0.2)
    print(f"callback error: {check_braked_to_rest(cell, t0)}")
