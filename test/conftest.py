# SPDX-License-Identifier: Apache-2.0
"""Test-session setup shared by every test.

Each pytest process gets its own ROS_DOMAIN_ID (derived from the process id; a new one for
each test module) and DDS discovery limited to this host, so parallel runs never
cross-talk. This runs before any test module imports rclpy.
"""
import gc
import itertools
import os
import sys
import threading
from pathlib import Path

import pytest

os.environ["ROS_DOMAIN_ID"] = str(1 + os.getpid() % 100)
os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
os.environ.setdefault("RCUTILS_LOGGING_BUFFERED_STREAM", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

sys.path.insert(0, str(Path(__file__).parent))


_MODULES = itertools.count()


@pytest.fixture(autouse=True, scope="module")
def _own_domain_per_module():
    """Each test module gets its own ROS_DOMAIN_ID (for its nodes and the processes it
    starts), still derived from the process id so parallel runs stay apart: domain
    1 + (pid + 37 k) mod 232 for the k-th module.

    A module's rclpy contexts are finalised only when the collector gets to them, and a
    participant left in the domain keeps its participant id. With discovery limited to this
    host a new participant announces itself only to the lowest few ids, so once leftovers
    hold those, the processes a later test starts would stop finding each other. What the
    earlier modules left is collected here as well (the adapter harness freezes the
    collector while a cell runs)."""
    gc.unfreeze()
    gc.collect()
    os.environ["ROS_DOMAIN_ID"] = str(1 + (os.getpid() + 37 * next(_MODULES)) % 232)
    yield
    # an adapter destroyed while active used to leave its stream thread ticking, which kept
    # its node and DDS participant alive and broke discovery for every later module: name
    # the module that leaves one behind
    streams = [t for t in threading.enumerate()
               if t.name == "adaptive_streamer-stream" and t.is_alive()]
    if streams:
        for t in streams:
            t.join(timeout=5.0)
        assert not any(t.is_alive() for t in streams), (
            "this module left an adapter stream thread running (an adapter node was not "
            "deactivated or destroyed)")
    # a module whose cell failed to come up may not have shut rclpy down: the next
    # module's rclpy.init() would then fail
    if "rclpy" in sys.modules:
        sys.modules["rclpy"].try_shutdown()
