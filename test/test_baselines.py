"""Benchmark baselines: each plan satisfies its own constraints, checked here from first principles.

The checks recompute every constraint number independently of the planners: Gaussian quantiles with
scipy.stats.norm, face normals from the heading, box supports from the box corners, and the
minimum-volume ellipse of a box from its closed form.
"""

import numpy as np
import pytest
from scipy.stats import norm

from riskbound.motion.covariance import propagate_along_trajectory
from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.baselines.common import goal_reference, plan_cost
from riskbound.planning.baselines.linearised import LinearisedPlanner
from riskbound.planning.baselines.mixed_integer import MixedIntegerPlanner
from riskbound.planning.baselines.robust_inflation import RobustInflationPlanner, risk_for_sigma_multiple
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import PlannerSettings

TOL = 1e-5  # solver feasibility tolerance is 1e-4 in the returned rows; positions are checked tighter
SETTINGS = PlannerSettings(horizon_steps=8, max_obstacles=1)
HALF = np.array([0.35, 0.25])  # obstacle half-length, half-width [m]
P0 = np.diag([0.02**2, 0.02**2, 0.03**2, 0.03**2])


def _forecast(settings, centre, velocity, heading, sigma0=0.08, sigma_v=0.1):
    N, dt = settings.horizon_steps, settings.step_s
    t = dt * np.arange(1, N + 1)
    positions = np.asarray(centre)[None] + t[:, None] * np.asarray(velocity)[None]
    covariances = (sigma0**2 + (sigma_v * t) ** 2)[:, None, None] * np.eye(2)[None]
    covariances[:, 0, 1] = covariances[:, 1, 0] = 0.3 * covariances[:, 0, 0]  # correlated axes
    return ObstacleForecast([5], t, positions[None], np.full((1, N), heading), covariances[None], HALF[None])


def _tiny_case(settings=SETTINGS):
    """Obstacle ahead and a little to the side, moving slowly across: the plan must bend round it."""
    x0 = np.array([0.0, 0.0, 0.6, 0.0])
    goal = np.array([3.0, 0.2])
    return x0, goal, _forecast(settings, [1.4, -0.15], [0.0, 0.1], 0.4)


def _check_dynamics_and_bounds(result, settings, x0):
    """x₀ fixed, x_{k+1} = f(x_k, u_k) by the exact double-integrator step, input and speed limits."""
    dt = settings.step_s
    states, inputs = result.states, result.inputs
    assert states.shape == (settings.horizon_steps + 1, 4) and inputs.shape == (settings.horizon_steps, 2)
    np.testing.assert_allclose(states[0], x0, atol=1e-9)
    # p⁺ = p + v Δt + ½ a Δt², v⁺ = v + a Δt (zero-order hold; common practice, no source)
    p, v, a = states[:-1, 0:2], states[:-1, 2:4], inputs
    np.testing.assert_allclose(states[1:, 0:2], p + v * dt + 0.5 * a * dt**2, atol=1e-6)
    np.testing.assert_allclose(states[1:, 2:4], v + a * dt, atol=1e-6)
    assert np.all(np.abs(inputs) <= settings.max_accel_mps2 + TOL)
    # the octagon speed limit never exceeds the disc ‖v‖ ≤ v_max
    assert np.all(np.linalg.norm(states[1:, 2:4], axis=1) <= settings.max_speed_mps + TOL)


def _robot_position_covariances(settings, x0):
    """What every planner uses on a cold start: covariance along the zero-input rollout."""
    from riskbound.motion.robot_models import make_robot_model

    model = make_robot_model(settings.robot_model)
    inputs = np.zeros((settings.horizon_steps, 2))
    states = model.rollout(x0, inputs, settings.step_s)
    covariances = propagate_along_trajectory(model, states, inputs, settings.step_s, P0,
                                             settings.robot_accel_noise)
    return covariances[1:, 0:2, 0:2]


def _face_sigmas(heading, covariance):
    """√(nᵢᵀ Σ nᵢ) for the two face normals of a box at `heading`, per step."""
    n1 = np.array([np.cos(heading), np.sin(heading)])
    n2 = np.array([-np.sin(heading), np.cos(heading)])
    return np.stack([np.sqrt(np.einsum("i,kij,j->k", n, covariance, n)) for n in (n1, n2)], axis=-1)


