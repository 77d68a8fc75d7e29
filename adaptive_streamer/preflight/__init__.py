# SPDX-License-Identifier: Apache-2.0
"""``adaptive-streamer preflight``: check a real cell before a pass, without moving anything.

`run.preflight` loads the params, limits, policy card and reference as the nodes would,
listens to ``joint_states`` and the command topics with a node of its own, and returns one
`checks.Check` row per check; `run.format_table` prints them.
"""
