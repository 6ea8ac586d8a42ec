"""The planner keeps off walls and pillars given as an occupancy grid (both robot models).

Clearance to the static world is measured independently here: the exact distance from each
planned position to every occupied cell's square (numpy, no planner code), minus the robot radius.
"""

import numpy as np
import pytest

from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import PlannerSettings
from riskbound.world.occupancy import OccupancyMap
from riskbound.world.static_world import StaticWorld

RESOLUTION_M = 0.05
ORIGIN = np.array([-2.0, -3.0])
N, DT = 20, 0.1
P0 = np.diag([0.02**2, 0.02**2, 0.05**2, 0.05**2])


def hall_with_pillar():
    """A 10 m × 6 m hall: walls along y = ±2.5 m and a 0.6 m square pillar centred on (2.5, 0)."""
    width, height = int(10.0 / RESOLUTION_M), int(6.0 / RESOLUTION_M)
    centres_x = ORIGIN[0] + (np.arange(width) + 0.5) * RESOLUTION_M
    centres_y = ORIGIN[1] + (np.arange(height) + 0.5) * RESOLUTION_M
    X, Y = np.meshgrid(centres_x, centres_y)
    occupied = (np.abs(Y) > 2.5) | ((np.abs(X - 2.5) < 0.3) & (np.abs(Y) < 0.3))
    values = np.where(occupied, 100, 0).astype(np.int8)
    return OccupancyMap(RESOLUTION_M, width, height, ORIGIN[0], ORIGIN[1], 0.0, "odom", values), \
        np.column_stack([X[occupied], Y[occupied]])


def clearance(points, cells, radius):
    """Exact disc-to-square clearance [m] of each point against every occupied cell square."""
    gap = np.abs(points[:, None, :] - cells[None, :, :]) - 0.5 * RESOLUTION_M
    outside = np.linalg.norm(np.maximum(gap, 0.0), axis=-1)
    inside = np.minimum(gap.max(axis=-1), 0.0)
    return (outside + inside).min(axis=1) - radius


def no_people():
    return ObstacleForecast.empty(DT * np.arange(1, N + 1))


@pytest.mark.parametrize("model", ["double_integrator", "unicycle"])
def test_plan_goes_around_the_pillar_only_when_the_map_is_given(model):
    # The goal is 0.55 m off the pillar's axis. Squarely behind it, the face's planes all point
    # back at the robot and the planner stops in front of the pillar (safe, but a local minimum:
    # routing around large static obstacles is a global planner's job, see the README).
    occupancy, cells = hall_with_pillar()
    settings = PlannerSettings(robot_model=model, control_rate_hz=1.0, solver_time_fraction=1.0, qp_iterations=20)
    x0 = np.array([0.0, 0.05, 0.0, 0.0])  # p_x, p_y, then (v_x, v_y) or (θ, v): at rest, facing +x
    goal = np.array([5.0, 0.6])
    state, mpc, world = x0, ChanceConstrainedMPC(settings), StaticWorld(occupancy)
    plans = []
    for _ in range(45):
        result = mpc.solve(state, P0, goal, no_people(), elapsed_s=DT, static_world=world)
        assert result.success, result.status
        plans.append(result)
        state = result.states[1]
    blind_state, blind_mpc = x0, ChanceConstrainedMPC(settings)
    blind_path = []
    for _ in range(45):
        result = blind_mpc.solve(blind_state, P0, goal, no_people(), elapsed_s=DT)
        blind_state = result.states[1]
        blind_path.append(blind_state[0:2])
    # Without the map the robot drives into the pillar: the test has teeth.
    assert clearance(np.array(blind_path), cells, settings.robot_radius_m).min() < 0.0
    flown = np.array([plan.states[1, 0:2] for plan in plans])
    assert clearance(flown, cells, settings.robot_radius_m).min() >= 0.0
    for plan in plans:
        assert clearance(plan.states[1:, 0:2], cells, settings.robot_radius_m).min() >= -1e-6
        assert 0.0 <= plan.risk_static <= plan.risk_charged <= settings.risk_level
    assert flown[-1, 0] > 3.5  # past the pillar


def test_without_a_map_the_static_charge_is_zero():
    settings = PlannerSettings(control_rate_hz=1.0, solver_time_fraction=1.0)
    result = ChanceConstrainedMPC(settings).solve(np.zeros(4), P0, np.array([3.0, 0.0]), no_people())
    assert result.success and result.risk_static == 0.0
