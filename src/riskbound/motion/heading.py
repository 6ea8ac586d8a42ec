"""Planar heading ↔ quaternion: the one place where orientations are converted.

ROS messages store quaternions as (x, y, z, w); transforms3d, our reference library, as (w, x, y, z).
For a planar rotation by ψ about z, transforms3d's `euler2quat(0, 0, ψ, "sxyz")` is
(cos ψ/2, 0, 0, sin ψ/2); its `quat2euler(q, "sxyz")[2]` is the yaw atan2(2(wz + xy), 1 − 2(y² + z²))
of the normalised quaternion. Both are written out here in closed form so they run on whole arrays
(a scan of detections, a bag's poses); `test/test_heading.py` checks them against transforms3d.
"""

import numpy as np


def yaw_to_quaternion_xyzw(yaws):
    """Headings (n,) [rad] → quaternions (n, 4) in ROS order (x, y, z, w)."""
    half = 0.5 * np.asarray(yaws, dtype=float).reshape(-1)
    zeros = np.zeros_like(half)
    return np.column_stack([zeros, zeros, np.sin(half), np.cos(half)])


def quaternion_xyzw_to_yaw(quaternions):
    """Quaternions (n, 4) in ROS order → headings (n,) [rad]; NaN where a quaternion is not finite or is zero."""
    q = np.asarray(quaternions, dtype=float).reshape(-1, 4)
    # Garbage from a damaged file may overflow here; such quaternions come out as NaN anyway.
    with np.errstate(over="ignore", invalid="ignore"):
        norm = np.linalg.norm(q, axis=1)
        valid = np.all(np.isfinite(q), axis=1) & np.isfinite(norm) & (norm > 1e-9)
        x, y, z, w = (q / np.where(valid, norm, 1.0)[:, None]).T
        yaw = np.arctan2(2.0 * (w * z + x * y), 1.0 - 2.0 * (y * y + z * z))
    return np.where(valid, yaw, np.nan)
