# SPDX-License-Identifier: Apache-2.0
"""Launch the demo with launch_testing (ROS 2 distro only; skipped where it does not import).

The package's own bring-up path is tested in test_bringup.py; this checks that the launch
file starts a working cell for distro users.
"""
import pytest

launch_testing = pytest.importorskip("launch_testing", reason="launch_testing is not installed "
                                     "(it comes with a ROS 2 distro, not from PyPI)")
launch_ros = pytest.importorskip("launch_ros")

import os  # noqa: E402
import unittest  # noqa: E402

import launch  # noqa: E402
import launch_testing.actions  # noqa: E402
import rclpy  # noqa: E402
from ament_index_python.packages import get_package_share_directory  # noqa: E402
from launch.launch_description_sources import PythonLaunchDescriptionSource  # noqa: E402
from trajectory_msgs.msg import JointTrajectory  # noqa: E402


@pytest.mark.launch_test
def generate_test_description():
    share = get_package_share_directory("adaptive_streamer")
    demo = launch.actions.IncludeLaunchDescription(
        PythonLaunchDescriptionSource(os.path.join(share, "launch", "demo.launch.py")))
    return launch.LaunchDescription([demo, launch_testing.actions.ReadyToTest()])


class TestDemoLaunch(unittest.TestCase):
    def test_adapter_streams_setpoints(self):
        rclpy.init()
        node = rclpy.create_node("launch_test_listener")
        got = []
        node.create_subscription(JointTrajectory, "setpoints", got.append, 10)
        try:
            end = node.get_clock().now().nanoseconds + 30e9
            while not got and node.get_clock().now().nanoseconds < end:
                rclpy.spin_once(node, timeout_sec=0.1)
            self.assertTrue(got, "no setpoints within 30 s")
        finally:
            node.destroy_node()
            rclpy.shutdown()
