"""ROS 2 nodes and message conversion: the only package that imports rclpy."""
