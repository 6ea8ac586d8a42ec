"""A crowd scenario's static world as an occupancy grid, and the robot's clearance to it.

The grid covers the scenario's bounds (Scenario.bounds) plus a free margin, in the scenario's
frame with yaw 0. Occupied (100): every cell whose square touches a wall segment, a disc obstacle
or an edge of the bounds (the bounds are walls: a robot that leaves them has left the scene).
Everything else is free (0); there are no unknown cells. A wall along a cell boundary marks the
cells on both sides, so a wall is one to two cells thick and the rasterised geometry is never
smaller than the scenario's: clearances measured on the grid are conservative by at most one
cell diagonal.

The static clearance of the robot (a disc) is the signed distance from its centre to occupied
space minus its radius: positive when clear, negative when the disc overlaps a wall or obstacle
(inside occupied space the distance is minus the depth to free space). It is the one definition
of a static contact for the closed-loop verdict and the review: contact when it is below zero.
"""

from dataclasses import dataclass

import numpy as np

from riskbound.world.occupancy import MAX_CELLS, OccupancyMap, as_points, square_gaps

DEFAULT_RESOLUTION_M = 0.05
# Free space around the bounds' walls, so a robot that crosses them is seen outside, not inside a
# wall, and the walls have free space on both sides [m].
MAP_MARGIN_M = 1.0
FREE, OCCUPIED = 0, 100
# Touching counts as intersecting: a wall on a cell boundary marks both neighbours [m].
_TOUCH_TOLERANCE_M = 1e-9


@dataclass(frozen=True)
class StaticContacts:
    """What a trajectory did near the static world."""

    samples: int
    contact_samples: int           # static clearance < 0
    min_clearance_m: float         # smallest static clearance (inf with no occupied cells)
    outside_bounds_samples: int
    time_outside_bounds_s: float   # sample-and-hold: each sample's state lasts until the next


def bounds_walls(bounds):
    """The four edges (4, 2, 2) of the bounds (x_min, x_max, y_min, y_max) as wall segments."""
    x_min, x_max, y_min, y_max = _checked_bounds(bounds)
    corners = np.array([[x_min, y_min], [x_max, y_min], [x_max, y_max], [x_min, y_max]])
    return np.stack([corners, np.roll(corners, -1, axis=0)], axis=1)


def scenario_occupancy(scenario, resolution_m=DEFAULT_RESOLUTION_M, frame_id="odom"):
    """OccupancyMap of a Scenario's walls, disc obstacles and bounds (module docstring)."""
    return rasterise(scenario.bounds(), scenario.walls, scenario.obstacle_centres, scenario.obstacle_radii,
                     resolution_m=resolution_m, frame_id=frame_id)


def rasterise(bounds, walls=(), obstacle_centres=(), obstacle_radii=(), resolution_m=DEFAULT_RESOLUTION_M,
              frame_id="odom"):
    """OccupancyMap over the bounds plus MAP_MARGIN_M, with the wall segments (M, 2, 2), the discs
    (centres (K, 2), radii (K,)) and the bounds' edges occupied. ValueError for bad geometry."""
    x_min, x_max, y_min, y_max = _checked_bounds(bounds)
    if isinstance(resolution_m, bool) or not isinstance(resolution_m, (int, float)) \
            or not np.isfinite(resolution_m) or resolution_m <= 0.0:
        raise ValueError(f"resolution_m={resolution_m!r}: must be a finite number > 0 [m/cell]")
    walls = np.asarray(walls, dtype=float).reshape(-1, 2, 2)
    centres = np.asarray(obstacle_centres, dtype=float).reshape(-1, 2)
    radii = np.asarray(obstacle_radii, dtype=float).reshape(-1)
    if len(radii) != len(centres):
        raise ValueError(f"obstacle_radii has {len(radii)} entries for {len(centres)} obstacle_centres")
    if not (np.all(np.isfinite(walls)) and np.all(np.isfinite(centres)) and np.all(np.isfinite(radii))):
        raise ValueError("walls and obstacles must have finite coordinates and radii")
    origin = np.array([x_min - MAP_MARGIN_M, y_min - MAP_MARGIN_M])
    width = int(np.ceil((x_max - x_min + 2.0 * MAP_MARGIN_M) / resolution_m - 1e-9))
    height = int(np.ceil((y_max - y_min + 2.0 * MAP_MARGIN_M) / resolution_m - 1e-9))
    if width * height > MAX_CELLS:
        raise ValueError(f"resolution_m={resolution_m!r}: the bounds {list(bounds)} need {width} x {height} cells, "
                         f"more than {MAX_CELLS}; choose a coarser resolution")
    occupied = np.zeros((height, width), dtype=bool)
    for start, end in np.concatenate([walls, bounds_walls(bounds)]):
        _mark_segment(occupied, origin, resolution_m, start, end)
    for centre, radius in zip(centres, radii):
        _mark_disc(occupied, origin, resolution_m, centre, radius)
    values = np.where(occupied, OCCUPIED, FREE).astype(np.int8)
    return OccupancyMap(float(resolution_m), width, height, float(origin[0]), float(origin[1]), 0.0, frame_id,
                        values)


