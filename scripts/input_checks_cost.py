# SPDX-License-Identifier: Apache-2.0
"""Cost of the adapter's input checks (#20), printed, never asserted: one provenance check
(the publishers of three topics read from the ROS graph and judged) and one reference
window (10 points) checked against a 60 s reference path (1200 samples, 6 joints), near
the previous match and over the whole path.

    .venv/bin/python scripts/input_checks_cost.py
"""
from __future__ import annotations

import time

import numpy as np
import rclpy
from rclpy.node import Node
from sensor_msgs.msg import JointState

from adaptive_streamer.core.path_agreement import ReferencePath
from adaptive_streamer.core.provenance import InputTopic, source_fault

TOPICS = ("/joint_states", "/reference/window", "/feedback")


def median_ms(fn, runs: int = 300) -> float:
    """Median wall time of ``fn()`` [ms]."""
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times)) * 1e3


def provenance_ms() -> float:
    """One check of the three inputs with two publishers each."""
    rclpy.init()
    try:
        pubs = [Node(f"input_pub_{i}") for i in range(6)]
        for i, node in enumerate(pubs):
            node.create_publisher(JointState, TOPICS[i % 3], 10)
        adapter = Node("adapter_like")
        time.sleep(1.0)   # discovery

        def check() -> None:
            for topic, name in zip(InputTopic, TOPICS):
                seen = [f"{i.node_namespace.rstrip('/')}/{i.node_name}"
                        for i in adapter.get_publishers_info_by_topic(name)]
                source_fault(topic, seen[:1], seen)
        return median_ms(check)
    finally:
        rclpy.shutdown()


def path_ms() -> tuple[float, float]:
    """A moving window near the previous match, and one off the path (whole search)."""
    s = np.linspace(0.0, 1.0, 1200)[:, None]
    curve = 0.5 * (1.0 - np.cos(2.0 * np.pi * s)) * np.linspace(0.2, 0.5, 6)
    path = ReferencePath(curve, [f"j{i}" for i in range(6)])
    k = [0]

    def moving() -> None:
        k[0] = (k[0] + 1) % 1180
        path.check(curve[k[0]:k[0] + 10], 0.01)
    near = median_ms(moving)
    off = curve[500:510] + 0.1
    return near, median_ms(lambda: path.check(off, 0.01))


if __name__ == "__main__":
    near, whole = path_ms()
    print(f"provenance check, 3 topics x 2 publishers: {provenance_ms():.3f} ms median")
    print(f"window vs 1200-sample path: {near:.3f} ms near the previous match, "
          f"{whole:.3f} ms over the whole path (median)")
