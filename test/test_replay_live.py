# SPDX-License-Identifier: Apache-2.0
"""Live replay: a recorded bag's inputs republished on DDS with /clock, for sim-time nodes.

A real rclpy node with ``use_sim_time`` subscribes (raw) to what the player publishes; the
bytes must be the recorded ones, in order, and /clock must carry the bag's time at the
stream rate (250 Hz; common practice for the stream) so the node's ROS time follows it.
"""
import threading
import time

import numpy as np
import pytest
import rclpy
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.parameter import Parameter
from rosgraph_msgs.msg import Clock
from sensor_msgs.msg import JointState
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.nodes.common import reliable_qos
from adaptive_streamer.io.bag_io import read_bag
from adaptive_streamer.replay.live import input_topics, republish
import replay_harness

pytestmark = [pytest.mark.ros, pytest.mark.slow]
SUITE_GROUP = "replay (one live recording)"  # test/run_suite.py
WAIT_S = 15.0  # discovery bound, not a speed assertion


@pytest.fixture(scope="module")
def live_bag(tmp_path_factory):
    return replay_harness.live_recording(tmp_path_factory.getbasetemp())


def test_input_topics_are_the_adapter_inputs(live_bag):
    topics = input_topics(read_bag(live_bag))
    assert {"/joint_states", "/reference/window", "/feedback", "/edge_sensor/offset"} <= set(topics)
    assert not any(t.endswith(("setpoints", "decisions", "diagnostics", "position_command"))
                   for t in topics)


def test_republishes_recorded_bytes_with_clock(live_bag):
    ctx = Context()
    rclpy.init(context=ctx)
    node = rclpy.create_node("sim_time_listener", context=ctx,
                             parameter_overrides=[Parameter("use_sim_time", value=True)])
    got = {"/reference/window": [], "/joint_states": [], "/clock": []}
    node.create_subscription(JointTrajectory, "/reference/window",
                             got["/reference/window"].append, reliable_qos(100), raw=True)
    node.create_subscription(JointState, "/joint_states", got["/joint_states"].append,
                             reliable_qos(1000), raw=True)
    node.create_subscription(Clock, "/clock", got["/clock"].append, reliable_qos(1000))
    ex = SingleThreadedExecutor(context=ctx)
    ex.add_node(node)
    stop = threading.Event()
    spinner = threading.Thread(target=lambda: [ex.spin_once(timeout_sec=0.01)
                                               for _ in iter(stop.is_set, True)], daemon=True)
    spinner.start()
    try:
        stats = republish(live_bag, rate=2.0, topics=["/reference/window", "/joint_states"],
                          start=1.0, duration=1.5, wait_for_subscribers=WAIT_S)
        end = time.monotonic() + WAIT_S
        while len(got["/reference/window"]) < stats.messages["/reference/window"] \
                and time.monotonic() < end:
            time.sleep(0.02)
        time.sleep(0.2)
        sim_now = node.get_clock().now().nanoseconds
    finally:
        stop.set()
        spinner.join()
        ex.shutdown()
        node.destroy_node()
        rclpy.shutdown(context=ctx)
    bag = read_bag(live_bag)
    t0 = min(int(bag.topics[t].times[0]) for t in ("/reference/window", "/joint_states"))
    lo, hi = t0 + int(1.0e9), t0 + int(2.5e9)
    for topic in ("/reference/window", "/joint_states"):
        data = bag.topics[topic]
        expected = [r for t, r in zip(data.times, data.raw) if lo <= t <= hi]
        assert stats.messages[topic] == len(expected)
        assert [bytes(r) for r in got[topic]] == expected, topic  # the recorded bytes, in order
    # /clock: bag time every 4 ms of bag time (250 Hz), increasing
    assert stats.clock_ticks == int(1.5 * 250) + 1
    ticks = np.array([c.clock.sec * 10 ** 9 + c.clock.nanosec for c in got["/clock"]])
    assert len(ticks) > 0.9 * stats.clock_ticks and np.all(np.diff(ticks) > 0)
    assert np.all((ticks - lo) % 4_000_000 == 0) and ticks[0] >= lo and ticks[-1] <= hi
    assert sim_now == ticks[-1]  # the node's ROS time is the bag's time
