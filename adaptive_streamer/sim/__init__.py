# SPDX-License-Identifier: Apache-2.0
"""The simulated cell (ROS-free, invented data; imports the core only): an invented 6-axis
arm, a misplaced panel, a line sensor at the nozzle, the nominal pass along the nominal
edge, the task metric, the driver's plant and the offline closed loop.

- `arm`: `DEMO_ARM` kinematics (forward, Jacobian, damped-least-squares IK);
- `panel`: `Panel` geometry (lateral offset, edge angle) and `draw_placement`;
- `line_sensor`: `LineSensor` (noise, range, latency) and `true_edge_reading`;
- `nominal_path`: `PassConfig`, the timed pass and its joint-space solution;
- `config`: `load_scenario` for ``config/demo/scenario.yaml``;
- `metrics`: `lateral_error`;
- `plant`: `SimPlant`, the simulated driver's joints (transport delay, lag, noise);
- `closed_loop`: `run_closed_loop`, the whole cell offline on the core's session.
"""
