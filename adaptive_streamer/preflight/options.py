# SPDX-License-Identifier: Apache-2.0
"""Command-line arguments of ``adaptive-streamer preflight`` (imports no ROS)."""
from __future__ import annotations

import argparse

from .checks import START_BOUND

DEFAULT_TIMEOUT = 5.0  # longest wait for topics and subscribers [s]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``adaptive-streamer preflight``."""
    parser.add_argument("--params", required=True, help="the cell's ROS 2 params file")
    parser.add_argument("--timeout", type=float, default=DEFAULT_TIMEOUT, metavar="S",
                        help=f"longest wait for topics and subscribers [s] (default "
                             f"{DEFAULT_TIMEOUT:g})")
    parser.add_argument("--start-bound", type=float, default=START_BOUND, metavar="D",
                        help="largest distance of the reference start from the arm per "
                             f"joint [rad or m] (default {START_BOUND:g})")
    parser.add_argument("--driver-timeout", type=float, default=None, metavar="S",
                        help="the driver's command timeout [s] (default: a 'command_timeout' "
                             "parameter in the params file, if any)")
