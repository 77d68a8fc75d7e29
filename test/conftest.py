"""Test-session setup shared by every test.

Each pytest process gets its own ROS_DOMAIN_ID (derived from the process id) and DDS
discovery limited to this host, so parallel runs never cross-talk. This runs before any
test module imports rclpy.
"""
import os
import sys
from pathlib import Path

os.environ["ROS_DOMAIN_ID"] = str(1 + os.getpid() % 100)
os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
os.environ.setdefault("RCUTILS_LOGGING_BUFFERED_STREAM", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

sys.path.insert(0, str(Path(__file__).parent))
