"""riskbound.clearance: the run's closest approach against dense brute-force sampling and a closed
form (robot and walker on straight lines; see test_review_events.py for the geometry)."""

import numpy as np
import pytest

from riskbound.clearance import closest_approach, disc_box_clearance


def straight_lines(t_robot, t_walker, walker_start):
    robot = np.column_stack([-5.0 + (t_robot - 100.0), np.zeros_like(t_robot)])
    walker = np.column_stack([np.zeros_like(t_walker), walker_start + (t_walker - 100.0)])
    return robot, walker


def test_closest_approach_between_frames_matches_dense_sampling_and_the_closed_form():
    b = 0.45 + np.sqrt(2.0) * (0.2 + 0.3) + 5.0     # clearance 0.2 m at t* = 5.553 s (closed form)
    t_robot = 100.0 + np.arange(0, 601) / 50.0       # odometry at 50 Hz
    t_walker = 100.0 + np.arange(0, 121) / 10.0      # walker frames at 10 Hz
    robot_xy, walker_xy = straight_lines(t_robot, t_walker, -b)
    heading = np.full(len(t_walker), np.pi / 2)      # walking along +y
    extents = np.tile([0.25, 0.2], (len(t_walker), 1))
    found = closest_approach(t_robot, robot_xy, 0.3, t_walker, np.full(len(t_walker), 7), walker_xy, heading, extents)
    # Dense sampling of the same motion (common practice, no source): 0.1 ms steps.
    dense = 100.0 + np.arange(0, 120001) * 1e-4
    robot_dense, walker_dense = straight_lines(dense, dense, -b)
    sampled = disc_box_clearance(robot_dense, 0.3, walker_dense, np.pi / 2, [0.25, 0.2])
    assert found.clearance_m == pytest.approx(sampled.min(), abs=1e-4)
    assert found.clearance_m == pytest.approx(0.2, abs=1e-4)
    assert found.time_s == pytest.approx(100.0 + (b + 5.0 - 0.05) / 2.0, abs=2e-3)
    assert found.obstacle_id == 7
    # Sampled at the frames only, the pass looks farther away: the refinement matters here.
    at_frames = disc_box_clearance(np.column_stack([-5.0 + (t_walker - 100.0), 0 * t_walker]), 0.3, walker_xy,
                                   heading, extents)
    assert at_frames.min() > found.clearance_m + 0.003


def test_no_overlap_in_time_gives_none():
    t = np.array([0.0, 1.0])
    assert closest_approach(t, np.zeros((2, 2)), 0.3, t + 10.0, [1, 1], np.ones((2, 2)), [0.0, 0.0],
                            [[0.25, 0.2]] * 2) is None