def static_clearance(positions, robot_radius_m, occupancy):
    """Signed clearance [m] of a robot disc at each position (N, 2) to the occupied cells: the
    signed distance of its centre to occupied space minus its radius (negative in contact);
    inf on a map with nothing occupied."""
    if isinstance(robot_radius_m, bool) or not isinstance(robot_radius_m, (int, float, np.floating, np.integer)) \
            or not np.isfinite(robot_radius_m) or robot_radius_m < 0.0:
        raise ValueError(f"robot_radius_m={robot_radius_m!r}: must be a finite number >= 0")
    return occupancy.signed_distance(as_points(positions, "positions")) - float(robot_radius_m)


def outside_bounds(positions, bounds):
    """(N,) bool: the robot's centre lies outside the bounds (x_min, x_max, y_min, y_max)."""
    x_min, x_max, y_min, y_max = _checked_bounds(bounds)
    p = as_points(positions, "positions")
    return (p[:, 0] < x_min) | (p[:, 0] > x_max) | (p[:, 1] < y_min) | (p[:, 1] > y_max)


def static_contacts(times_s, positions, robot_radius_m, occupancy, bounds):
    """Count a trajectory's static contacts and its time outside the bounds (StaticContacts).

    times_s (N,) increasing [s]; positions (N, 2) of the robot's centre in the map's frame."""
    times = np.asarray(times_s, dtype=float).reshape(-1)
    positions = as_points(positions, "positions")
    if len(times) != len(positions):
        raise ValueError(f"times_s has {len(times)} entries for {len(positions)} positions")
    if not np.all(np.isfinite(times)) or np.any(np.diff(times) < 0.0):
        raise ValueError("times_s must be finite and non-decreasing")
    clearance = static_clearance(positions, robot_radius_m, occupancy)
    outside = outside_bounds(positions, bounds)
    held = np.diff(times)
    return StaticContacts(
        samples=len(times), contact_samples=int(np.count_nonzero(clearance < 0.0)),
        min_clearance_m=float(np.min(clearance)) if len(clearance) else float("inf"),
        outside_bounds_samples=int(np.count_nonzero(outside)),
        time_outside_bounds_s=float(np.sum(held[outside[:-1]])) if len(times) > 1 else 0.0)


def _checked_bounds(bounds):
    values = np.asarray(bounds, dtype=float).reshape(-1)
    if len(values) != 4 or not np.all(np.isfinite(values)) or values[1] <= values[0] or values[3] <= values[2]:
        raise ValueError(f"bounds={bounds!r}: must be finite (x_min, x_max, y_min, y_max) with x_min < x_max "
                         "and y_min < y_max")
    return tuple(float(v) for v in values)


def _cell_window(occupied, origin, resolution_m, low, high):
    """Column and row index ranges of the cells that may touch the box [low, high] (2,), clipped."""
    first = np.floor((np.asarray(low) - origin) / resolution_m).astype(int) - 1
    last = np.floor((np.asarray(high) - origin) / resolution_m).astype(int) + 1
    height, width = occupied.shape
    columns = np.arange(max(first[0], 0), min(last[0], width - 1) + 1)
    rows = np.arange(max(first[1], 0), min(last[1], height - 1) + 1)
    return columns, rows


def _mark_segment(occupied, origin, resolution_m, start, end):
    """Occupy every cell whose closed square meets the segment: the boxes overlap and the segment's
    line does not leave all four corners strictly on one side (separating axes for a segment and a
    square, common practice, no source)."""
    columns, rows = _cell_window(occupied, origin, resolution_m, np.minimum(start, end), np.maximum(start, end))
    if len(columns) == 0 or len(rows) == 0:
        return
    low_x = origin[0] + columns[None, :] * resolution_m - _TOUCH_TOLERANCE_M
    low_y = origin[1] + rows[:, None] * resolution_m - _TOUCH_TOLERANCE_M
    size = resolution_m + 2.0 * _TOUCH_TOLERANCE_M
    overlap = ((low_x <= max(start[0], end[0])) & (low_x + size >= min(start[0], end[0]))
               & (low_y <= max(start[1], end[1])) & (low_y + size >= min(start[1], end[1])))
    direction = end - start
    sides = [direction[0] * (low_y + dy - start[1]) - direction[1] * (low_x + dx - start[0])
             for dx in (0.0, size) for dy in (0.0, size)]
    straddles = (np.minimum.reduce(sides) <= 0.0) & (np.maximum.reduce(sides) >= 0.0)
    occupied[np.ix_(rows, columns)] |= overlap & straddles


def _mark_disc(occupied, origin, resolution_m, centre, radius):
    """Occupy every cell whose closed square meets the disc."""
    columns, rows = _cell_window(occupied, origin, resolution_m, centre - radius, centre + radius)
    if len(columns) == 0 or len(rows) == 0:
        return
    half = 0.5 * resolution_m
    cell_centres = np.stack(np.meshgrid(origin[0] + (columns + 0.5) * resolution_m,
                                        origin[1] + (rows + 0.5) * resolution_m), axis=-1)
    gaps, _ = square_gaps(np.asarray(centre, dtype=float), cell_centres, half + _TOUCH_TOLERANCE_M)
    occupied[np.ix_(rows, columns)] |= gaps <= radius
