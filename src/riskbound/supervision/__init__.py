"""Watchdog logic without ROS: solve-time statistics, the health state machine and the stop command."""
