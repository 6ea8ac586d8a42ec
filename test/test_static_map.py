"""A scenario's static world on a grid: rasterised walls and discs against exact geometry, the
static clearance and the bounds test."""

from pathlib import Path

import numpy as np
import pytest

from riskbound.crowd.scenario import load_scenario
from riskbound.crowd.static_map import (MAP_MARGIN_M, bounds_walls, outside_bounds, rasterise, scenario_occupancy,
                                        static_clearance, static_contacts)

CONFIG = Path(__file__).resolve().parent.parent / "config"
BOUNDS = (0.0, 6.0, 0.0, 4.0)


def segment_distance(points, start, end):
    """Distance from points (N, 2) to a segment (plane geometry, common practice, no source)."""
    d = end - start
    t = np.clip((points - start) @ d / (d @ d), 0.0, 1.0)
    return np.linalg.norm(points - (start + t[:, None] * d), axis=1)


def cell_centres(occupancy, mask):
    rows, columns = np.nonzero(mask)
    return occupancy.to_map((np.column_stack([columns, rows]) + 0.5) * occupancy.resolution_m)


def test_a_wall_occupies_exactly_the_cells_it_touches():
    start, end = np.array([1.03, 0.71]), np.array([4.62, 3.18])
    occupancy = rasterise(BOUNDS, walls=[[start, end]], resolution_m=0.1)
    inner = np.zeros_like(occupancy.occupied)
    inner[12:-12, 12:-12] = True   # away from the bounds' walls (margin 1 m + 0.2 m)
    marked = cell_centres(occupancy, occupancy.occupied & inner)
    unmarked = cell_centres(occupancy, ~occupancy.occupied & inner)
    # A square of side s that meets the segment has its centre within s/√2 of it, and one whose
    # centre lies within s/2 of it meets it (plane geometry, common practice, no source).
    assert np.all(segment_distance(marked, start, end) <= 0.1 / np.sqrt(2.0) + 1e-9)
    assert np.all(segment_distance(unmarked, start, end) > 0.05 - 1e-9)
    # Dense samples along the segment all fall in occupied cells.
    samples = start + np.linspace(0.0, 1.0, 5000)[:, None] * (end - start)
    assert occupancy.occupied_at(samples).all()


def test_a_disc_occupies_the_cells_its_area_meets():
    centre, radius = np.array([3.02, 1.97]), 0.6
    occupancy = rasterise(BOUNDS, obstacle_centres=[centre], obstacle_radii=[radius], resolution_m=0.05)
    inner = np.zeros_like(occupancy.occupied)
    inner[25:-25, 25:-25] = True
    marked = cell_centres(occupancy, occupancy.occupied & inner)
    # Nearest point of a square to the disc centre, by clamping (convex geometry, no source).
    nearest = np.clip(centre, marked - 0.025, marked + 0.025)
    assert np.all(np.linalg.norm(nearest - centre, axis=1) <= radius + 1e-9)
    rng = np.random.default_rng(0)
    inside_disc = centre + radius * np.sqrt(rng.uniform(0, 1, (2000, 1))) * np.column_stack(
        [np.cos(a := rng.uniform(0, 2 * np.pi, 2000)), np.sin(a)])
    assert occupancy.occupied_at(inside_disc).all()
    area = np.count_nonzero(occupancy.occupied & inner) * 0.05**2
    assert np.pi * radius**2 < area < np.pi * (radius + 0.05 * np.sqrt(2.0))**2


def test_the_bounds_are_walls_with_free_margin_outside():
    occupancy = rasterise(BOUNDS, resolution_m=0.05)
    assert occupancy.origin_x_m == pytest.approx(-MAP_MARGIN_M) and occupancy.origin_y_m == pytest.approx(-MAP_MARGIN_M)
    assert occupancy.occupied_at([[0.0, 2.0], [6.0, 1.0], [3.0, 0.0], [3.0, 4.0]]).all()
    assert not occupancy.occupied_at([[-0.5, 2.0], [3.0, 2.0], [6.5, 3.9]]).any()
    np.testing.assert_allclose(bounds_walls(BOUNDS)[0], [[0.0, 0.0], [6.0, 0.0]])


