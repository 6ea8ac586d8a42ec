"""Bags and logs: rosbag2 reading and writing without a ROS install."""
