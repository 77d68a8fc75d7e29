# SPDX-License-Identifier: Apache-2.0
"""reference_server, sensor_bridge and adapter, for a real driver (ROS 2 distro users).

    ros2 launch adaptive_streamer streamer.launch.py params_file:=/path/to/cell.yaml namespace:=cell

Remap the adapter's driver output to the driver's command topic in the params file
(``adapter.position.topic``) or with a remapping here. The adapter is a lifecycle node:
configure and activate it (autostart: true in the params file, or from Python with
adaptive_streamer.nodes.lifecycle_client). See README ("Running against a real driver").
"""
import os
import sys

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument, OpaqueFunction
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import LifecycleNode, Node

sys.path.insert(0, os.path.dirname(__file__))
from _params import expanded_params  # noqa: E402

SHARE = get_package_share_directory("adaptive_streamer")


def _nodes(context, *args, **kwargs):
    params = expanded_params(LaunchConfiguration("params_file").perform(context))
    ns = LaunchConfiguration("namespace").perform(context)
    return [
        Node(package="adaptive_streamer", executable="reference_server", name="reference_server",
             namespace=ns, parameters=[params], output="screen"),
        Node(package="adaptive_streamer", executable="sensor_bridge", name="sensor_bridge",
             namespace=ns, parameters=[params], output="screen"),
        LifecycleNode(package="adaptive_streamer", executable="adapter", name="adapter",
                      namespace=ns, parameters=[params], output="screen"),
    ]


def generate_launch_description():
    return LaunchDescription([
        DeclareLaunchArgument("params_file",
                              default_value=os.path.join(SHARE, "config", "streamer.params.yaml"),
                              description="ROS 2 params file for the three nodes"),
        DeclareLaunchArgument("namespace", default_value="", description="namespace of the nodes"),
        OpaqueFunction(function=_nodes),
    ])
