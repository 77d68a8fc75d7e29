# SPDX-License-Identifier: Apache-2.0
"""Thin rclpy shells around the core: they convert messages, own parameters and timers."""
