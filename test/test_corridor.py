"""Free-space half-planes: separation checked by brute force over every cell, the point's own
side, walls, points inside walls, empty maps, and the Gaussian half-plane chance constraint."""

import numpy as np
import pytest
from scipy import stats

from riskbound.world.corridor import INACTIVE_OFFSET, free_space_halfplanes, halfplane_backoff
from test_occupancy import brute_distance, cell_squares_in_map_frame, grid_map

RADIUS_M = 0.3
SEARCH_M = 1.5


def pillars_and_walls(origin=(0.0, 0.0, 0.0)):
    """A 6 m x 5 m room at 0.05 m: outer walls two cells thick, a round pillar, a thick block and a
    thin diagonal wall."""
    resolution = 0.05
    rows, columns = np.mgrid[0:100, 0:120]
    x, y = (columns + 0.5) * resolution, (rows + 0.5) * resolution
    values = np.zeros(x.shape, dtype=np.int8)
    values[:2, :] = values[-2:, :] = values[:, :2] = values[:, -2:] = 100
    values[np.hypot(x - 2.0, y - 2.5) <= 0.5] = 100
    values[(x > 3.5) & (x < 4.5) & (y > 0.8) & (y < 2.0)] = 100
    values[(np.abs((x - 4.0) - (y - 3.0)) < 0.05) & (x > 3.8) & (x < 5.2)] = 100
    return grid_map(values, resolution_m=resolution, origin=origin)


def excluded_by_some_plane(halfplanes, row, corners):
    """(M,) bool: each cell (corners (M, 4, 2)) lies, grown by the radius, on the far side of one
    active plane. The support of a square is its largest corner projection (convex geometry,
    common practice, no source)."""
    normals = halfplanes.normals[row][halfplanes.active[row]]
    offsets = halfplanes.offsets[row][halfplanes.active[row]]
    support = np.max(np.einsum("mcj,kj->mkc", corners, normals), axis=2) + RADIUS_M
    return np.any(support <= offsets[None, :] + 1e-9, axis=1)


@pytest.mark.parametrize("origin", [(0.0, 0.0, 0.0), (10.0, -4.0, 0.6)])
def test_every_occupied_cell_in_range_is_excluded(origin):
    occupancy = pillars_and_walls(origin)
    rng = np.random.default_rng(11)
    points = occupancy.to_map(rng.uniform([0.0, 0.0], [6.0, 5.0], (150, 2)))
    halfplanes = free_space_halfplanes(points, occupancy, RADIUS_M, 16, SEARCH_M)
    corners = cell_squares_in_map_frame(occupancy, occupancy.occupied)
    checked = 0
    for row, reference in enumerate(halfplanes.references):
        assert halfplanes.uncovered[row] == 0
        gaps = _square_gaps(reference, corners)
        near = gaps <= SEARCH_M
        assert excluded_by_some_plane(halfplanes, row, corners[near]).all(), row
        checked += int(np.count_nonzero(near))
    assert checked > 10_000


def _square_gaps(point, corners):
    """Distance from a point to each square given by its corners (M, 4, 2), in the square's own axes."""
    a, b, d = corners[:, 0], corners[:, 1], corners[:, 3]
    side = np.linalg.norm(b - a, axis=1)
    u, v = (b - a) / side[:, None], (d - a) / side[:, None]
    offset = point[None] - a
    s = np.clip(np.sum(offset * u, axis=1), 0.0, side)
    t = np.clip(np.sum(offset * v, axis=1), 0.0, side)
    return np.linalg.norm(offset - s[:, None] * u - t[:, None] * v, axis=1)


def test_positions_that_satisfy_the_planes_keep_the_disc_clear():
    # The guarantee of riskbound.world.corridor: within search − radius of the reference, every
    # position that satisfies all planes has its disc off all occupied space, checked on samples.
    occupancy = pillars_and_walls()
    rng = np.random.default_rng(5)
    points = rng.uniform([0.0, 0.0], [6.0, 5.0], (60, 2))
    halfplanes = free_space_halfplanes(points, occupancy, RADIUS_M, 16, SEARCH_M)
    angle = rng.uniform(0.0, 2.0 * np.pi, 400)
    distance = (SEARCH_M - RADIUS_M) * np.sqrt(rng.uniform(0.0, 1.0, 400))
    offsets = np.column_stack([np.cos(angle), np.sin(angle)]) * distance[:, None]
    accepted = 0
    for row, reference in enumerate(halfplanes.references):
        samples = reference + offsets
        slack = samples @ halfplanes.normals[row].T - halfplanes.offsets[row]
        feasible = samples[np.all(slack >= 0.0, axis=1)]
        if len(feasible):
            inside = occupancy.occupied_at(feasible)
            assert not inside.any()
            assert np.all(brute_distance(feasible, occupancy) >= RADIUS_M - 1e-9)
        accepted += len(feasible)
    assert accepted > 2000


