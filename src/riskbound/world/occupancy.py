"""An occupancy grid in plain numpy: the static world (walls, shelves, pillars) as square cells.

Layout follows nav_msgs/OccupancyGrid and REP-105. The grid has `width` columns (grid x) and
`height` rows (grid y) of square cells `resolution_m` wide. The origin pose (x, y, yaw) is the pose
of the outer corner of cell (0, 0) in the map frame `frame_id`; the grid's x axis points along yaw.
Values are occupancy probabilities in percent, 0..100, or −1 for unknown, stored row-major
(index = column + row · width) as in the message.

A cell is occupied when its value is at least `occupied_threshold` (default 50: the cell is more
likely occupied than free). Unknown cells count as occupied by default: a robot among people
should not drive into space its map cannot vouch for (glass doors, drops, furniture nobody
mapped), and a local planner sees unknown space only at the edges of a map where the mapper never
looked. A map whose free area is speckled with unobserved cells can set `unknown_is_occupied`
False. Beyond the grid's extent the map says nothing: no cells there, so no constraints and no
contacts; a caller that must stay on the map checks `inside_extent`.

Geometry is exact for square cells: the distance from a point to a cell is the distance to the
cell's square, not to its centre. Only the surface cells of the occupied space (occupied cells
with a non-occupied neighbour or on the grid edge) are needed to measure distances from outside
it, so the KD-tree holds those alone; a second tree over the free surface gives the depth of a
point inside occupied space.
"""

from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy.spatial import cKDTree

from riskbound.motion.heading import quaternion_xyzw_to_yaw

# 4000 × 4000 cells (a 200 m × 200 m floor at 0.05 m) is 16 MB of int8 and, at worst, a few
# million surface cells whose KD-trees build in seconds. A local planner needs its surroundings,
# not a campus: a larger grid is a global map to crop before it reaches the planner.
MAX_CELLS = 4000 * 4000
UNKNOWN = -1
DEFAULT_OCCUPIED_THRESHOLD = 50
# A quaternion whose x or y part exceeds this fraction of its norm tilts the map plane (> ~1°).
_TILT_TOLERANCE = 0.01
# Nearest-cell queries ask the KD-tree for this many centres first and widen only when needed.
_NEAREST_CANDIDATES = 16


def planar_yaw(quaternion_xyzw, name="origin.orientation"):
    """Yaw [rad] of a rotation about z given as an (x, y, z, w) quaternion; ValueError when it is
    not finite, zero, or tilts the plane (a grid origin must lie in the x-y plane)."""
    q = np.asarray(quaternion_xyzw, dtype=float).reshape(4)
    yaw = float(quaternion_xyzw_to_yaw(q[None, :])[0])
    if not np.isfinite(yaw):
        raise ValueError(f"{name}={q.tolist()!r}: not a valid quaternion (non-finite or zero)")
    if np.hypot(q[0], q[1]) > _TILT_TOLERANCE * np.linalg.norm(q):
        raise ValueError(f"{name}={q.tolist()!r}: rotates out of the x-y plane; a grid origin may only "
                         "rotate about z")
    return yaw


@dataclass(frozen=True)
class CellSet:
    """Some cells of a grid: centres in the grid frame (M, 2) [m] and a KD-tree over them (None if M = 0)."""

    centres: np.ndarray
    tree: object

    @classmethod
    def from_mask(cls, mask, resolution_m):
        rows, columns = np.nonzero(mask)
        centres = (np.column_stack([columns, rows]).astype(float) + 0.5) * resolution_m
        return cls(centres, cKDTree(centres) if len(centres) else None)

    def __len__(self):
        return len(self.centres)


