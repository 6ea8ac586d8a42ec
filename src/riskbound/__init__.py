"""riskbound: risk-bounded local motion planning among moving people (ROS 2)."""

__version__ = "0.1.0"
