# SPDX-License-Identifier: Apache-2.0
"""The adapter in its own process, run as `adaptive_streamer.nodes.adapter.main` runs it, next
to a node whose callback raises when a message arrives on ``crash`` (std_msgs/Empty): the
error reaches `common.run_nodes`, which must still bring the arm to rest before exiting.

Usage: python test/crashing_adapter.py --ros-args --params-file FILE
"""
from __future__ import annotations

import sys

from rclpy.node import Node
from std_msgs.msg import Empty

from adaptive_streamer.nodes import common
from adaptive_streamer.nodes.adapter import AdapterNode, bring_to_rest
from adaptive_streamer.nodes.threads import make_executor, prepare_process


class Crasher(Node):
    """Raises from its subscription callback (inside the executor's spin)."""

    def __init__(self) -> None:
        super().__init__("crasher")
        self.create_subscription(Empty, "crash", self._crash, 1)

    def _crash(self, msg: Empty) -> None:  # noqa: ARG002
        raise RuntimeError("injected failure in a callback")


if __name__ == "__main__":
    prepare_process()
    sys.exit(common.run_nodes([AdapterNode, Crasher], sys.argv[1:], executor=make_executor,
                              before_shutdown=bring_to_rest))
