# SPDX-License-Identifier: Apache-2.0
"""The demo's faults of the adapter's own process: ``adapter_stall`` suspends it with SIGSTOP
and resumes it with SIGCONT after the stall's length, ``adapter_crash`` kills it with
SIGKILL (Linux).

A stall is made by a small process of its own (``kill -STOP``, ``sleep``, ``kill -CONT``,
with the time of each signal on its output), so its length does not depend on when this
busy process gets the CPU. `AdapterProcessFaults.release` resumes a suspended adapter at
once; the demo calls it when the pass ends and in its ``finally`` (an exception or Ctrl-C
never leaves the adapter suspended). After a crash, `crashed` tells the demo not to talk to
the adapter any more.
"""
from __future__ import annotations

import math
import signal
import subprocess
import threading
from typing import Callable

from ..bringup import BringupError, Processes

ADAPTER = "adapter"   # the node kind of the adapter's process


class ProcessFaultError(RuntimeError):
    """The adapter's process could not be signalled (it is not running)."""


class AdapterProcessFaults:
    """Suspends, resumes and kills the adapter's process. Times are ROS seconds of
    ``clock``, which must be the system clock (the demo runs without sim time): the resume
    time comes from the resuming process's ``date``."""

    def __init__(self, procs: Processes, clock: Callable[[], float]) -> None:
        self._procs = procs
        self._clock = clock
        self._lock = threading.Lock()
        self._resumer: subprocess.Popen | None = None
        self.suspended = False
        self.crashed = False
        self.resumed_at = math.nan    # time of the last SIGCONT

    def stall(self, length: float) -> float:
        """Suspend the adapter for ``length`` seconds; returns the time it was suspended."""
        with self._lock:
            pid = self._signal(0)     # signal 0: only the pid of the running adapter
            self._resumer = subprocess.Popen(
                ["/bin/sh", "-c", f"kill -STOP {pid} && date +%s.%N && sleep {length:.6f}; "
                                  f"kill -CONT {pid}; date +%s.%N"],
                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
                start_new_session=True)
            self.suspended = True
            line = self._resumer.stdout.readline()
            try:
                return float(line)
            except ValueError:
                self.suspended = False
                self._stop_resumer()
                raise ProcessFaultError("could not suspend the adapter's process (it is not "
                                        "running)") from None

    def crash(self) -> float:
        """Kill the adapter (SIGKILL); returns the time it was killed."""
        with self._lock:
            self._stop_resumer()
            self._signal(signal.SIGKILL)
            self.crashed = True
            self.suspended = False
            return self._clock()

    def release(self) -> None:
        """Make sure the adapter is not suspended: note the resume if the resuming process
        has done it, else resume it now (idempotent)."""
        with self._lock:
            if not self.suspended:
                return
            self.suspended = False
            resumer = self._resumer
            if resumer is not None and resumer.poll() is not None:
                self._resumer = None
                try:
                    self.resumed_at = float(resumer.communicate()[0].strip())
                    return
                except ValueError:
                    pass      # no time on its output: resume (again) below
            self._stop_resumer()
            try:
                self._signal(signal.SIGCONT)
            except ProcessFaultError:
                return      # it ended meanwhile: nothing left to resume
            self.resumed_at = self._clock()

    def _stop_resumer(self) -> None:
        if self._resumer is not None:
            if self._resumer.poll() is None:
                self._resumer.kill()
            self._resumer.communicate()
            self._resumer = None

    def _signal(self, sig: int) -> int:
        try:
            return self._procs.send_signal(ADAPTER, sig)
        except BringupError as exc:
            raise ProcessFaultError(f"cannot signal the adapter's process: {exc}") from None
