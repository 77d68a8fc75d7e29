# SPDX-License-Identifier: Apache-2.0
"""Live replay: a bag's input topics republished on DDS in (scaled) real time, with /clock.

For testing the live nodes under ``use_sim_time``: the bag's messages go out at their
recorded receive times (bag time), scaled by ``rate`` (2.0 = twice as fast), each on its
recorded topic with the QoS its publishers offered (reliability and durability of the
first offered profile; keep-last 10). ``/clock`` carries the bag time at ``clock_hz``
(bag-time rate; default: the recorded stream rate, at least 250 Hz), so nodes on sim time
see the recorded timeline.

Topics: by default every topic of the bag except what the adapter and the tools produce
(`OUTPUT_SUFFIXES`), i.e. the adapter's inputs: joint states, feedback, sensors, reference
window and path, robot description, stop.
"""
from __future__ import annotations

import heapq
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

from ..io.bag_io import Bag, read_bag
from ..io.run_info import TOPIC as RUN_INFO

OUTPUT_SUFFIXES = ("setpoints", "shadow/setpoints", "driver/position_command",
                   "driver/velocity_command", "driver/trajectory_command", "/decisions",
                   "/diagnostics", RUN_INFO, "/parameter_events", "/rosout", "/clock")
MIN_CLOCK_HZ = 250.0


class LiveReplayError(ValueError):
    """The bag or the settings do not allow a live replay."""


@dataclass
class LiveStats:
    """What a live replay published."""

    messages: dict[str, int] = field(default_factory=dict)
    clock_ticks: int = 0
    bag_seconds: float = 0.0
    wall_seconds: float = 0.0


def input_topics(bag: Bag) -> list[str]:
    """The bag's topics that are inputs of the adapter (see the module docstring)."""
    return sorted(t for t in bag.topics
                  if not any(t.endswith(s) or t.endswith("/" + s) for s in OUTPUT_SUFFIXES)
                  and len(bag.topics[t]))


def _qos(offered: Sequence[Any]) -> Any:
    from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
    reliable, latched = True, False
    if offered:
        q = offered[0]
        reliable = q.reliability.name != "BEST_EFFORT"
        latched = q.durability.name == "TRANSIENT_LOCAL"
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=10,
                      reliability=(ReliabilityPolicy.RELIABLE if reliable
                                   else ReliabilityPolicy.BEST_EFFORT),
                      durability=(DurabilityPolicy.TRANSIENT_LOCAL if latched
                                  else DurabilityPolicy.VOLATILE))


def republish(path: str | Path, rate: float = 1.0, topics: Sequence[str] | None = None,
              clock_hz: float | None = None, start: float = 0.0,
              duration: float | None = None, wait_for_subscribers: float = 0.0,
              args: list[str] | None = None) -> LiveStats:
    """Republish the bag's inputs in real time scaled by ``rate`` (see the module docstring).

    ``start``/``duration`` [s of bag time] select a part of the bag;
    ``wait_for_subscribers`` [s] waits that long at most for every topic to be matched.
    """
    import rclpy
    from rclpy.context import Context
    from rosgraph_msgs.msg import Clock

    from adaptive_streamer.io.recording import installed_message_class as message_class

    if not rate > 0:
        raise LiveReplayError(f"rate must be positive, got {rate!r}")
    bag = read_bag(path)
    names = list(topics) if topics else input_topics(bag)
    missing = [t for t in names if bag.get(t) is None]
    if missing:
        raise LiveReplayError(f"{bag.path}: no messages on topic(s) {missing}; topics in the "
                              f"bag: {sorted(bag.all_topics)}")
    if not names:
        raise LiveReplayError(f"{bag.path}: no input topics to republish")
    hz = max(MIN_CLOCK_HZ, float(clock_hz or _stream_rate(bag)))
    t_first = min(int(bag.topics[t].times[0]) for t in names) + int(start * 1e9)
    t_end = (t_first + int(duration * 1e9) if duration is not None else
             max(int(bag.topics[t].times[-1]) for t in names))
    context = Context()
    rclpy.init(args=args, context=context)
    stats = LiveStats()
    try:
        node = rclpy.create_node("bag_player", context=context)
        pubs = {}
        for t in names:
            cls = message_class(bag.topics[t].msgtype)
            if cls is None:
                raise LiveReplayError(f"topic '{t}': message type "
                                      f"'{bag.topics[t].msgtype}' is not installed here")
            pubs[t] = node.create_publisher(cls, t, _qos(bag.topics[t].qos))
        clock = node.create_publisher(Clock, "/clock", 10)
        _wait_matched(list(pubs.values()) + [clock], wait_for_subscribers)
        events: list[tuple[int, int, str, bytes]] = []
        for k, t in enumerate(names):
            data = bag.topics[t]
            events += [(int(ts), k, t, raw) for ts, raw in zip(data.times, data.raw)
                       if t_first <= ts <= t_end]
        heapq.heapify(events)
        step_ns = int(round(1e9 / hz))
        next_clock = t_first
        msg = Clock()
        wall0 = time.monotonic()
        while events or next_clock <= t_end:
            t_msg = events[0][0] if events else None
            if t_msg is not None and t_msg < next_clock:
                t_ns, _, topic, raw = heapq.heappop(events)
                _sleep_until(wall0 + (t_ns - t_first) * 1e-9 / rate)
                pubs[topic].publish(raw)
                stats.messages[topic] = stats.messages.get(topic, 0) + 1
            else:
                _sleep_until(wall0 + (next_clock - t_first) * 1e-9 / rate)
                msg.clock.sec, msg.clock.nanosec = divmod(next_clock, 1_000_000_000)
                clock.publish(msg)
                stats.clock_ticks += 1
                next_clock += step_ns
        stats.bag_seconds = (t_end - t_first) * 1e-9
        stats.wall_seconds = time.monotonic() - wall0
        node.destroy_node()
    finally:
        rclpy.shutdown(context=context)
    return stats


def _stream_rate(bag: Bag) -> float:
    """The recorded adapter's stream rate (run info), else `MIN_CLOCK_HZ`."""
    from ..io import run_info
    from ..io.messages import read_string
    for name, data in bag.topics.items():
        if name.endswith("/" + RUN_INFO) and len(data):
            try:
                info = run_info.parse(read_string(data.raw[0]))
                return float(info.parameters.get("stream_rate", MIN_CLOCK_HZ))
            except (run_info.RunInfoError, ValueError):
                break
    return MIN_CLOCK_HZ


def _wait_matched(pubs: list[Any], timeout: float) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end and not all(p.get_subscription_count() for p in pubs):
        time.sleep(0.02)


def _sleep_until(wall: float) -> None:
    delay = wall - time.monotonic()
    if delay > 0:
        time.sleep(delay)

