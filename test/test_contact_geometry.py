"""Who moved into whom at a walker contact, the stops of a run, the static figures and the verdict
by robot type (riskbound.logs.contact_geometry, riskbound.logs.run_summary), on synthetic runs
whose answers follow from plane kinematics in closed form (common practice, no source)."""

import dataclasses
from types import SimpleNamespace

import numpy as np
import pytest

from riskbound.crowd.static_map import rasterise
from riskbound.logs.bag_io import BagError
from riskbound.logs.contact_geometry import (ROBOT_INTO_WALKER, ROBOT_INTO_WALKER_MPS, WALKER_INTO_ROBOT,
                                             frame_clearances, runs_of, stops, walker_contacts)
from riskbound.logs.run_summary import RunSummary, static_world_figures

RATE_HZ = 10.0
RADIUS_M = 0.3
EXTENTS_M = (0.25, 0.2)


def straight_run(robot_start, robot_velocity, walker_start, walker_velocity, duration_s=4.0, walker_id=5,
                 present=None):
    """Robot and one walker on straight lines at constant velocity, sampled at RATE_HZ; the walker
    faces its direction of travel (or +x when standing). Returns walker_contacts' findings."""
    t = np.arange(0.0, duration_s + 1e-9, 1.0 / RATE_HZ)
    robot_xy = np.asarray(robot_start) + t[:, None] * np.asarray(robot_velocity)
    walker_xy = np.asarray(walker_start) + t[:, None] * np.asarray(walker_velocity)
    heading = float(np.arctan2(walker_velocity[1], walker_velocity[0])) if np.any(walker_velocity) else 0.0
    present = np.ones(len(t), dtype=bool) if present is None else present(t)
    ids = [np.array([walker_id] if here else [], dtype=np.uint32) for here in present]
    positions = [walker_xy[k:k + 1] if here else np.zeros((0, 2)) for k, here in enumerate(present)]
    headings = [np.array([heading]) if here else np.zeros(0) for here in present]
    clearances = frame_clearances(robot_xy, RADIUS_M, positions, headings, EXTENTS_M)
    velocity = np.tile(np.asarray(robot_velocity, dtype=float), (len(t), 1))
    return walker_contacts(t, ids, positions, clearances, robot_xy, velocity)


def test_a_robot_driving_into_a_standing_walker_moved_into_it():
    contacts = straight_run((-2.0, 0.0), (1.0, 0.0), (0.0, 0.0), (0.0, 0.0))
    assert len(contacts) == 1
    c = contacts[0]
    # The disc touches the box's face x = -0.25 when the centre reaches -0.55: t = 1.45 s, so the
    # first frame in contact is t = 1.5 s.
    assert c.onset_s == pytest.approx(1.5)
    assert c.who == ROBOT_INTO_WALKER
    assert c.robot_toward_walker_mps == pytest.approx(1.0)
    assert c.walker_toward_robot_mps == pytest.approx(0.0, abs=1e-12)
    assert (c.robot_speed_mps, c.walker_speed_mps) == (pytest.approx(1.0), pytest.approx(0.0, abs=1e-12))
    # The robot drives on through the walker and leaves it at x = 0.55 (t = 2.55 s): 1.5 … 2.5 s.
    assert (c.frames, c.end_s) == (11, pytest.approx(2.5))


def test_a_walker_walking_into_a_standing_robot_moved_into_it():
    contacts = straight_run((0.0, 0.0), (0.0, 0.0), (3.0, 0.0), (-1.25, 0.0), duration_s=3.0)
    c = contacts[0]
    # Walker centre at x = 3 - 1.25 t touches at 0.55: t = 1.96 s, first frame 2.0 s.
    assert c.onset_s == pytest.approx(2.0)
    assert c.who == WALKER_INTO_ROBOT
    assert c.robot_toward_walker_mps == pytest.approx(0.0, abs=1e-12)
    assert c.walker_toward_robot_mps == pytest.approx(1.25)
    assert c.walker_speed_mps == pytest.approx(1.25)


