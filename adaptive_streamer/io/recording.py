# SPDX-License-Identifier: Apache-2.0
"""What the recorder records and how it stores it: the default topic list and the QoS of a
topic in the ``rosbags`` form kept in the bag's metadata."""
from __future__ import annotations

import importlib
from typing import Any

STACK_TOPICS = (
    "joint_states", "feedback", "edge_sensor/offset", "reference/window", "reference/path",
    "setpoints", "driver/position_command", "driver/velocity_command",
    "driver/trajectory_command", "driver/plan", "driver/followed", "shadow/setpoints",
    "/diagnostics", "adapter/decisions",
    "stop", "robot_description", "/parameter_events",
)


def qos_to_rosbags(q: Any) -> Any:
    """An rclpy ``QoSProfile`` (e.g. a publisher's offered QoS) as a ``rosbags`` Qos."""
    from rosbags.interfaces import (Qos, QosDurability, QosHistory, QosLiveliness,
                                    QosReliability, QosTime)

    def span(d: Any) -> QosTime:
        ns = int(d.nanoseconds)
        return QosTime(ns // 1_000_000_000, ns % 1_000_000_000)

    def enum(kind: Any, value: Any, unknown: Any) -> Any:
        try:
            return kind(int(value))
        except ValueError:
            return unknown

    return Qos(enum(QosHistory, q.history, QosHistory.UNKNOWN), int(q.depth),
               enum(QosReliability, q.reliability, QosReliability.UNKNOWN),
               enum(QosDurability, q.durability, QosDurability.UNKNOWN),
               span(q.deadline), span(q.lifespan),
               enum(QosLiveliness, q.liveliness, QosLiveliness.UNKNOWN),
               span(q.liveliness_lease_duration), bool(q.avoid_ros_namespace_conventions))


def installed_message_class(msgtype: str) -> Any:
    """The rclpy message class of ``pkg/msg/Name`` (None when not installed)."""
    try:
        pkg, kind, name = msgtype.split("/")
        return getattr(importlib.import_module(f"{pkg}.{kind}"), name)
    except (ValueError, ImportError, AttributeError):
        return None
