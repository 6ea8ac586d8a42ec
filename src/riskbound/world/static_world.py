"""The static world as the planner sees it: per-step half-planes around a plan, and how far they hold.

The planner's sequential QP (riskbound.planning.sequential_qp) asks, at every iteration, for K
half-planes around each planned position (riskbound.world.corridor.free_space_halfplanes). The
planes keep the robot disc off every occupied cell for positions within
search_radius_m − robot_radius_m of the points they were built around (the corridor guarantee), so
a plan that moved further than `valid_move_m` from those points is not trusted until the planes
are rebuilt around it.
"""

from riskbound.world.corridor import free_space_halfplanes

# Occupied cells within this distance of a planned position get planes [m]: a second of travel at
# the planner's default speed limit plus the robot, enough for one iteration's move (our choice).
DEFAULT_SEARCH_RADIUS_M = 2.0


class StaticWorld:
    """An OccupancyMap in the planning frame, with the planner's query."""

    def __init__(self, occupancy, search_radius_m=DEFAULT_SEARCH_RADIUS_M):
        self.occupancy = occupancy
        self.search_radius_m = float(search_radius_m)

    def halfplanes(self, points, count, robot_radius_m):
        """(normals (N, K, 2), offsets (N, K)) keeping the robot disc at each point (N, 2) off occupied cells."""
        planes = free_space_halfplanes(points, self.occupancy, robot_radius_m, count, self.search_radius_m)
        return planes.normals, planes.offsets

    def valid_move_m(self, robot_radius_m):
        """How far a position may be from the point its planes were built around [m]."""
        return self.search_radius_m - robot_radius_m

    def describe(self):
        o = self.occupancy
        return (f"{o.width}×{o.height} cells of {o.resolution_m:g} m in '{o.frame_id}'")