def test_mixed_integer_plan_is_outside_its_inflated_box_at_every_step():
    x0, goal, forecast = _tiny_case()
    result = MixedIntegerPlanner(SETTINGS).solve(x0, P0, goal, forecast)
    assert result.success, result.status
    _check_dynamics_and_bounds(result, SETTINGS, x0)
    boxes = result.constraints
    # Uniform allocation by Boole's inequality: α / (steps × obstacles) (README.md, How it works, item 4).
    assert boxes.risk == pytest.approx(SETTINGS.risk_level / SETTINGS.horizon_steps)
    np.testing.assert_allclose(boxes.robot_position_covariances, _robot_position_covariances(SETTINGS, x0),
                               atol=1e-12)
    covariance = forecast.covariances[0] + boxes.robot_position_covariances
    heading = forecast.headings[0, 0]
    # Hᵢ = hᵢ + r + Φ⁻¹(1 − a) √(nᵢᵀ Σ nᵢ), Φ⁻¹ from scipy.stats.norm (reference computation)
    H = HALF + SETTINGS.robot_radius_m + norm.ppf(1.0 - boxes.risk) * _face_sigmas(heading, covariance)
    d = result.states[1:, 0:2] - forecast.positions[0]
    along = d @ np.array([np.cos(heading), np.sin(heading)])
    across = d @ np.array([-np.sin(heading), np.cos(heading)])
    # Outside the box ⇔ at least one face constraint holds (the disjunction the binaries encode).
    slack = np.max(np.stack([along - H[:, 0], -along - H[:, 0], across - H[:, 1], -across - H[:, 1]]), axis=0)
    assert np.all(slack >= -TOL), slack
    # The chosen binaries point at faces that hold.
    chosen = boxes.faces[0].astype(bool)
    face_slack = np.stack([along - H[:, 0], -along - H[:, 0], across - H[:, 1], -across - H[:, 1]], axis=-1)
    assert np.all(chosen.any(axis=-1))
    assert np.all(face_slack[chosen] >= -TOL)
    # The obstacle is in the way: somewhere the plan rides on a face (else the test proves little).
    assert slack.min() < 0.05


@pytest.mark.parametrize("passes", [1, 5])
def test_linearised_plan_is_on_the_far_side_of_every_half_plane(passes):
    x0, goal, forecast = _tiny_case()
    result = LinearisedPlanner(SETTINGS, passes=passes).solve(x0, P0, goal, forecast)
    assert result.success, result.status
    _check_dynamics_and_bounds(result, SETTINGS, x0)
    planes = result.constraints
    normals = planes.normals[0]
    np.testing.assert_allclose(np.linalg.norm(normals, axis=-1), 1.0, atol=1e-12)
    heading = forecast.headings[0, 0]
    # Every pass keeps the robot covariance of the cycle (propagated along the cycle's initial guess).
    covariance = forecast.covariances[0] + _robot_position_covariances(SETTINGS, x0)
    # Support of the grown box in direction n, from its four corners (not from the |n·e| formula).
    R = np.array([[np.cos(heading), -np.sin(heading)], [np.sin(heading), np.cos(heading)]])
    grown = HALF + SETTINGS.robot_radius_m
    corners = np.array([[sx * grown[0], sy * grown[1]] for sx in (-1, 1) for sy in (-1, 1)]) @ R.T
    support = np.max(normals @ corners.T, axis=1)
    sigma = np.sqrt(np.einsum("ki,kij,kj->k", normals, covariance, normals))
    # exact chance constraint of one half-plane: offset = n·o + support + Φ⁻¹(1 − a) σₙ (scipy.stats.norm)
    expected = np.einsum("ki,ki->k", normals, forecast.positions[0]) + support + norm.ppf(1 - planes.risk) * sigma
    np.testing.assert_allclose(planes.offsets[0], expected, rtol=1e-9, atol=1e-9)
    # Every corner of the grown box lies behind its half-plane (the box is excluded) ...
    centre_side = np.einsum("ki,ki->k", normals, forecast.positions[0])
    assert np.all(centre_side + support <= planes.offsets[0] + 1e-9)
    # ... and the plan lies beyond it.
    values = np.einsum("ki,ki->k", normals, result.states[1:, 0:2]) - planes.offsets[0]
    assert np.all(values >= -TOL), values


def test_linearised_unicycle_plan_follows_its_dynamics_and_half_planes():
    settings = SETTINGS.with_changes(robot_model="unicycle")
    x0 = np.array([0.0, 0.0, 0.0, 0.6])
    goal = np.array([3.0, 0.2])
    forecast = _forecast(settings, [1.4, -0.15], [0.0, 0.1], 0.4)
    planner = LinearisedPlanner(settings)
    result = planner.solve(x0, np.diag([4e-4, 4e-4, 1e-3, 1e-3]), goal, forecast)
    assert result.success, result.status
    for k in range(settings.horizon_steps):
        np.testing.assert_allclose(planner.model.step(result.states[k], result.inputs[k], settings.step_s),
                                   result.states[k + 1], atol=1e-6)
    planes = result.constraints
    values = np.einsum("ki,ki->k", planes.normals[0], result.states[1:, 0:2]) - planes.offsets[0]
    assert np.all(values >= -TOL)


