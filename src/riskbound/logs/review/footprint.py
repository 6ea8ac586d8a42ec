"""Time until the robot's disc touches an obstacle's box at constant velocities (the review's
time to collision). The footprints and the clearance between them are riskbound.clearance's.
"""

import numpy as np

from riskbound.clearance import to_box_frame


def _slab_entry(p, v, half):
    """Earliest t ≥ 0 at which p + v t is inside the box |x_i| ≤ half_i (inf if never)."""
    enter, leave = -np.inf, np.inf
    for i in range(2):
        if v[i] == 0.0:
            if abs(p[i]) > half[i]:
                return np.inf
            continue
        t1, t2 = (-half[i] - p[i]) / v[i], (half[i] - p[i]) / v[i]
        enter, leave = max(enter, min(t1, t2)), min(leave, max(t1, t2))
    if enter > leave or leave < 0.0:
        return np.inf
    return max(enter, 0.0)


def _circle_entry(p, v, centre, radius):
    """Earliest t ≥ 0 at which p + v t is within `radius` of `centre` (inf if never)."""
    d = p - centre
    a, b, c = v @ v, d @ v, d @ d - radius**2
    if c <= 0.0:
        return 0.0
    if a == 0.0 or b >= 0.0 or b * b - a * c < 0.0:
        return np.inf
    return (-b - np.sqrt(b * b - a * c)) / a


def time_to_contact(robot_xy, robot_velocity, radius, box_xy, box_velocity, box_heading, half_extents):
    """Time [s] until the disc touches the box if both keep their velocities; 0 if they already
    overlap, inf if they never touch.

    In the box frame the robot centre moves on a ray; the set of centres touching the box is the
    box grown by r with rounded corners: two rectangles (grown along one axis each) and four
    corner circles of radius r. The contact time is the earliest entry into any of them.
    """
    heading = float(box_heading)
    p = to_box_frame(np.asarray(robot_xy, dtype=float) - np.asarray(box_xy, dtype=float), heading)
    v = to_box_frame(np.asarray(robot_velocity, dtype=float) - np.asarray(box_velocity, dtype=float), heading)
    if not (np.all(np.isfinite(p)) and np.all(np.isfinite(v))):
        return np.nan
    hx, hy = float(half_extents[0]), float(half_extents[1])
    times = [_slab_entry(p, v, (hx + radius, hy)), _slab_entry(p, v, (hx, hy + radius))]
    times += [_circle_entry(p, v, np.array([sx * hx, sy * hy]), radius) for sx in (-1, 1) for sy in (-1, 1)]
    return float(min(times))
