"""Free space around a plan as half-planes: for each plan point, up to K constraints nᵀp ≥ b that
keep the robot's disc off the occupied cells near it (a corridor of free space, one convex piece
per step), and the back-off that turns them into chance constraints.

Construction, per point (all points at once, vectorised over points and cells):

1. Reference point. A free point is its own reference. A point inside occupied space is first
   moved out the shortest way (to the nearest non-occupied cell or past the grid's edge): its
   reference is that exit point, so the first plane pushes it out across the nearest face.
2. Candidates: the occupied surface cells (OccupancyMap.occupied_surface) whose squares come
   within `search_radius_m` of the reference.
3. Greedy, up to K times: take the nearest candidate not yet excluded, with q its square's point
   nearest to the reference r and n = (r − q)/‖r − q‖ (the face normal when r lies on the square).
   The plane nᵀp ≥ nᵀq + ρ is tangent to the square grown by the robot radius ρ (the Minkowski sum
   of square and disc): cells are handled as exact squares, whose support in direction n is
   nᵀc + (s/2)(|n_x| + |n_y|) for a cell of side s centred at c. Every candidate whose grown
   square lies wholly on the far side (support + ρ ≤ b) is excluded; repeat.
4. Unused slots hold an inactive plane: normal (1, 0), offset −1e6 (true anywhere within 1000 km).

At the reference, a plane's slack nᵀr − b equals the disc's clearance to the cell it came from
(never negative for a point with clearance ≥ ρ; for a point inside occupied space the first plane
is violated by the depth plus ρ, which is the shortest push out).

Guarantee (for `uncovered` = 0): every position x within search_radius_m − robot_radius_m of the
reference that satisfies all planes has its disc clear of all occupied space, interior cells
included. Outside occupied space, the point of it nearest x lies on a surface cell in range, and
x lies inside that cell's grown square, which some plane excludes. Inside occupied space, the
segment from the reference to x first meets it at a point y of a surface cell in range; the plane
excluding that cell has nᵀy ≤ b − ρ and, as every square it excludes, support at most nᵀq ≤ nᵀr,
so nᵀ(x − r) ≤ 0 and nᵀx ≤ nᵀy < b. A planner that keeps each step's move within that radius (a
trust region) keeps the guarantee; `uncovered` > 0 says K planes were not enough. With the
planes, the disc can touch occupied space only if some active plane is violated, so per-plane
risks that add up (Boole's inequality) bound the static collision risk of a step.

Chance constraint: for p ~ N(p̂, Σ), nᵀp ~ N(nᵀp̂, nᵀΣn) (a linear form of a Gaussian vector is
Gaussian; common practice, no source), so P(nᵀp < b) = Φ((b − nᵀp̂)/√(nᵀΣn)) exactly, and
P(nᵀp < b) ≤ a holds iff nᵀp̂ ≥ b + Φ⁻¹(1 − a)·√(nᵀΣn): `halfplane_backoff` is that last term.
"""

import itertools
from dataclasses import dataclass

import numpy as np

from riskbound.risk.quantile import chance_constraint_backoff
from riskbound.world.occupancy import OccupancyMap, as_points

INACTIVE_NORMAL = (1.0, 0.0)
INACTIVE_OFFSET = -1e6
# At most this many planes per point: beyond, the QP grows without a better corridor.
MAX_PLANES_PER_STEP = 32
# A cell whose grown square reaches past a plane by no more than this still counts as excluded:
# cells along one straight wall share the face, and rounding must not split them [m].
_EXCLUSION_TOLERANCE_M = 1e-9


