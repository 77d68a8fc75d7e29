# SPDX-License-Identifier: Apache-2.0
"""How many ``joint_states`` messages the adapter's executor takes, per message stream.

A driver process (test/tern_driver.py, the invented tern arm) sends the arm joints and
the gripper fingers in one message at RATE Hz and the flange joint alone at 50 Hz; the
adapter (configured, not active: no decisions or stream compete) counts the messages its
subscription hands to the merger for ``SECONDS`` s. Printed per stream: messages taken
per second, the share of those sent, and the longest gap between two taken messages
(a gap over ``watchdog.joint_states_timeout`` stops a running arm).
Run: ``.venv/bin/python bench/joint_states_intake.py [RATE ...]`` (default 250 500).
"""
from __future__ import annotations

import os
import random
import subprocess
import sys
import threading
import time
from pathlib import Path

os.environ["ROS_DOMAIN_ID"] = str(random.randint(120, 230))
os.environ.setdefault("ROS_AUTOMATIC_DISCOVERY_RANGE", "LOCALHOST")

import rclpy  # noqa: E402
from rclpy.parameter import Parameter  # noqa: E402

from adaptive_streamer.io.joint_states import structure_key  # noqa: E402
from adaptive_streamer.nodes.adapter import AdapterNode, make_executor  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
URDF = REPO / "test" / "data" / "urdf" / "tern_arm_gripper.urdf"
DYNAMICS = URDF.with_name("tern_arm_gripper.limits.yaml")
SECONDS = 5.0
FLANGE_RATE = 50.0


def measure(rate: float) -> None:
    """Run the driver at ``rate`` and print what the adapter took."""
    driver = subprocess.Popen([sys.executable, str(REPO / "test" / "tern_driver.py"),
                               str(URDF), str(rate), *["0.0"] * 6],
                              stdout=subprocess.PIPE, text=True)
    try:
        if driver.stdout.readline().strip() != "ready":
            raise RuntimeError("the tern driver did not start")
        adapter = AdapterNode(f"adapter_{rate:.0f}", parameter_overrides=[
            Parameter("limits_file", value=""), Parameter("limits_dynamics", value=str(DYNAMICS)),
            Parameter("policy", value="tracker")])
        ex = make_executor()
        ex.add_node(adapter)
        spinner = threading.Thread(target=ex.spin, daemon=True)
        spinner.start()
        end = time.monotonic() + 30.0
        while adapter._robot_description is None and time.monotonic() < end:
            time.sleep(0.05)
        adapter.trigger_configure()
        merger = adapter._js_merger
        taken: dict[int, list[float]] = {}
        add = merger.add

        def counting(msg: bytes, rx: float) -> None:
            taken.setdefault(len(structure_key(msg)), []).append(time.monotonic())
            add(msg, rx)
        merger.add = counting
        time.sleep(SECONDS)
        merger.add = add
        streams = sorted(taken.values(), key=len, reverse=True)
        for name, sent, times in zip(("arm+gripper", "flange"), (rate, FLANGE_RATE), streams):
            gaps = [b - a for a, b in zip(times, times[1:])]
            per_s = len(times) / SECONDS
            print(f"driver at {rate:5.0f} Hz  {name:12s} taken {per_s:6.1f}/s of {sent:5.0f}/s "
                  f"({100 * per_s / sent:5.1f}%), longest gap {1e3 * max(gaps):6.1f} ms")
        ex.shutdown(timeout_sec=2.0)
        spinner.join(timeout=5.0)
        adapter.destroy_node()
    finally:
        driver.send_signal(2)
        try:
            driver.wait(timeout=20.0)
        except subprocess.TimeoutExpired:
            driver.kill()


def main() -> None:
    """Measure every rate given (default 250 and 500 Hz)."""
    rates = [float(x) for x in sys.argv[1:]] or [250.0, 500.0]
    rclpy.init()
    try:
        for rate in rates:
            measure(rate)
    finally:
        rclpy.try_shutdown()


if __name__ == "__main__":
    main()
