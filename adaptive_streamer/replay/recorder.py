# SPDX-License-Identifier: Apache-2.0
"""Recording the stack from Python: the ``recorder`` node in a child process.

    from adaptive_streamer.replay.recorder import Recorder
    with Recorder("runs/today", namespace="/cell1") as rec:
        rec.wait_for(["joint_states", "reference/window"], timeout=10.0)
        ...                                   # run the stack
    bag = rec.bag                             # closed by SIGINT when the block ends

`Recorder` starts ``python -m adaptive_streamer.nodes.recorder`` with the settings as ROS
parameters, follows its stdout (which topics it records) and stops it with SIGINT, which
closes the bag. The node itself is `adaptive_streamer.nodes.recorder`.

`adaptive_streamer.io.recording.STACK_TOPICS` are the topics recorded by default
(relative names resolve in the recorder's namespace).
"""
from __future__ import annotations

import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any, Sequence


class RecorderProcessError(RuntimeError):
    """The recorder process failed to start, died, or did not stop in time."""


def _param_value(value: Any) -> str:
    """A ``-p name:=value`` value in YAML (strings quoted, so '' and 'true' stay strings)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return "'" + value.replace("'", "''") + "'"
    if isinstance(value, (list, tuple)):
        return "[" + ",".join(_param_value(v) for v in value) + "]"
    return str(value)


class Recorder:
    """The ``recorder`` node as a child process (see the module docstring).

    Args:
        output: bag folder to create (must not exist).
        topics: topics to record (None: `adaptive_streamer.io.recording.STACK_TOPICS`).
        namespace: ROS namespace of the recorder ('' = root).
        compression, chunk_size, chunk_duration: see the node.
        adapter_node: adapter whose parameters are stored ('' = none).
        use_sim_time: record in sim time.
        ros_args: further ``--ros-args`` items (e.g. remaps).
        env: environment of the child (default: this process's).
    """

    def __init__(self, output: str | Path, topics: Sequence[str] | None = None,
                 namespace: str = "", compression: str = "none", chunk_size: int = 256 * 1024,
                 chunk_duration: float = 1.0, adapter_node: str = "adapter",
                 use_sim_time: bool = False, ros_args: Sequence[str] = (),
                 env: dict[str, str] | None = None) -> None:
        self.bag = Path(output)
        params: dict[str, Any] = {"output": str(self.bag), "compression": compression,
                                  "chunk_size": int(chunk_size),
                                  "chunk_duration": float(chunk_duration),
                                  "adapter_node": adapter_node, "use_sim_time": use_sim_time}
        if topics is not None:
            params["topics"] = list(topics)
        self.command = [sys.executable, "-m", "adaptive_streamer.nodes.recorder", "--ros-args"]
        for k, v in params.items():
            self.command += ["-p", f"{k}:={_param_value(v)}"]
        if namespace:
            self.command += ["-r", f"__ns:={namespace}"]
        self.command += list(ros_args)
        self.env = env
        self.process: subprocess.Popen[str] | None = None
        self.recording: dict[str, str] = {}
        self.lines: list[str] = []
        self._ready = threading.Event()
        self._info = threading.Event()
        self._lock = threading.Lock()

    # ------------------------------------------------------------------ control
    def start(self, timeout: float = 30.0) -> "Recorder":
        """Start the child and wait until the bag is open (raises on failure)."""
        self.process = subprocess.Popen(self.command, stdout=subprocess.PIPE,
                                        stderr=subprocess.STDOUT, text=True, env=self.env)
        threading.Thread(target=self._follow, daemon=True).start()
        end = time.monotonic() + timeout
        while not self._ready.wait(0.05):
            if self.process.poll() is not None or time.monotonic() > end:
                self.kill()
                raise RecorderProcessError("recorder did not start: " +
                                           " | ".join(self.lines[-5:]))
        return self

    def _follow(self) -> None:
        proc = self.process
        if proc is None or proc.stdout is None:
            return
        for line in proc.stdout:
            line = line.rstrip()
            with self._lock:
                self.lines.append(line)
            if line.startswith("recorder: ready"):
                self._ready.set()
            elif line.startswith("recorder: recording "):
                parts = line.split()
                if len(parts) >= 4:
                    self.recording[parts[2]] = parts[3]
            elif line.startswith("recorder: run info"):
                self._info.set()

    def wait_for(self, topics: Sequence[str], timeout: float = 10.0) -> bool:
        """Wait until every topic of ``topics`` is recorded (names compared by their end)."""
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if all(any(r == t or r.endswith("/" + t.lstrip("/")) for r in self.recording)
                   for t in topics):
                return True
            time.sleep(0.05)
        return False

    def wait_run_info(self, timeout: float = 10.0) -> bool:
        """Wait until the adapter's run info is stored."""
        return self._info.wait(timeout)

    def stop(self, timeout: float = 20.0, sig: int = signal.SIGINT) -> Path:
        """Stop the child with ``sig`` (SIGINT or SIGTERM), wait for it; returns the bag."""
        proc = self.process
        if proc is None:
            return self.bag
        if proc.poll() is None:
            proc.send_signal(sig)
            try:
                proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.kill()
                raise RecorderProcessError(f"recorder did not stop within {timeout:g} s") from None
        if proc.returncode not in (0, -sig):
            raise RecorderProcessError(f"recorder exited with code {proc.returncode}: " +
                                       " | ".join(self.lines[-5:]))
        return self.bag

    def kill(self) -> None:
        """Kill the child at once (the bag then lacks its end: see `bag_io.read_bag`)."""
        if self.process is not None and self.process.poll() is None:
            self.process.kill()
            self.process.wait()

    def __enter__(self) -> "Recorder":
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()
