# SPDX-License-Identifier: Apache-2.0
"""Between ROS and the core: messages <-> core types, bags, params files (core + message and
bag libraries).

==========================  =========================================================
module                      holds
==========================  =========================================================
``stamps``                  builtin_interfaces/Time <-> float seconds
``trajectory_conversions``  JointTrajectory <-> reference windows and samples
``joint_states``            joint_states sent in several messages, merged per joint
``adapter_inputs``          the adapter's latest window and feedback, converted on demand
``field_paths``             compiled field paths into any message type (sensor bridge)
``params_files``            a node's section of a standard ROS 2 params file
``reference_bags``          references from rosbag2 topics; `load_reference` for any file
``bag_io``                  chunked MCAP bag writer, bag reader with crash recovery, repair
``fast_cdr``                exact, fast reading of the per-cycle message types
``messages``                bag bytes -> windows, joint states, decision records
``run_info``                the adapter's parameters and files stored in a bag
``recording``               the recorded topics and their QoS in the bag
==========================  =========================================================
"""
