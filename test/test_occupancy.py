"""OccupancyMap: validation, cell geometry per REP-105 / nav_msgs/OccupancyGrid, and distances
checked by brute force over every cell."""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from riskbound.world.occupancy import MAX_CELLS, OccupancyMap, planar_yaw


def grid_map(values, resolution_m=0.1, origin=(0.0, 0.0, 0.0), **options):
    values = np.asarray(values, dtype=np.int8)
    height, width = values.shape
    return OccupancyMap(resolution_m, width, height, origin[0], origin[1], origin[2], "odom", values, **options)


def random_map(seed, shape=(40, 50), fraction=0.08, origin=(0.0, 0.0, 0.0)):
    rng = np.random.default_rng(seed)
    values = np.where(rng.random(shape) < fraction, 100, 0).astype(np.int8)
    values[10:14, 5:30] = 100   # a thick wall, so that some cells are enclosed
    return grid_map(values, origin=origin)


def cell_squares_in_map_frame(occupancy, mask):
    """Corners (M, 4, 2) of the masked cells, rotated with scipy's Rotation (independent of the
    module's own transform): OccupancyGrid's origin is the pose of cell (0, 0)'s corner
    (nav_msgs/MapMetaData documentation; REP-105 for the frame)."""
    rows, columns = np.nonzero(mask)
    r = occupancy.resolution_m
    corners = np.array([[0, 0], [1, 0], [1, 1], [0, 1]], dtype=float)
    local = (np.column_stack([columns, rows])[:, None, :] + corners[None]) * r
    rotation = Rotation.from_euler("z", occupancy.origin_yaw_rad)
    flat = rotation.apply(np.column_stack([local.reshape(-1, 2), np.zeros(len(local) * 4)]))[:, :2]
    return flat.reshape(-1, 4, 2) + [occupancy.origin_x_m, occupancy.origin_y_m]


def brute_distance(points, occupancy):
    """Distance from points to the union of occupied squares, by projecting onto each square in
    its own frame (polygon geometry, common practice, no source)."""
    squares = cell_squares_in_map_frame(occupancy, occupancy.occupied)
    a, b, d = squares[:, 0], squares[:, 1], squares[:, 3]
    u = (b - a) / occupancy.resolution_m
    v = (d - a) / occupancy.resolution_m
    offset = points[:, None, :] - a[None]
    s = np.clip(np.sum(offset * u, axis=2), 0.0, occupancy.resolution_m)
    t = np.clip(np.sum(offset * v, axis=2), 0.0, occupancy.resolution_m)
    nearest = a[None] + s[..., None] * u[None] + t[..., None] * v[None]
    return np.min(np.linalg.norm(points[:, None, :] - nearest, axis=2), axis=1)


@pytest.mark.parametrize("change, message", [
    ({"width": 0}, "grid is empty"),
    ({"resolution_m": 0.0}, "resolution_m=0.0"),
    ({"resolution_m": float("nan")}, "resolution_m=nan"),
    ({"resolution_m": float("inf")}, "resolution_m=inf"),
    ({"origin_x_m": float("nan")}, "origin_x_m=nan"),
    ({"origin_yaw_rad": float("inf")}, "origin_yaw_rad=inf"),
    ({"values": np.zeros(11, dtype=np.int8)}, "values has 11 entries"),
    ({"values": np.full(12, 101)}, "outside -1..100"),
    ({"values": np.full(12, 0.5)}, "whole numbers"),
    ({"width": 4001, "height": 4000}, f"exceed the limit of {MAX_CELLS}"),
    ({"frame_id": ""}, "frame_id"),
    ({"occupied_threshold": 0}, "occupied_threshold=0"),
])
def test_bad_maps_are_rejected_with_the_field_named(change, message):
    fields = dict(resolution_m=0.1, width=4, height=3, origin_x_m=0.0, origin_y_m=0.0, origin_yaw_rad=0.0,
                  frame_id="map", values=np.zeros(12, dtype=np.int8))
    fields.update(change)
    with pytest.raises(ValueError, match=message):
        OccupancyMap(**fields)


def test_occupied_threshold_and_unknown_cells():
    # OccupancyGrid values are occupancy probabilities in percent, -1 unknown (nav_msgs documentation).
    values = [[0, 49, 50, 100, -1]]
    assert grid_map(values).occupied.tolist() == [[False, False, True, True, True]]
    assert grid_map(values, unknown_is_occupied=False).occupied.tolist() == [[False, False, True, True, False]]
    assert grid_map(values, occupied_threshold=65).occupied.tolist() == [[False, False, False, True, True]]


