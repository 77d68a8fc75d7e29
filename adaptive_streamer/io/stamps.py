# SPDX-License-Identifier: Apache-2.0
"""ROS time stamps (builtin_interfaces/Time) <-> float seconds."""
from __future__ import annotations

import math

from builtin_interfaces.msg import Time as TimeMsg

__all__ = ["TimeMsg", "sec_to_stamp", "stamp_to_sec"]


def stamp_to_sec(stamp: TimeMsg) -> float:
    """builtin_interfaces/Time -> float seconds."""
    return stamp.sec + stamp.nanosec * 1e-9


def sec_to_stamp(t: float, out: TimeMsg | None = None) -> TimeMsg:
    """Float seconds -> builtin_interfaces/Time (filled into ``out`` when given)."""
    msg = out if out is not None else TimeMsg()
    sec = math.floor(t)
    nsec = int(round((t - sec) * 1e9))
    if nsec >= 1_000_000_000:
        sec, nsec = sec + 1, nsec - 1_000_000_000
    msg.sec, msg.nanosec = int(sec), nsec
    return msg