@dataclass(frozen=True)
class FreeSpaceHalfPlanes:
    """Half-planes nᵀp ≥ b per point, in the map frame.

    normals (N, K, 2) unit vectors; offsets (N, K) [m]; active (N, K) False where a slot holds the
    inactive plane; references (N, 2) the point each point's planes were built around (the point,
    or its exit from occupied space); inside (N,) the point lay in occupied space; uncovered (N,)
    candidate cells the K planes did not exclude (0: the guarantee of the module docstring holds).
    """

    normals: np.ndarray
    offsets: np.ndarray
    active: np.ndarray
    references: np.ndarray
    inside: np.ndarray
    uncovered: np.ndarray

    def slack(self, points):
        """nᵀp − b for points (N, 2) against their own planes (N, K); +inf in inactive slots."""
        p = np.asarray(points, dtype=float).reshape(-1, 1, 2)
        values = np.sum(self.normals * p, axis=2) - self.offsets
        return np.where(self.active, values, np.inf)


def free_space_halfplanes(points, occupancy, robot_radius_m, max_planes_per_step, search_radius_m):
    """Half-planes that keep a disc of radius robot_radius_m at each point (N, 2) (map frame) off the
    occupied cells of `occupancy` (an OccupancyMap) within search_radius_m. See the module docstring.

    Returns FreeSpaceHalfPlanes. Raises ValueError naming a bad argument.
    """
    if not isinstance(occupancy, OccupancyMap):
        raise ValueError(f"occupancy is a {type(occupancy).__name__}: must be an OccupancyMap")
    points = as_points(points)
    radius = _finite(robot_radius_m, "robot_radius_m", low=0.0)
    search = _finite(search_radius_m, "search_radius_m", low=0.0)
    if search <= radius:
        raise ValueError(f"search_radius_m={search_radius_m!r}: must exceed robot_radius_m={robot_radius_m!r}, "
                         "or no position would be covered")
    count = max_planes_per_step
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or not 1 <= count <= MAX_PLANES_PER_STEP:
        raise ValueError(f"max_planes_per_step={count!r}: must be a whole number in [1, {MAX_PLANES_PER_STEP}]")

    grid_points = occupancy.to_grid(points)
    inside = occupancy.occupied_at_grid(grid_points)
    references = grid_points.copy()
    if np.any(inside):
        references[inside] = _exit_references(occupancy, grid_points[inside])
    normals, offsets, active, uncovered = _greedy_planes(occupancy, references, radius, search, int(count))

    # Grid frame → map frame: n_map = R n, and nᵀRᵀ(p − o) ≥ b becomes n_mapᵀp ≥ b + n_mapᵀo.
    normals = normals @ occupancy.rotation.T
    offsets = offsets + normals @ occupancy.origin
    normals[~active] = INACTIVE_NORMAL
    offsets[~active] = INACTIVE_OFFSET
    return FreeSpaceHalfPlanes(normals, offsets, active, occupancy.to_map(references), inside, uncovered)


def halfplane_backoff(normals, covariances, risk):
    """Φ⁻¹(1 − risk)·√(nᵀΣn): how far nᵀp̂ must clear b so that P(nᵀp < b) ≤ risk for p ~ N(p̂, Σ).

    normals (..., 2); covariances (..., 2, 2) broadcasting against them (one Σ per step serves all
    of that step's planes as (N, 1, 2, 2)); risk in (0, 0.5), scalar or broadcasting to (...).
    Exact for a Gaussian position (module docstring). Returns (...) [m].
    """
    n = np.asarray(normals, dtype=float)
    sigma = np.asarray(covariances, dtype=float)
    if n.shape[-1:] != (2,) or sigma.shape[-2:] != (2, 2):
        raise ValueError(f"normals {n.shape} and covariances {sigma.shape}: must be (..., 2) and (..., 2, 2)")
    if not (np.all(np.isfinite(n)) and np.all(np.isfinite(sigma))):
        raise ValueError("normals and covariances must be finite")
    variance = np.einsum("...i,...ij,...j->...", n, sigma, n)
    if np.any(variance < -1e-12):
        raise ValueError(f"covariances: nᵀΣn = {float(np.min(variance))!r} < 0, not positive semi-definite")
    return chance_constraint_backoff(risk) * np.sqrt(np.maximum(variance, 0.0))