def test_static_clearance_to_a_pillar_is_conservative_by_at_most_a_cell():
    centre, radius, robot = np.array([3.0, 2.0]), 0.5, 0.3
    occupancy = rasterise(BOUNDS, obstacle_centres=[centre], obstacle_radii=[radius], resolution_m=0.05)
    angle = np.linspace(0.0, 2.0 * np.pi, 37)
    distance = np.linspace(0.2, 1.4, 37)
    positions = centre + distance[:, None] * np.column_stack([np.cos(angle), np.sin(angle)])
    exact = distance - radius - robot   # disc to disc, plane geometry
    measured = static_clearance(positions, robot, occupancy)
    assert np.all(measured <= exact + 1e-9)
    assert np.all(measured >= exact - 0.05 * np.sqrt(2.0))
    agree = (measured < 0.0) == (exact < 0.0)
    assert np.all(agree | (np.abs(exact) < 0.05 * np.sqrt(2.0)))


def test_courtyard_scenario_map():
    scenario = load_scenario(CONFIG / "crowd_courtyard_40.yaml")
    occupancy = scenario_occupancy(scenario)
    assert occupancy.frame_id == "odom" and occupancy.resolution_m == 0.05
    # 24 m x 20 m plus the margin on each side.
    assert (occupancy.width, occupancy.height) == (520, 440)
    planter = scenario.obstacle_centres[0]
    clearance = static_clearance([scenario.robot_start, planter, [12.0, 0.0]], 0.3, occupancy)
    assert clearance[0] == pytest.approx(1.5 - 0.3, abs=0.06)
    assert clearance[1] < -0.6 and clearance[2] < -0.3
    assert outside_bounds([[12.0, 10.0], [24.5, 10.0], [12.0, -0.1]], scenario.bounds()).tolist() == [False, True, True]


def test_static_contacts_counts_contacts_and_time_outside():
    occupancy = rasterise(BOUNDS, resolution_m=0.05)
    times = np.arange(0.0, 3.01, 0.5)
    positions = np.column_stack([[5.0, 5.5, 5.9, 6.3, 6.6, 6.7, 6.2], np.full(7, 2.0)])
    summary = static_contacts(times, positions, 0.3, occupancy, BOUNDS)
    # The wall at x = 6 fills the cells from 5.95 to 6.05 m: within 0.3 m of them are 5.9, 6.3 and
    # 6.2 (5.5 is 0.45 m off, 6.6 is 0.55 m off).
    assert summary.contact_samples == 3
    assert summary.min_clearance_m == pytest.approx(0.05 - 0.3)
    assert summary.outside_bounds_samples == 4
    assert summary.time_outside_bounds_s == pytest.approx(1.5)   # 6.3, 6.6, 6.7 held for 0.5 s each
    with pytest.raises(ValueError, match="non-decreasing"):
        static_contacts(times[::-1], positions, 0.3, occupancy, BOUNDS)


@pytest.mark.parametrize("bounds", [(0.0, 0.0, 0.0, 1.0), (0.0, 1.0, float("nan"), 1.0), (1.0, 2.0, 3.0)])
def test_bad_bounds_are_named(bounds):
    with pytest.raises(ValueError, match="bounds="):
        rasterise(bounds)


def test_bad_resolution_and_radius_are_named():
    with pytest.raises(ValueError, match="more than 16000000"):
        rasterise(BOUNDS, resolution_m=0.001)
    with pytest.raises(ValueError, match="robot_radius_m=-0.1"):
        static_clearance([[1.0, 1.0]], -0.1, rasterise(BOUNDS))


def test_committed_scenarios_leave_the_robot_crossing_clear_on_the_grid():
    # The exact-geometry check of test_crowd_scenario (0.5 m robot clear of walls and obstacles
    # along the straight crossing) must survive rasterisation, which only adds up to one cell.
    for path in sorted(CONFIG.glob("crowd_*.yaml")):
        scenario = load_scenario(path)
        occupancy = scenario_occupancy(scenario)
        line = np.linspace(scenario.robot_start, scenario.robot_goal, 400)
        assert np.min(static_clearance(line, 0.5, occupancy)) > 0.0, path
        assert not outside_bounds(line, scenario.bounds()).any(), path