def test_robust_inflation_grows_every_face_by_the_fixed_multiple_and_keeps_outside():
    kappa = 2.5
    x0, goal, forecast = _tiny_case()
    planner = RobustInflationPlanner(SETTINGS, sigma_multiple=kappa)
    result = planner.solve(x0, P0, goal, forecast)
    assert result.success, result.status
    _check_dynamics_and_bounds(result, SETTINGS, x0)
    # Φ⁻¹(1 − a) = κ: a = 1 − Φ(κ) (scipy.stats.norm.sf) and no split over steps or obstacles
    assert result.risk_per_constraint == pytest.approx(norm.sf(kappa), rel=1e-12)
    heading = forecast.headings[0, 0]
    covariance = forecast.covariances[0] + _robot_position_covariances(SETTINGS, x0)
    # Minimum-volume ellipse of a box: semi-axes √2 hᵢ (closed form, see riskbound.risk.ellipsoid)
    semi_axes = np.sqrt(2.0) * (HALF + SETTINGS.robot_radius_m + kappa * _face_sigmas(heading, covariance))
    np.testing.assert_allclose(result.constraints.semi_axes[0], semi_axes, rtol=1e-9)
    d = result.states[1:, 0:2] - forecast.positions[0]
    along = d @ np.array([np.cos(heading), np.sin(heading)])
    across = d @ np.array([-np.sin(heading), np.cos(heading)])
    assert np.all((along / semi_axes[:, 0]) ** 2 + (across / semi_axes[:, 1]) ** 2 >= 1.0 - 1e-4)


def test_robust_inflation_multiple_outside_its_range_is_rejected_with_its_name():
    with pytest.raises(ValueError, match="sigma_multiple"):
        risk_for_sigma_multiple(0.1)
    with pytest.raises(ValueError, match="sigma_multiple"):
        RobustInflationPlanner(SETTINGS, sigma_multiple=9.0)
    with pytest.raises(ValueError, match="passes"):
        LinearisedPlanner(SETTINGS, passes=0)
    with pytest.raises(ValueError, match="time_limit_s"):
        MixedIntegerPlanner(SETTINGS, time_limit_s=0.0)


def test_baseline_cost_is_the_mpc_objective():
    """One scoring function for every method: on our own plan it must give IPOPT's objective."""
    x0, goal, forecast = _tiny_case()
    result = ChanceConstrainedMPC(SETTINGS).solve(x0, P0, goal, forecast)
    assert result.success
    reference = goal_reference(SETTINGS, x0[0:2], goal)
    assert plan_cost(SETTINGS, result.states, result.inputs, reference) == pytest.approx(result.cost, rel=1e-9)


def test_symmetric_case_orders_mixed_integer_ours_and_robust_inflation():
    """Obstacle centred on the straight line: the optimum goes round either side at equal cost.

    The mixed-integer problem is exact for the inflated box, which lies inside our ellipse, so its
    optimum can be no worse than ours; robust inflation with κ above our quantile Φ⁻¹(1 − a) has
    ellipses that contain ours, so ours can be no worse than it (nested feasible sets).
    """
    settings = PlannerSettings(horizon_steps=12, max_obstacles=1)
    x0 = np.array([0.0, 0.0, 0.8, 0.0])
    goal = np.array([4.0, 0.0])
    N = settings.horizon_steps
    t = settings.step_s * np.arange(1, N + 1)
    forecast = ObstacleForecast([1], t, np.tile([1.9, 0.0], (1, N, 1)), np.zeros((1, N)),
                                np.tile(0.01 * np.eye(2), (1, N, 1, 1)), HALF[None])
    reference = goal_reference(settings, x0[0:2], goal)
    ours = ChanceConstrainedMPC(settings).solve(x0, P0, goal, forecast)
    mixed = MixedIntegerPlanner(settings).solve(x0, P0, goal, forecast)
    kappa = 3.5
    quantile = norm.ppf(1.0 - settings.risk_level / N)  # Φ⁻¹(1 − α/N), scipy reference
    assert kappa > quantile
    robust = RobustInflationPlanner(settings, sigma_multiple=kappa).solve(x0, P0, goal, forecast)
    assert ours.success and mixed.success and robust.success
    cost = {name: plan_cost(settings, r.states, r.inputs, reference)
            for name, r in (("ours", ours), ("mixed", mixed), ("robust", robust))}
    assert cost["mixed"] <= cost["ours"] * (1 + 1e-6)
    assert cost["ours"] <= cost["robust"] * (1 + 1e-6)
    # The obstacle matters: the exact box optimum is strictly cheaper than ours here.
    assert cost["mixed"] < cost["ours"]
