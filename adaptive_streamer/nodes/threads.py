# SPDX-License-Identifier: Apache-2.0
"""Scheduling of the adapter's process and threads (SCHED_FIFO priorities) and its executor."""
from __future__ import annotations

import os
import sys

from rclpy.executors import SingleThreadedExecutor

MIDDLEWARE_PRIORITY = 5


def set_thread_priority(priority: int, what: str = "thread") -> str:
    """SCHED_FIFO ``priority`` for the calling thread, or normal scheduling for 0; returns a
    note saying which it got. Real-time priority for the control thread is common practice;
    it needs the privilege (root or CAP_SYS_NICE), otherwise the thread runs normally and
    the note says so."""
    try:
        if priority <= 0:
            if os.sched_getscheduler(0) != os.SCHED_OTHER:
                os.sched_setscheduler(0, os.SCHED_OTHER, os.sched_param(0))
            return f"{what} at normal priority"
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(priority))
    except (OSError, AttributeError) as exc:
        return f"{what} at normal priority (SCHED_FIFO {priority} refused: {exc})"
    return f"{what} at SCHED_FIFO priority {priority}"


def make_executor() -> SingleThreadedExecutor:
    """The executor for the adapter: one thread for subscriptions, services and decisions
    (the stream has its own thread); the GIL switch interval is shortened so the stream
    thread gets the interpreter promptly."""
    sys.setswitchinterval(0.0001)
    return SingleThreadedExecutor()


def prepare_process() -> str:
    """Call before rclpy starts in the adapter's own process: asks for SCHED_FIFO
    ``MIDDLEWARE_PRIORITY`` so the middleware's send and receive threads, created at init,
    inherit it (a loaded machine then delays the stream's messages less); the node's
    ``decision_priority`` later sets the executor thread's own priority (0: normal)."""
    return set_thread_priority(MIDDLEWARE_PRIORITY)
