"""Clearance between the robot and an obstacle: the one definition every verdict, report,
benchmark and test uses.

Footprints: the robot is a disc of radius r (the planner's `robot_radius_m`); an obstacle is a box
of half-extents (half_length along its heading, half_width across) centred on its position (a
person's footprint: the tracker's `footprint_half_length_m` / `footprint_half_width_m`, 0.25 ×
0.2 m by default). Clearance is the signed distance between the two shapes: the distance from
the disc centre to the box minus r, negative when they overlap (inside the box the distance is
minus the depth to the nearest face). Below zero is a collision.

Along a recorded run the robot is known at odometry times and the obstacles at their own
observation times. `closest_approach` evaluates the clearance at every obstacle observation (robot
position interpolated linearly from odometry), then refines the smallest value of each obstacle
between its neighbouring observations (obstacle moving linearly, heading interpolated), on a grid
of REFINE_POINTS instants and again on a finer grid around the best point. The closed-loop summary
and the review both report this number, so they agree on the same run.
"""

from dataclasses import dataclass

import numpy as np

REFINE_POINTS = 41
# Observations of one obstacle further apart than this many median frame periods are not
# interpolated between (the obstacle was not seen in between).
NEIGHBOUR_GAP_PERIODS = 1.5


def to_box_frame(offset, heading):
    """World-frame vectors (..., 2) → the box frame of an obstacle with `heading` (...) [rad]."""
    c, s = np.cos(heading), np.sin(heading)
    return np.stack([c * offset[..., 0] + s * offset[..., 1], -s * offset[..., 0] + c * offset[..., 1]], axis=-1)


def disc_box_clearance(robot_xy, radius, box_xy, box_heading, half_extents):
    """Signed clearance [m] between a disc and oriented boxes; all arguments broadcast.

    robot_xy (..., 2), radius scalar or (...), box_xy (..., 2), box_heading (...), half_extents (..., 2).
    NaN positions give NaN.
    """
    local = np.abs(to_box_frame(np.asarray(robot_xy, dtype=float) - np.asarray(box_xy, dtype=float),
                                np.asarray(box_heading, dtype=float)))
    q = local - np.asarray(half_extents, dtype=float)
    outside = np.sqrt(np.sum(np.maximum(q, 0.0) ** 2, axis=-1))
    inside = np.minimum(np.max(q, axis=-1), 0.0)
    return outside + inside - radius


@dataclass
class Approach:
    """The smallest clearance found, when and between what."""

    clearance_m: float
    time_s: float
    obstacle_id: int
    robot_xy: np.ndarray
    obstacle_xy: np.ndarray
    obstacle_heading: float


def robot_position_at(robot_times_s, robot_xy, times_s):
    """Robot positions (n, 2) linearly interpolated at `times_s`; NaN outside the odometry."""
    times_s = np.atleast_1d(np.asarray(times_s, dtype=float))
    out = np.full((len(times_s), 2), np.nan)
    if len(robot_times_s) == 0:
        return out
    inside = (times_s >= robot_times_s[0]) & (times_s <= robot_times_s[-1])
    for axis in range(2):
        out[inside, axis] = np.interp(times_s[inside], robot_times_s, robot_xy[:, axis])
    return out


def refine_between(robot_times_s, robot_xy, radius, track_times_s, track_xy, track_headings, half_extents,
                   t_from, t_to, best):
    """`best` (an Approach at one observation) improved by searching [t_from, t_to] along one
    obstacle's track: a grid of REFINE_POINTS instants, then a finer one around its best point."""
    if not t_to > t_from:
        return best
    unwrapped = np.unwrap(track_headings)
    grid = np.linspace(t_from, t_to, REFINE_POINTS)
    for _ in range(2):
        xy = np.stack([np.interp(grid, track_times_s, track_xy[:, 0]),
                       np.interp(grid, track_times_s, track_xy[:, 1])], axis=-1)
        headings = np.interp(grid, track_times_s, unwrapped)
        robot_grid = robot_position_at(robot_times_s, robot_xy, grid)
        values = disc_box_clearance(robot_grid, radius, xy, headings, half_extents)
        if not np.any(np.isfinite(values)):
            break
        j = int(np.nanargmin(values))
        if values[j] < best.clearance_m:
            best = Approach(float(values[j]), float(grid[j]), best.obstacle_id, robot_grid[j], xy[j],
                            float(np.angle(np.exp(1j * headings[j]))))
        step = grid[1] - grid[0]
        grid = np.linspace(max(grid[j] - step, t_from), min(grid[j] + step, t_to), REFINE_POINTS)
    return best


def closest_approach(robot_times_s, robot_xy, radius, times_s, ids, positions, headings, half_extents,
                     max_step_s=None):
    """The run's smallest clearance (an Approach), or None when no observation is covered by odometry.

    robot_times_s (T,) increasing, robot_xy (T, 2); obstacle observations: times_s, ids, headings
    (E,), positions and half_extents (E, 2). max_step_s: neighbouring observations of one obstacle
    further apart are not interpolated between (default NEIGHBOUR_GAP_PERIODS median frame periods).
    """
    times_s, ids = np.asarray(times_s, dtype=float), np.asarray(ids)
    positions, headings = np.asarray(positions, dtype=float), np.asarray(headings, dtype=float)
    half_extents = np.asarray(half_extents, dtype=float)
    if len(times_s) == 0 or len(robot_times_s) < 2:
        return None
    order = np.lexsort((times_s, ids))
    times_s, ids, positions, headings, half_extents = (times_s[order], ids[order], positions[order],
                                                       headings[order], half_extents[order])
    if max_step_s is None:
        frames = np.unique(times_s)
        max_step_s = NEIGHBOUR_GAP_PERIODS * (float(np.median(np.diff(frames))) if len(frames) > 1 else 0.1)
    values = disc_box_clearance(robot_position_at(robot_times_s, robot_xy, times_s), radius, positions, headings,
                                half_extents)
    if not np.any(np.isfinite(values)):
        return None
    best = None
    boundaries = np.flatnonzero(np.diff(ids) != 0) + 1
    for lo, hi in zip(np.r_[0, boundaries], np.r_[boundaries, len(ids)]):
        track = slice(int(lo), int(hi))
        track_values = values[track]
        if not np.any(np.isfinite(track_values)):
            continue
        k = int(np.nanargmin(track_values))
        track_times = times_s[track]
        row = lo + k
        candidate = Approach(float(track_values[k]), float(track_times[k]), int(ids[row]),
                             robot_position_at(robot_times_s, robot_xy, track_times[k])[0], positions[row].copy(),
                             float(headings[row]))
        t_from = track_times[k - 1] if k > 0 and track_times[k] - track_times[k - 1] <= max_step_s else track_times[k]
        t_to = (track_times[k + 1] if k + 1 < len(track_times) and track_times[k + 1] - track_times[k] <= max_step_s
                else track_times[k])
        candidate = refine_between(robot_times_s, robot_xy, radius, track_times, positions[track], headings[track],
                                   half_extents[row], t_from, t_to, candidate)
        if best is None or candidate.clearance_m < best.clearance_m:
            best = candidate
    return best
