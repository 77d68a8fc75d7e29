"""The demo cell (ROS-free, invented data): an invented 6-axis arm, a misplaced panel, a
line sensor at the nozzle, the nominal pass along the nominal edge, and the task metric.

- `arm`: `DEMO_ARM` kinematics (forward, Jacobian, damped-least-squares IK);
- `panel`: `Panel` geometry (lateral offset, edge angle) and `draw_placement`;
- `line_sensor`: `LineSensor` (noise, range, latency) and `true_edge_reading`;
- `nominal_path`: `PassConfig`, the timed pass and its joint-space solution;
- `config`: `load_scenario` for ``config/demo/scenario.yaml``;
- `metrics`: `lateral_error`.
"""
