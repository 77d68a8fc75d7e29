# SPDX-License-Identifier: Apache-2.0
"""The recorder node (a real child process over DDS) against independent bag readers.

Publishers in this process (real rclpy nodes) feed the recorder started with
`adaptive_streamer.replay.recorder.Recorder`; the bags are read back with ``rosbags`` (the
rosbag2 reader) and the ``mcap`` package (the MCAP reference reader), which must agree on
topics, types, counts and bytes; the messages are decoded with rclpy.
"""
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import rclpy
import yaml
from geometry_msgs.msg import PointStamped
from mcap.reader import make_reader
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
from rclpy.serialization import deserialize_message
from rosbags.interfaces import QosDurability, QosReliability
from rosbags.rosbag2 import Reader
from sensor_msgs.msg import JointState
from std_msgs.msg import String
from trajectory_msgs.msg import JointTrajectory

from adaptive_streamer.io import run_info
from adaptive_streamer.io.bag_io import read_bag
from adaptive_streamer.replay.recorder import Recorder

pytestmark = pytest.mark.ros
WAIT_S = 30.0  # upper bound for process start and DDS discovery; not a speed assertion


class Cell:
    """Publishers like the stack's (reliable joint states, a best-effort sensor, a latched
    path) and a node called ``adapter`` with the parameters the recorder stores."""

    def __init__(self, card):
        self.ctx = Context()
        rclpy.init(context=self.ctx)
        self.node = rclpy.create_node("cell", context=self.ctx)
        self.adapter = rclpy.create_node("adapter", context=self.ctx)
        self.adapter.declare_parameter("policy", str(card))
        self.adapter.declare_parameter("decision_period", 0.05)
        self.adapter.declare_parameter("joints", ["j1", "j2"])
        self.js = self.node.create_publisher(JointState, "joint_states", 10)
        best_effort = QoSProfile(depth=5, reliability=ReliabilityPolicy.BEST_EFFORT)
        self.sensor = self.node.create_publisher(PointStamped, "edge_sensor/offset", best_effort)
        latched = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                             durability=DurabilityPolicy.TRANSIENT_LOCAL)
        self.path = self.node.create_publisher(JointTrajectory, "reference/path", latched)
        self.path.publish(JointTrajectory(joint_names=["j1", "j2"]))
        self.sent = 0
        self.publishing = True
        self.ex = SingleThreadedExecutor(context=self.ctx)
        self.ex.add_node(self.node)
        self.ex.add_node(self.adapter)
        self.node.create_timer(0.01, self._tick)
        self._stop = False
        self.thread = threading.Thread(target=self._spin, daemon=True)
        self.thread.start()

    def _tick(self):
        if not self.publishing:
            return
        self.sent += 1
        msg = JointState(name=["j1", "j2"], position=[float(self.sent), 0.5])
        msg.header.stamp = self.node.get_clock().now().to_msg()
        self.js.publish(msg)
        self.sensor.publish(PointStamped())

    def _spin(self):
        while not self._stop:
            self.ex.spin_once(timeout_sec=0.02)

    def close(self):
        self._stop = True
        self.thread.join()
        self.ex.shutdown()
        self.node.destroy_node()
        self.adapter.destroy_node()
        rclpy.shutdown(context=self.ctx)


@pytest.fixture
def cell(tmp_path):
    card = tmp_path / "card.yaml"
    card.write_text("policy_card: 1\nname: t\nkind: hold\njoints: [j1, j2]\n"
                    "decision_period: 0.05\nlimits: limits.yaml\n")
    (tmp_path / "limits.yaml").write_text(
        "joints:\n  j1: {position: [-1, 1], velocity: 1, acceleration: 5, jerk: 50}\n"
        "  j2: {position: [-1, 1], velocity: 1, acceleration: 5, jerk: 50}\n")
    c = Cell(card)
    yield c
    c.close()


def record(tmp_path, cell, seconds=1.0, sig=signal.SIGINT, **kw):
    rec = Recorder(tmp_path / "bag", **kw).start(WAIT_S)
    try:
        assert rec.wait_for(["joint_states", "edge_sensor/offset", "reference/path"], WAIT_S), \
            rec.lines
        assert rec.wait_run_info(WAIT_S), rec.lines
        time.sleep(seconds)
    finally:
        rec.stop(sig=sig)
    return rec.bag


