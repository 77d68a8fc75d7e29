# SPDX-License-Identifier: Apache-2.0
"""The stream thread: wakes at each nominal tick time and runs the node's tick callback.

Measured on the 2-core target (see README, "Executor layout"): rclpy's multi-threaded
executor could not serve a 250 Hz timer next to the node's subscriptions (most ticks
skipped), while one thread that sleeps to absolute tick times keeps the stream on time and
independent of the executor, which runs subscriptions, services and the decision. The tick
callback only samples the committed plan and publishes.

Time: ticks are due at ``t0 + i / rate`` on the adapter's time, ROS time carried forward
on the monotonic clock (`adaptive_streamer.core.stream.StreamTimeline`), so the thread
sleeps and wakes on the monotonic clock and a step of the system clock changes nothing.
Under ``use_sim_time`` it is the sim clock, polled in short sleeps, so a paused clock
pauses the stream.
"""
from __future__ import annotations

import threading
import time
from typing import Callable

from .threads import set_thread_priority


class StreamThread:
    """Calls ``tick(now)`` whenever a tick may be due; stops on `stop`.

    Args:
        now: returns the adapter's time in seconds (see the module docstring).
        next_due: returns the nominal time of the next tick to publish.
        tick: the tick callback (publishes at most one setpoint).
        on_error: called with any exception the loop meets (the clock, the tick); the loop
            goes on after it, so the controlled stop it starts still reaches the driver.
        max_sleep: longest single sleep [s] (bounds the reaction to a stop or sim clock).
        priority: SCHED_FIFO priority of the thread (0: normal scheduling; see
            `threads.set_thread_priority`).
    """

    def __init__(self, now: Callable[[], float], next_due: Callable[[], float],
                 tick: Callable[[float], None], on_error: Callable[[Exception], None],
                 max_sleep: float = 0.01, priority: int = 0) -> None:
        self._now, self._next_due, self._tick = now, next_due, tick
        self._on_error = on_error
        self._priority = int(priority)
        self.priority_note = "stream thread at normal priority"
        self._max_sleep = max_sleep
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="adaptive_streamer-stream",
                                        daemon=True)

    def start(self) -> None:
        """Start ticking."""
        self._thread.start()

    def stop(self, timeout: float = 1.0) -> None:
        """Stop and join."""
        self._stop.set()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(timeout)

    @property
    def running(self) -> bool:
        """True while the thread runs."""
        return self._thread.is_alive() and not self._stop.is_set()

    def _run(self) -> None:
        if self._priority > 0:  # this thread only (Linux: pid 0 is the calling thread)
            self.priority_note = set_thread_priority(self._priority, "stream thread")
        while not self._stop.is_set():
            try:
                now = self._now()
                self._tick(now)
                delay = self._next_due() - self._now()
            except Exception as exc:  # the stream must outlive any error to brake
                self._on_error(exc)
                delay = self._max_sleep
            if delay > 0.0:
                time.sleep(min(delay, self._max_sleep))
