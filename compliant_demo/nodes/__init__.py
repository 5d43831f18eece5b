"""Thin rclpy adapters around the core: teacher, recorder, learner and replay nodes."""