def test_a_walker_catching_a_slower_robot_from_behind_moved_into_it():
    # The ground robot's case: it drives away at 0.8 m/s, the walker behind it is faster.
    contacts = straight_run((0.0, 0.0), (0.8, 0.0), (-3.0, 0.0), (1.4, 0.0), duration_s=6.0)
    c = contacts[0]
    assert c.who == WALKER_INTO_ROBOT
    assert c.robot_toward_walker_mps == pytest.approx(-0.8)   # moving away from the walker
    assert c.walker_toward_robot_mps == pytest.approx(1.4)
    assert (c.robot_speed_mps, c.walker_speed_mps) == (pytest.approx(0.8), pytest.approx(1.4))


@pytest.mark.parametrize("robot_speed_mps, expected", [(0.5 * ROBOT_INTO_WALKER_MPS, WALKER_INTO_ROBOT),
                                                       (2.0 * ROBOT_INTO_WALKER_MPS, ROBOT_INTO_WALKER)])
def test_the_threshold_decides_when_both_close_in(robot_speed_mps, expected):
    # Head-on: the walker closes in at 1.3 m/s either way; only the robot's share decides.
    contacts = straight_run((0.0, 0.0), (robot_speed_mps, 0.0), (3.0, 0.0), (-1.3, 0.0))
    assert [c.who for c in contacts] == [expected]
    assert contacts[0].robot_toward_walker_mps == pytest.approx(robot_speed_mps)


def test_a_contact_is_counted_once_per_interval_and_a_gap_in_the_truth_splits_it():
    def absent_in_the_middle(t):
        return ~((t > 1.85) & (t < 2.05))   # not in the frames at 1.9 and 2.0 s

    whole = straight_run((-2.0, 0.0), (1.0, 0.0), (0.0, 0.0), (0.0, 0.0))
    split = straight_run((-2.0, 0.0), (1.0, 0.0), (0.0, 0.0), (0.0, 0.0), present=absent_in_the_middle)
    assert len(whole) == 1
    assert [c.onset_s for c in split] == [pytest.approx(1.5), pytest.approx(2.1)]
    assert [c.frames for c in split] == [4, 5]
    assert split[0].end_s == pytest.approx(1.8)


def test_no_contact_when_the_walker_passes_beside():
    # Passing 1 m to the side: box half-width 0.2 + radius 0.3 < 1.
    assert straight_run((-2.0, 0.0), (1.0, 0.0), (2.0, 1.0), (-1.0, 0.0)) == []


def test_runs_of_flags():
    assert runs_of([0, 1, 1, 0, 1]) == [(1, 3), (4, 5)]
    assert runs_of([]) == []


def test_stops_leave_out_the_start_wait_and_what_follows_the_arrival():
    t = np.arange(0.0, 20.0, 0.02)
    speed = np.full(len(t), 1.0)
    speed[t < 1.0] = 0.0                       # waiting for the first command: start wait
    speed[(t >= 5.0) & (t < 7.0)] = 0.01       # 2 s stop
    speed[(t >= 9.0) & (t < 12.5)] = 0.0       # 3.5 s stop: the longest
    speed[t >= 15.0] = 0.0                     # at the goal from 15 s
    figures = stops(t, speed, goal_reached_s=15.0)
    assert figures.longest_stop_s == pytest.approx(3.5)
    assert figures.longest_stop_onset_s == pytest.approx(9.0)
    assert figures.stops == 2
    assert figures.start_wait_s == pytest.approx(1.0)
    # Never arriving: the stand at the end counts (5 s to the last sample at 19.98 s).
    assert stops(t, speed).longest_stop_s == pytest.approx(19.98 - 15.0)


def test_stops_reject_bad_input():
    with pytest.raises(ValueError, match="standing_speed_mps"):
        stops([0.0, 1.0], [0.0, 0.0], standing_speed_mps=0.0)
    with pytest.raises(ValueError, match="times_s has 2 entries for 1"):
        stops([0.0, 1.0], [0.0])