def test_a_free_point_keeps_its_own_side_and_the_first_slack_is_its_clearance():
    occupancy = pillars_and_walls()
    rng = np.random.default_rng(2)
    points = rng.uniform([0.0, 0.0], [6.0, 5.0], (600, 2))
    distance = brute_distance(points, occupancy)
    outside = distance > 1e-9   # the brute force leaves rounding noise inside squares
    points, clearance = points[outside], distance[outside] - RADIUS_M
    halfplanes = free_space_halfplanes(points, occupancy, RADIUS_M, 4, SEARCH_M)
    assert not halfplanes.inside.any()
    slack = halfplanes.slack(points)
    # Each plane's slack is the clearance to the cell it came from: never below the point's own
    # clearance, so a point with clearance >= 0 satisfies every plane and one closer than the
    # radius violates none by more than its own overlap.
    assert np.all(slack >= clearance[:, None] - 1e-9)
    has_plane = halfplanes.active[:, 0]
    np.testing.assert_allclose(slack[has_plane, 0], clearance[has_plane], atol=1e-9)
    assert np.count_nonzero(clearance < 0.0) > 20
    # No plane at all only where nothing occupied is within the search radius.
    assert np.all(clearance[~has_plane] + RADIUS_M > SEARCH_M)


def test_corridor_between_two_walls():
    values = np.zeros((40, 80), dtype=np.int8)
    values[10:12, :] = 100    # south wall, y from 0.5 to 0.6 m
    values[30:32, :] = 100    # north wall, y from 1.5 to 1.6 m
    occupancy = grid_map(values, resolution_m=0.05)
    points = np.column_stack([np.linspace(1.0, 3.0, 5), np.full(5, 1.05)])
    halfplanes = free_space_halfplanes(points, occupancy, 0.2, 4, 1.0)
    assert np.all(halfplanes.active[:, :2]) and not halfplanes.active[:, 2:].any()
    assert np.all(halfplanes.uncovered == 0)
    # Faces at y = 0.6 and y = 1.5: 0.6 + 0.2 <= y and -y >= -(1.5 - 0.2) (plane geometry, no source).
    normals = np.sort(halfplanes.normals[:, :2, 1], axis=1)
    np.testing.assert_allclose(normals, [[-1.0, 1.0]] * 5, atol=1e-12)
    np.testing.assert_allclose(halfplanes.normals[:, :2, 0], 0.0, atol=1e-12)
    by_side = np.where(halfplanes.normals[:, :2, 1] > 0, halfplanes.offsets[:, :2], -halfplanes.offsets[:, :2])
    np.testing.assert_allclose(np.sort(by_side, axis=1), [[0.8, 1.3]] * 5, atol=1e-9)


def test_a_point_inside_a_wall_is_pushed_out_the_shortest_way():
    values = np.zeros((40, 40), dtype=np.int8)
    values[:, 20:30] = 100   # wall from x = 1.0 to 1.5 m
    occupancy = grid_map(values, resolution_m=0.05)
    points = np.array([[1.1, 1.0], [1.42, 1.0]])
    halfplanes = free_space_halfplanes(points, occupancy, 0.2, 4, 1.0)
    assert halfplanes.inside.all()
    np.testing.assert_allclose(halfplanes.normals[:, 0], [[-1.0, 0.0], [1.0, 0.0]], atol=1e-9)
    # Out through the nearer face and a radius beyond: x <= 0.8 and x >= 1.7.
    np.testing.assert_allclose(halfplanes.offsets[:, 0], [-0.8, 1.7], atol=1e-5)
    np.testing.assert_allclose(halfplanes.slack(points)[:, 0], [-(0.1 + 0.2), -(0.08 + 0.2)], atol=1e-5)
    # Every plane agrees with the way out: the exit side of the wall satisfies them all.
    exits = np.array([[0.75, 1.0], [1.75, 1.0]])
    assert np.all(halfplanes.slack(exits) >= 0.0)