@dataclass(frozen=True, eq=False)
class OccupancyMap:
    """A validated occupancy grid (see the module docstring). `values` may be flat row-major
    (width · height entries, as in the message) or shaped (height, width); it is stored as a
    read-only (height, width) int8 array. Invalid input raises ValueError naming the field."""

    resolution_m: float
    width: int
    height: int
    origin_x_m: float
    origin_y_m: float
    origin_yaw_rad: float
    frame_id: str
    values: np.ndarray
    occupied_threshold: int = DEFAULT_OCCUPIED_THRESHOLD
    unknown_is_occupied: bool = True

    def __post_init__(self):
        resolution = self.resolution_m
        if isinstance(resolution, bool) or not isinstance(resolution, (int, float, np.floating, np.integer)) \
                or not np.isfinite(resolution) or resolution <= 0.0:
            raise ValueError(f"resolution_m={resolution!r}: must be a finite number > 0 [m/cell]")
        object.__setattr__(self, "resolution_m", float(resolution))
        for name in ("width", "height"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
                raise ValueError(f"{name}={value!r}: must be a whole number of cells >= 0")
            object.__setattr__(self, name, int(value))
        if self.width == 0 or self.height == 0:
            raise ValueError(f"width={self.width}, height={self.height}: the grid is empty (no cells)")
        if self.width * self.height > MAX_CELLS:
            raise ValueError(f"width={self.width}, height={self.height}: {self.width * self.height} cells exceed "
                             f"the limit of {MAX_CELLS} (4000 x 4000); crop the map around the robot")
        for name in ("origin_x_m", "origin_y_m", "origin_yaw_rad"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)) \
                    or not np.isfinite(value):
                raise ValueError(f"{name}={value!r}: must be a finite number")
            object.__setattr__(self, name, float(value))
        if not isinstance(self.frame_id, str) or not self.frame_id:
            raise ValueError(f"frame_id={self.frame_id!r}: must name the map's frame")
        threshold = self.occupied_threshold
        if isinstance(threshold, bool) or not isinstance(threshold, (int, np.integer)) or not 1 <= threshold <= 100:
            raise ValueError(f"occupied_threshold={threshold!r}: must be a whole percentage in [1, 100]")
        object.__setattr__(self, "occupied_threshold", int(threshold))
        object.__setattr__(self, "unknown_is_occupied", bool(self.unknown_is_occupied))
        object.__setattr__(self, "values", self._checked_values(self.values))

    def _checked_values(self, values):
        array = np.asarray(values)
        expected = self.width * self.height
        if array.size != expected:
            raise ValueError(f"values has {array.size} entries: width {self.width} x height {self.height} "
                             f"needs {expected}")
        if array.ndim != 1 and array.shape != (self.height, self.width):
            raise ValueError(f"values has shape {array.shape}: must be flat or (height, width) = "
                             f"({self.height}, {self.width})")
        if not np.issubdtype(array.dtype, np.integer):
            raise ValueError(f"values has dtype {array.dtype}: must hold whole numbers -1..100")
        bad = (array < UNKNOWN) | (array > 100)
        if np.any(bad):
            raise ValueError(f"values: {int(np.count_nonzero(bad))} cells outside -1..100 "
                             f"(first: {int(array.reshape(-1)[np.argmax(bad.reshape(-1))])})")
        grid = array.astype(np.int8).reshape(self.height, self.width)
        grid.flags.writeable = False
        return grid

    # --- frames ----------------------------------------------------------------------------------

    @property
    def rotation(self):
        """Grid frame → map frame rotation matrix (2, 2)."""
        c, s = np.cos(self.origin_yaw_rad), np.sin(self.origin_yaw_rad)
        return np.array([[c, -s], [s, c]])

    @property
    def origin(self):
        return np.array([self.origin_x_m, self.origin_y_m])

    @property
    def extent_m(self):
        """(width, height) of the grid [m]."""
        return self.width * self.resolution_m, self.height * self.resolution_m

    def to_grid(self, points):
        """Map-frame points (..., 2) → grid frame (origin at the corner of cell (0, 0), axes along the grid)."""
        return (np.asarray(points, dtype=float) - self.origin) @ self.rotation

    def to_map(self, points):
        """Grid-frame points (..., 2) → map frame."""
        return np.asarray(points, dtype=float) @ self.rotation.T + self.origin

    def inside_extent(self, points):
        """(N,) bool: the map-frame point lies on the grid."""
        g = self.to_grid(np.asarray(points, dtype=float).reshape(-1, 2))
        width_m, height_m = self.extent_m
        return (g[:, 0] >= 0.0) & (g[:, 0] < width_m) & (g[:, 1] >= 0.0) & (g[:, 1] < height_m)

    # --- cells ------------------------------------------------------------------------------------

    @cached_property
    def occupied(self):
        """(height, width) bool: occupied cells."""
        mask = self.values >= self.occupied_threshold
        if self.unknown_is_occupied:
            mask |= self.values == UNKNOWN
        mask.flags.writeable = False
        return mask

    @cached_property
    def occupied_centres(self):
        """Centres of all occupied cells in the map frame (M, 2) [m]."""
        return self.to_map(CellSet.from_mask(self.occupied, self.resolution_m).centres)

    @cached_property
    def occupied_surface(self):
        """Occupied cells with a non-occupied 4-neighbour or on the grid edge (CellSet, grid frame).

        The nearest point of occupied space to a point outside it lies on its boundary, which only
        these cells touch: distances from outside need no other cell."""
        occupied = self.occupied
        padded = np.pad(occupied, 1, constant_values=False)
        enclosed = padded[:-2, 1:-1] & padded[2:, 1:-1] & padded[1:-1, :-2] & padded[1:-1, 2:]
        return CellSet.from_mask(occupied & ~enclosed, self.resolution_m)

    @cached_property
    def free_surface(self):
        """Non-occupied cells with an occupied 4-neighbour (CellSet, grid frame): the way out of occupied space."""
        occupied = self.occupied
        padded = np.pad(occupied, 1, constant_values=False)
        touching = padded[:-2, 1:-1] | padded[2:, 1:-1] | padded[1:-1, :-2] | padded[1:-1, 2:]
        return CellSet.from_mask(~occupied & touching, self.resolution_m)

    def occupied_at_grid(self, grid_points):
        """(N,) bool: the grid-frame point lies in an occupied cell (off the grid: False)."""
        cells = np.floor(np.asarray(grid_points, dtype=float) / self.resolution_m)
        columns, rows = cells[:, 0], cells[:, 1]
        on_grid = (columns >= 0) & (columns < self.width) & (rows >= 0) & (rows < self.height)
        result = np.zeros(len(cells), dtype=bool)
        result[on_grid] = self.occupied[rows[on_grid].astype(int), columns[on_grid].astype(int)]
        return result

    def occupied_at(self, points):
        """(N,) bool: the map-frame point lies in an occupied cell."""
        return self.occupied_at_grid(self.to_grid(np.asarray(points, dtype=float).reshape(-1, 2)))

    # --- distances --------------------------------------------------------------------------------

    def nearest_occupied(self, points):
        """Nearest occupied cell to each map-frame point (N, 2).

        Returns (distances (N,) [m] from the point to the cell's square, 0 inside occupied space,
        inf when the map has no occupied cell; centres (N, 2) of those cells in the map frame, NaN
        when there is none)."""
        g = self.to_grid(as_points(points))
        distances = np.full(len(g), np.inf)
        centres = np.full((len(g), 2), np.nan)
        surface = self.occupied_surface
        if len(surface):
            distances, index = nearest_squares(surface, g, self.resolution_m)
            centres = surface.centres[index]
            inside = self.occupied_at_grid(g)
            distances[inside] = 0.0
            centres[inside] = (np.floor(g[inside] / self.resolution_m) + 0.5) * self.resolution_m
            centres = self.to_map(centres)
        return distances, centres

    def signed_distance(self, points):
        """Signed distance [m] from each map-frame point (N, 2) to occupied space: the distance to
        the nearest occupied square outside it, minus the depth to the nearest free space (a
        non-occupied cell or the grid's edge) inside it; inf when nothing is occupied."""
        g = self.to_grid(as_points(points))
        result, _ = self.nearest_occupied(points)
        inside = self.occupied_at_grid(g)
        if np.any(inside):
            result[inside] = -self.exit_points_grid(g[inside])[1]
        return result

    def exit_points_grid(self, grid_points):
        """Shortest way out of occupied space for grid-frame points inside it.

        Returns (exit points (N, 2) on the boundary of free space, grid frame; depths (N,) [m]).
        Free space is every non-occupied cell and everything beyond the grid's edge."""
        g = np.asarray(grid_points, dtype=float).reshape(-1, 2)
        width_m, height_m = self.extent_m
        edge_gaps = np.column_stack([g[:, 0], width_m - g[:, 0], g[:, 1], height_m - g[:, 1]])
        side = np.argmin(edge_gaps, axis=1)
        depths = edge_gaps[np.arange(len(g)), side]
        exits = g.copy()
        exits[side == 0, 0] = 0.0
        exits[side == 1, 0] = width_m
        exits[side == 2, 1] = 0.0
        exits[side == 3, 1] = height_m
        surface = self.free_surface
        if len(surface) and len(g):
            free_depths, index = nearest_squares(surface, g, self.resolution_m)
            closer = free_depths < depths
            half = 0.5 * self.resolution_m
            centres = surface.centres[index[closer]]
            exits[closer] = np.clip(g[closer], centres - half, centres + half)
            depths[closer] = free_depths[closer]
        return exits, depths