def test_static_figures_count_each_wall_contact_once_and_the_time_outside():
    bounds = (0.0, 10.0, 0.0, 6.0)
    occupancy = rasterise(bounds, walls=[[[5.0, 2.0], [5.0, 6.0]]], resolution_m=0.05)
    crowd = SimpleNamespace(static_map=occupancy, metadata={"bounds": "[0.0, 10.0, 0.0, 6.0]"}, path="crowd")
    # Along y = 3 at 1 m/s: from x = 1 through the inner wall at x = 5, out through the bound at
    # x = 10 to x = 11 (t = 10 s), back in to x = 9.
    t = np.arange(0.0, 12.0, 0.02)
    x = np.where(t < 10.0, 1.0 + t, 11.0 - (t - 10.0))
    xy = np.column_stack([x, np.full(len(t), 3.0)])
    figures = static_world_figures(crowd, t, xy, 0.3, {"odom"})
    assert figures["static_map_checked"]
    # Three times the disc overlaps a wall: the inner one, the bound going out, the bound coming back.
    assert figures["static_contacts"] == 3
    # Outside x > 10 from t = 9 s to t = 11 s.
    assert figures["time_outside_bounds_s"] == pytest.approx(2.0, abs=0.03)
    assert figures["min_static_clearance_m"] < 0.0
    # Each crossing overlaps while the centre is within 0.3 m of the wall (plus at most a cell
    # diagonal, 0.07 m, on each side of a one-to-two-cell-thick wall): 3 × 0.6 s to 3 × 0.85 s.
    assert 1.8 <= figures["static_contact_s"] <= 2.55
    with pytest.raises(BagError, match="frame"):
        static_world_figures(crowd, t, xy, 0.3, {"map"})
    assert static_world_figures(SimpleNamespace(static_map=None, metadata={}, path="x"), t, xy, 0.3, {"odom"}) == {}


def summary(**changes):
    base = RunSummary(
        goal_xy=[1.0, 0.0], goal_reached=True, time_to_goal_s=5.0, final_distance_to_goal_m=0.1,
        min_distance_to_goal_m=0.1, collisions=0, min_clearance_m=0.5, min_clearance_time_s=1.0,
        min_clearance_walker_id=1, truth_frames_checked=50, robot_radius_m=0.3, walker_half_extents_m=[0.25, 0.2],
        planner_cycles=50, planner_cycles_expected=50, planner_status_counts={}, solves=50, solve_ms_median=10.0,
        solve_ms_p95=20.0, solve_ms_max=30.0, path_length_m=5.0, mean_speed_mps=1.0, watchdog_stops_total=0)
    return dataclasses.replace(base, **changes)


@pytest.mark.parametrize("robot_model", ["double_integrator", "unicycle"])
def test_verdict_by_robot_type(robot_model):
    caught = straight_run((0.0, 0.0), (0.8, 0.0), (-3.0, 0.0), (1.4, 0.0), duration_s=6.0)
    rammed = straight_run((-2.0, 0.0), (1.0, 0.0), (0.0, 0.0), (0.0, 0.0))
    clean = summary(robot_model=robot_model)
    walker_caught_it = summary(robot_model=robot_model, collisions=caught[0].frames, walker_contacts=caught,
                               walker_into_robot_contacts=1)
    it_rammed = summary(robot_model=robot_model, collisions=rammed[0].frames, walker_contacts=rammed,
                        robot_into_walker_contacts=1)
    assert clean.passed
    # A ground robot may be caught from behind; a multirotor may not be touched at all.
    assert walker_caught_it.passed == (robot_model == "unicycle")
    assert not it_rammed.passed
    assert not summary(robot_model=robot_model, static_contacts=1, static_contact_s=0.2).passed
    assert not summary(robot_model=robot_model, time_outside_bounds_s=0.5).passed
    assert not summary(robot_model=robot_model, goal_reached=False).passed
    assert "moving into the walker" in " ".join(it_rammed.failures())