def test_empty_map_gives_only_inactive_planes():
    occupancy = grid_map(np.zeros((20, 20)))
    halfplanes = free_space_halfplanes([[0.5, 0.5], [1.0, 1.5]], occupancy, 0.3, 3, 1.0)
    assert not halfplanes.active.any()
    np.testing.assert_array_equal(halfplanes.normals, np.tile([1.0, 0.0], (2, 3, 1)))
    np.testing.assert_array_equal(halfplanes.offsets, np.full((2, 3), INACTIVE_OFFSET))
    assert np.all(halfplanes.uncovered == 0)


@pytest.mark.parametrize("kwargs, message", [
    ({"robot_radius_m": -0.1}, "robot_radius_m=-0.1"),
    ({"search_radius_m": 0.2}, "must exceed robot_radius_m"),
    ({"max_planes_per_step": 0}, "max_planes_per_step=0"),
    ({"max_planes_per_step": 2.5}, "max_planes_per_step=2.5"),
    ({"points": [[0.0, np.inf]]}, "not finite"),
    ({"points": [[0.0, 1.0, 2.0]]}, "must be \\(N, 2\\)"),
    ({"occupancy": np.zeros((3, 3))}, "must be an OccupancyMap"),
])
def test_bad_arguments_are_named(kwargs, message):
    arguments = dict(points=[[0.5, 0.5]], occupancy=grid_map(np.zeros((5, 5))), robot_radius_m=0.3,
                     max_planes_per_step=4, search_radius_m=1.0)
    arguments.update(kwargs)
    with pytest.raises(ValueError, match=message):
        free_space_halfplanes(**arguments)


def test_halfplane_backoff_matches_the_gaussian_linear_form():
    # For p ~ N(p̂, Σ), nᵀp ~ N(nᵀp̂, nᵀΣn): a linear form of a Gaussian vector is Gaussian (a
    # standard result of multivariate statistics; common practice, no source). With
    # b = nᵀp̂ − backoff, P(nᵀp < b) = Φ(−backoff/√(nᵀΣn)) must equal the risk; Φ from scipy.stats.
    rng = np.random.default_rng(8)
    angle = rng.uniform(0.0, 2.0 * np.pi, 50)
    normals = np.column_stack([np.cos(angle), np.sin(angle)])
    factors = rng.normal(size=(50, 2, 2)) * 0.3
    covariances = factors @ np.transpose(factors, (0, 2, 1))
    risks = rng.uniform(1e-4, 0.3, 50)
    backoff = halfplane_backoff(normals, covariances, risks)
    sigma = np.sqrt(np.einsum("ni,nij,nj->n", normals, covariances, normals))
    np.testing.assert_allclose(backoff, stats.norm.ppf(1.0 - risks) * sigma, rtol=1e-10)
    np.testing.assert_allclose(stats.norm.cdf(-backoff / sigma), risks, rtol=1e-8)


def test_halfplane_backoff_against_sampled_positions():
    # Monte Carlo check of the same identity: the violation frequency of nᵀp >= nᵀp̂ − backoff
    # stays within 4 binomial standard deviations of the risk (common practice, no source).
    rng = np.random.default_rng(9)
    mean = np.array([1.0, -2.0])
    covariance = np.array([[0.04, 0.015], [0.015, 0.02]])
    normal = np.array([0.6, 0.8])
    risk = 0.05
    backoff = halfplane_backoff(normal, covariance, risk)
    samples = rng.multivariate_normal(mean, covariance, 200_000)
    frequency = np.mean(samples @ normal < normal @ mean - backoff)
    assert abs(frequency - risk) < 4.0 * np.sqrt(risk * (1.0 - risk) / len(samples))


def test_halfplane_backoff_broadcasts_one_covariance_per_step():
    normals = np.array([[[1.0, 0.0], [0.0, 1.0]], [[1.0, 0.0], [0.0, 1.0]]])   # (N=2, K=2, 2)
    covariances = np.array([np.diag([0.04, 0.01]), np.diag([0.09, 0.16])])[:, None]  # (N, 1, 2, 2)
    expected = stats.norm.ppf(0.99) * np.array([[0.2, 0.1], [0.3, 0.4]])
    np.testing.assert_allclose(halfplane_backoff(normals, covariances, 0.01), expected, rtol=1e-12)
    with pytest.raises(ValueError, match="risk=0.6"):
        halfplane_backoff(normals, covariances, 0.6)
    with pytest.raises(ValueError, match="not positive semi-definite"):
        halfplane_backoff([1.0, 0.0], -np.eye(2), 0.05)
