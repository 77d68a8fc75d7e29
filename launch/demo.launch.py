# SPDX-License-Identifier: Apache-2.0
"""The demo cell (simulated driver, edge sensor, bridge, reference, adapter) for distro users.

    ros2 launch adaptive_streamer demo.launch.py

The adapter starts itself (autostart). Start the pass with the reference server's
``~/start`` service; ``adaptive-streamer demo`` does all of this and writes a report.
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
CELL = ("reference_server", "sim_driver", "edge_sensor", "sensor_bridge")


def _nodes(context, *args, **kwargs):
    params = expanded_params(LaunchConfiguration("params_file").perform(context))
    ns = LaunchConfiguration("namespace").perform(context)
    nodes = [Node(package="adaptive_streamer", executable=name, name=name, namespace=ns,
                  parameters=[params], output="screen") for name in CELL]
    nodes.append(LifecycleNode(package="adaptive_streamer", executable="adapter", name="adapter",
                               namespace=ns, parameters=[params, {"autostart": True}],
                               output="screen"))
    return nodes


def generate_launch_description():
    return LaunchDescription([
        DeclareLaunchArgument("params_file",
                              default_value=os.path.join(SHARE, "config", "demo", "params.yaml"),
                              description="ROS 2 params file of the demo cell"),
        DeclareLaunchArgument("namespace", default_value="", description="namespace of the nodes"),
        OpaqueFunction(function=_nodes),
    ])