def _exit_references(occupancy, grid_points):
    """Just past the shortest way out of occupied space, for grid-frame points inside it."""
    exits, depths = occupancy.exit_points_grid(grid_points)
    resolution = occupancy.resolution_m
    # On a face the depth is zero: step away from the centre of the cell the point is in.
    cell_centres = (np.floor(grid_points / resolution) + 0.5) * resolution
    direction = np.where((depths > 0.0)[:, None], exits - grid_points, exits - cell_centres)
    direction /= np.linalg.norm(direction, axis=1, keepdims=True)
    return exits + 1e-3 * resolution * direction


def _greedy_planes(occupancy, references, radius, search, count):
    """Greedy planes in the grid frame: (normals (N, K, 2), offsets (N, K), active (N, K), uncovered (N,))."""
    n_points = len(references)
    normals = np.zeros((n_points, count, 2))
    offsets = np.zeros((n_points, count))
    active = np.zeros((n_points, count), dtype=bool)
    cells = occupancy.occupied_surface
    if len(cells) == 0 or n_points == 0:
        return normals, offsets, active, np.zeros(n_points, dtype=int)
    half = 0.5 * occupancy.resolution_m
    index = _candidates(cells, references, search + half * np.sqrt(2.0))
    valid = index >= 0
    safe = np.where(valid, index, 0)
    centre_x, centre_y = cells.centres[:, 0][safe], cells.centres[:, 1][safe]   # (N, M)
    excess_x = np.maximum(np.abs(references[:, :1] - centre_x) - half, 0.0)
    excess_y = np.maximum(np.abs(references[:, 1:] - centre_y) - half, 0.0)
    gaps = np.sqrt(excess_x * excess_x + excess_y * excess_y)           # reference to each square
    alive = valid & (gaps <= search)
    rows = np.arange(n_points)
    for k in range(count):
        j = np.argmin(np.where(alive, gaps, np.inf), axis=1)
        has = alive[rows, j]
        if not np.any(has):
            break
        centre = np.column_stack([centre_x[rows, j], centre_y[rows, j]])
        q = np.clip(references, centre - half, centre + half)   # the square's point nearest the reference
        gap = gaps[rows, j]
        n = (references - q) / np.where(gap > 0.0, gap, 1.0)[:, None]
        on_face = gap <= 0.0
        if np.any(on_face):
            n[on_face] = _face_normals(references[on_face] - centre[on_face])
        touch = np.sum(n * q, axis=1)  # the chosen square's support in direction n
        # Excluded: support of the grown square ≤ b, i.e. nᵀc + (s/2)‖n‖₁ ≤ nᵀq (ρ cancels).
        limit = touch - half * np.abs(n).sum(axis=1) + _EXCLUSION_TOLERANCE_M
        alive &= centre_x * n[:, :1] + centre_y * n[:, 1:] > limit[:, None]
        alive[rows, j] = False
        normals[has, k] = n[has]
        offsets[has, k] = touch[has] + radius
        active[has, k] = True
    return normals, offsets, active, np.count_nonzero(alive, axis=1)


def _candidates(cells, references, reach):
    """Indices (N, M) of cells whose centres lie within `reach` of each reference, −1 padded."""
    found = cells.tree.query_ball_point(references, reach, return_sorted=False)
    lengths = np.fromiter(map(len, found), dtype=np.intp, count=len(found))
    index = np.full((len(references), max(int(lengths.max()), 1)), -1, dtype=np.intp)
    total = int(lengths.sum())
    if total:
        flat = np.fromiter(itertools.chain.from_iterable(found), dtype=np.intp, count=total)
        index[np.arange(index.shape[1]) < lengths[:, None]] = flat
    return index


def _face_normals(offsets_from_centre):
    """Outward normal of the square face a point on it lies on: the dominant axis of its offset."""
    axis = np.argmax(np.abs(offsets_from_centre), axis=1)
    n = np.zeros_like(offsets_from_centre)
    rows = np.arange(len(n))
    n[rows, axis] = np.sign(offsets_from_centre[rows, axis])
    return n


def _finite(value, name, low):
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)) \
            or not np.isfinite(value) or value < low:
        raise ValueError(f"{name}={value!r}: must be a finite number >= {low}")
    return float(value)