def square_gaps(points, centres, half_side):
    """Distance from points (..., 2) to axis-aligned squares (..., 2) of half side `half_side`,
    with the nearest points of the squares; broadcasts. Returns (distances (...), nearest (..., 2))."""
    nearest = np.clip(points, centres - half_side, centres + half_side)
    return np.linalg.norm(points - nearest, axis=-1), nearest


def nearest_squares(cells, grid_points, resolution_m):
    """Exact nearest cell square of a CellSet (non-empty) to each grid-frame point.

    The KD-tree orders cells by centre; the nearest square's centre is at most half a cell
    diagonal further than the nearest square itself, so the candidates are widened until every
    centre within that band has been seen. Returns (distances (N,) [m], cell indices (N,))."""
    half = 0.5 * resolution_m
    band = half * np.sqrt(2.0)
    k = min(_NEAREST_CANDIDATES, len(cells))
    centre_distances, index = cells.tree.query(grid_points, k=k)
    centre_distances = centre_distances.reshape(len(grid_points), k)
    index = index.reshape(len(grid_points), k)
    gaps, _ = square_gaps(grid_points[:, None, :], cells.centres[index], half)
    best = np.argmin(gaps, axis=1)
    rows = np.arange(len(grid_points))
    distances, chosen = gaps[rows, best], index[rows, best]
    incomplete = np.flatnonzero((centre_distances[:, -1] <= distances + band) & (k < len(cells)))
    for row in incomplete:
        candidates = np.asarray(cells.tree.query_ball_point(grid_points[row], distances[row] + band + 1e-12),
                                dtype=int)
        row_gaps, _ = square_gaps(grid_points[row], cells.centres[candidates], half)
        pick = int(np.argmin(row_gaps))
        distances[row], chosen[row] = row_gaps[pick], candidates[pick]
    return distances, chosen


def as_points(points, name="points"):
    """Points as a float (N, 2) array; a single point (2,) becomes (1, 2). ValueError when the shape
    is wrong or a coordinate is not finite."""
    p = np.asarray(points, dtype=float)
    if p.shape == (2,):
        p = p[None, :]
    if p.ndim != 2 or p.shape[1] != 2:
        raise ValueError(f"{name} has shape {np.shape(points)}: must be (N, 2) [m]")
    finite = np.isfinite(p).all(axis=1)
    if not np.all(finite):
        raise ValueError(f"{name}: {int(np.count_nonzero(~finite))} of {len(p)} rows are not finite "
                         f"(first: row {int(np.argmin(finite))})")
    return p