def test_flat_values_are_row_major():
    # nav_msgs/OccupancyGrid: data in row-major order, starting with (0, 0); the row is the y index.
    occupancy = OccupancyMap(1.0, 3, 2, 0.0, 0.0, 0.0, "map", [0, 0, 100, 0, 0, 0])
    np.testing.assert_allclose(occupancy.occupied_centres, [[2.5, 0.5]])


def test_cell_centres_follow_the_origin_pose():
    values = np.zeros((4, 6), dtype=np.int8)
    values[1, 4] = values[3, 0] = 100
    occupancy = grid_map(values, resolution_m=0.5, origin=(2.0, -1.0, 0.7))
    corners = cell_squares_in_map_frame(occupancy, occupancy.occupied)
    np.testing.assert_allclose(np.sort(occupancy.occupied_centres, axis=0), np.sort(corners.mean(axis=1), axis=0),
                               atol=1e-12)
    assert occupancy.occupied_at(corners.mean(axis=1)).all()
    assert not occupancy.occupied_at([[2.0 + 0.01, -1.0 - 0.01], [100.0, 100.0]]).any()


@pytest.mark.parametrize("origin", [(0.0, 0.0, 0.0), (-3.0, 1.5, 0.4), (1.0, -2.0, -2.5)])
def test_nearest_occupied_matches_brute_force(origin):
    occupancy = random_map(3, origin=origin)
    rng = np.random.default_rng(4)
    grid_points = rng.uniform([-1.0, -1.0], [6.0, 5.0], (300, 2))
    points = occupancy.to_map(grid_points)
    distances, centres = occupancy.nearest_occupied(points)
    np.testing.assert_allclose(distances, brute_distance(points, occupancy), atol=1e-9)
    # The returned cell is one at that distance.
    assert occupancy.occupied_at(centres).all()


def test_signed_distance_inside_is_minus_the_depth_to_free_space():
    values = np.zeros((30, 30), dtype=np.int8)
    values[5:25, 10:20] = 100   # a 1.0 m x 2.0 m block, x from 1.0 to 2.0 m, y from 0.5 to 2.5 m
    occupancy = grid_map(values)
    points = np.array([[1.3, 1.5], [1.9, 1.0], [1.5, 0.6], [0.5, 1.5], [2.3, 2.9]])
    expected = [-0.3, -0.1, -0.1, 0.5, np.hypot(0.3, 0.4)]  # plane geometry, no source
    np.testing.assert_allclose(occupancy.signed_distance(points), expected, atol=1e-9)


def test_signed_distance_counts_the_grid_edge_as_free():
    values = np.full((10, 10), 100, dtype=np.int8)
    values[:, 8:] = 0
    occupancy = grid_map(values)   # occupied for x < 0.8 m, free beyond; the grid starts at x = 0
    np.testing.assert_allclose(occupancy.signed_distance([[0.1, 0.5], [0.6, 0.5], [0.9, 0.5]]),
                               [-0.1, -0.2, 0.1], atol=1e-9)


def test_empty_map_reports_no_obstacle():
    occupancy = grid_map(np.zeros((5, 5)))
    distances, centres = occupancy.nearest_occupied([[0.2, 0.2]])
    assert distances[0] == np.inf and np.isnan(centres).all()
    assert occupancy.signed_distance([[0.2, 0.2]])[0] == np.inf


def test_non_finite_points_are_rejected():
    with pytest.raises(ValueError, match="rows are not finite"):
        random_map(0).nearest_occupied([[0.0, np.nan]])


def test_planar_yaw_rejects_tilted_and_invalid_quaternions():
    # Quaternion of a rotation about z by 0.3 rad: (0, 0, sin 0.15, cos 0.15), common practice, no source.
    assert planar_yaw([0.0, 0.0, np.sin(0.15), np.cos(0.15)]) == pytest.approx(0.3)
    with pytest.raises(ValueError, match="out of the x-y plane"):
        planar_yaw(Rotation.from_euler("x", 0.2).as_quat())   # scipy's quaternions are (x, y, z, w)
    with pytest.raises(ValueError, match="not a valid quaternion"):
        planar_yaw([0.0, 0.0, 0.0, 0.0])
