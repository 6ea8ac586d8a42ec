"""Run this package's ROS 2 XML launch files without the ROS launch tools (standalone install)."""
