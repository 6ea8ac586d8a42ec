"""Message conversions shared by the nodes. Orientations go through riskbound.motion.heading, the
one place that converts between headings and ROS (x, y, z, w) quaternions."""

import numpy as np
from geometry_msgs.msg import Quaternion

from riskbound.motion.heading import quaternion_xyzw_to_yaw, yaw_to_quaternion_xyzw


def yaw_to_quaternion(yaw):
    """Planar heading [rad] → geometry_msgs/Quaternion (rotation about z)."""
    x, y, z, w = yaw_to_quaternion_xyzw([yaw])[0]
    return Quaternion(x=float(x), y=float(y), z=float(z), w=float(w))


def quaternion_to_yaw(q):
    """geometry_msgs/Quaternion → heading [rad]; NaN when the quaternion is not finite or is zero."""
    return float(quaternion_xyzw_to_yaw([[q.x, q.y, q.z, q.w]])[0])


def quaternions_to_yaws(quaternions):
    """Sequence of geometry_msgs/Quaternion → headings (n,) [rad], NaN for invalid ones."""
    return quaternion_xyzw_to_yaw(np.array([[q.x, q.y, q.z, q.w] for q in quaternions], dtype=float))


def stamp_to_seconds(stamp):
    """builtin_interfaces/Time → float seconds."""
    return stamp.sec + 1e-9 * stamp.nanosec


def seconds_to_stamp(seconds, stamp_type):
    """Float seconds → builtin_interfaces/Time (stamp_type is the message class)."""
    total_ns = int(round(seconds * 1e9))
    return stamp_type(sec=total_ns // 1_000_000_000, nanosec=total_ns % 1_000_000_000)
