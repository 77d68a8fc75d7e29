"""Thin rclpy shells around the core: they convert messages, own parameters and timers."""