def check_readers(bag):
    """rosbags and mcap agree; returns {topic: [raw bytes]} (from rosbags)."""
    by_rosbags = {}
    with Reader(bag) as r:  # independent reader 1: rosbags (rosbag2 metadata + MCAP)
        types = {c.topic: c.msgtype for c in r.connections}
        qos = {c.topic: c.ext.offered_qos_profiles for c in r.connections}
        for conn, _, raw in r.messages():
            by_rosbags.setdefault(conn.topic, []).append(bytes(raw))
    by_mcap = {}
    with open(next(bag.glob("*.mcap")), "rb") as f:  # independent reader 2: mcap package
        for schema, channel, message in make_reader(f).iter_messages():
            assert schema.name == types[channel.topic]
            by_mcap.setdefault(channel.topic, []).append(bytes(message.data))
    assert {k: sorted(v) for k, v in by_mcap.items()} == {k: sorted(v)
                                                          for k, v in by_rosbags.items()}
    return by_rosbags, types, qos


def test_records_topics_qos_and_run_info(tmp_path, cell):
    bag = record(tmp_path, cell, compression="zstd", chunk_size=4096)
    assert (bag / "metadata.yaml").is_file()
    msgs, types, qos = check_readers(bag)
    assert types["/joint_states"] == "sensor_msgs/msg/JointState"
    assert types["/edge_sensor/offset"] == "geometry_msgs/msg/PointStamped"
    # the offered QoS of the publishers is stored (rosbags parses it from the bag)
    assert qos["/edge_sensor/offset"][0].reliability == QosReliability.BEST_EFFORT
    assert qos["/reference/path"][0].durability == QosDurability.TRANSIENT_LOCAL
    assert qos["/joint_states"][0].reliability == QosReliability.RELIABLE
    # the latched path published before the recorder started is in the bag
    path = deserialize_message(msgs["/reference/path"][0], JointTrajectory)
    assert list(path.joint_names) == ["j1", "j2"]
    # a reliable topic is complete from its first recorded message on (rclpy decodes)
    seq = [deserialize_message(r, JointState).position[0] for r in msgs["/joint_states"]]
    assert seq == list(np.arange(seq[0], seq[0] + len(seq)))
    assert len(msgs["/edge_sensor/offset"]) > 0
    # the adapter's parameters and the card text are stored, as a topic and in metadata
    info = run_info.parse(deserialize_message(msgs["/adaptive_streamer/run_info"][0],
                                              String).data)
    assert info.node == "/adapter" and info.parameters["decision_period"] == 0.05
    card = str((tmp_path / "card.yaml").resolve())
    assert info.files[card]["text"].startswith("policy_card: 1")
    assert str((tmp_path / "limits.yaml").resolve()) in info.files  # named by the card
    meta = yaml.safe_load((bag / "metadata.yaml").read_text())
    custom = meta["rosbag2_bagfile_information"]["custom_data"]
    assert run_info.parse(custom[run_info.CUSTOM_KEY]).parameters == info.parameters


def test_sigterm_closes_an_lz4_bag(tmp_path, cell):
    bag = record(tmp_path, cell, seconds=0.5, sig=signal.SIGTERM, compression="lz4")
    msgs, _, _ = check_readers(bag)
    assert len(msgs["/joint_states"]) > 0


def test_crash_loses_at_most_the_open_chunk(tmp_path, cell):
    chunk = 1024
    rec = Recorder(tmp_path / "bag", topics=["joint_states"], chunk_size=chunk,
                   chunk_duration=0.0, adapter_node="").start(WAIT_S)
    try:
        assert rec.wait_for(["joint_states"], WAIT_S)
        first = cell.sent
        time.sleep(1.0)
        cell.publishing = False
        last = cell.sent
        time.sleep(1.0)  # delivery of the last messages (a bound, not a speed check)
    finally:
        rec.kill()      # SIGKILL: no close, no metadata, no MCAP summary
    assert not (rec.bag / "metadata.yaml").exists()
    bag = read_bag(rec.bag)
    assert bag.recovered and "not closed" in bag.recovered
    seq = [deserialize_message(r, JointState).position[0]
           for r in bag.topics["/joint_states"].raw]
    assert seq and seq == list(np.arange(seq[0], seq[0] + len(seq)))  # a complete prefix
    assert seq[0] <= first + 1
    # what is lost fits in one chunk: a JointState record here is more than 60 bytes
    assert last - seq[-1] <= chunk // 60 + 1
    # the command a user runs: a closed bag that the standard readers open, with the counts
    out = subprocess.run([sys.executable, "-m", "adaptive_streamer.cli", "repair-bag",
                          str(rec.bag), str(tmp_path / "repaired")],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "not closed" in out.stdout and f"{len(seq):8d}  /joint_states" in out.stdout
    msgs, _, _ = check_readers(tmp_path / "repaired")
    assert len(msgs["/joint_states"]) == len(seq)
