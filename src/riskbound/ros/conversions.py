"""Message conversions shared by the nodes. Quaternions are converted here and only here:
ROS messages store (x, y, z, w); transforms3d works with (w, x, y, z)."""

import numpy as np
from geometry_msgs.msg import Quaternion
from transforms3d.euler import euler2quat, quat2euler


def yaw_to_quaternion(yaw):
    """Planar heading [rad] → geometry_msgs/Quaternion (rotation about z)."""
    w, x, y, z = euler2quat(0.0, 0.0, float(yaw), axes="sxyz")
    return Quaternion(x=x, y=y, z=z, w=w)


def quaternion_to_yaw(q):
    """geometry_msgs/Quaternion → heading [rad]; NaN when the quaternion is not finite or is zero."""
    wxyz = np.array([q.w, q.x, q.y, q.z], dtype=float)
    norm = np.linalg.norm(wxyz)
    if not np.all(np.isfinite(wxyz)) or norm < 1e-9:
        return float("nan")
    return float(quat2euler(wxyz / norm, axes="sxyz")[2])


def stamp_to_seconds(stamp):
    """builtin_interfaces/Time → float seconds."""
    return stamp.sec + 1e-9 * stamp.nanosec


def seconds_to_stamp(seconds, stamp_type):
    """Float seconds → builtin_interfaces/Time (stamp_type is the message class)."""
    sec = int(np.floor(seconds))
    return stamp_type(sec=sec, nanosec=int(round((seconds - sec) * 1e9)) % 1_000_000_000)
