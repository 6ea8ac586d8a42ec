"""MPC with obstacles, both robot models: plans obey the dynamics, the bounds and every ellipse constraint.

The ellipse of every considered obstacle is recomputed here from first principles (face normals,
scipy's normal quantile, semi-axes √2·h, A = R diag(1/a²) Rᵀ), the robot covariance by a plain
numpy propagation along the returned plan, and the risk charged to the plan from scipy's normal
distribution, so the check does not trust the planner's own numbers.
"""

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.stats import multivariate_normal, norm

from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.mpc import VIOLATION_PENALTY, ChanceConstrainedMPC
from riskbound.planning.settings import PlannerSettings

N, DT = 20, 0.1
HALF_EXTENTS = np.array([0.25, 0.2])
BASE = PlannerSettings(horizon_steps=N, step_s=DT, max_obstacles=4, solver_max_iter=500,
                       solver_time_fraction=1.0, control_rate_hz=1.0, robot_radius_m=0.3)
GOAL = np.array([5.0, 0.3])
P0 = np.diag([0.01, 0.01, 0.002, 0.002])


def scene(offset_s=0.0):
    """A walker standing on the straight path, one crossing it, one walking alongside, one far away.

    Forecast on a 0.25 s grid (as a tracker would send), resampled onto the planner's grid starting
    `offset_s` after the forecast stamp.
    """
    times = np.arange(0.0, 3.01, 0.25)
    start = np.array([[2.3, 0.1], [3.2, -3.0], [0.5, 2.0], [25.0, 25.0]])
    velocity = np.array([[0.0, 0.0], [0.0, 1.0], [0.8, 0.0], [-0.5, 0.0]])
    positions = start[:, None, :] + velocity[:, None, :] * times[None, :, None]
    headings = np.tile(np.array([0.3, math.pi / 2, 0.0, math.pi])[:, None], (1, len(times)))
    growth = (0.004 + 0.01 * times)[None, :, None, None] * np.eye(2)
    covariances = np.tile(growth, (4, 1, 1, 1))
    covariances[1, :, 0, 1] = covariances[1, :, 1, 0] = 0.002 * times
    forecast = ObstacleForecast([11, 12, 13, 14], times, positions, headings, covariances,
                                np.tile(HALF_EXTENTS, (4, 1)))
    grid = DT * np.arange(1, N + 1)
    on_grid = forecast.resampled(grid + offset_s)
    # The planner wants times relative to its own start (t_k = k·Δt), as the planner node relabels them.
    return ObstacleForecast(on_grid.track_ids, grid, on_grid.positions, on_grid.headings, on_grid.covariances,
                            on_grid.half_extents)


# At the origin, at rest (facing +x for the unicycle); the same layout [p_x, p_y, ·, ·] for both models.
X0 = np.zeros(4)


def numeric_jacobians(model, x, u, h=1e-6):
    def columns(f, z):
        cols = []
        for i in range(len(z)):
            e = np.zeros(len(z))
            e[i] = h
            cols.append((f(z + e) - f(z - e)) / (2 * h))
        return np.column_stack(cols)
    return columns(lambda z: model.step(z, u, DT), x), columns(lambda w: model.step(x, w, DT), u)


def robot_position_covariances(model, settings, x0, states=None, inputs=None, initial=P0):
    """Robot covariance along a plan (default: the zero-input rollout) from `initial`, by a plain numpy loop."""
    if inputs is None:
        inputs = np.zeros((N, 2))
        states = model.rollout(x0, inputs, DT)
    W = np.diag([settings.robot_accel_noise**2,
                 (settings.robot_turn_noise if model.name == "unicycle" else settings.robot_accel_noise) ** 2])
    P, out = np.array(initial, dtype=float), []
    for x, u in zip(states[:-1], inputs):
        F, G = numeric_jacobians(model, x, u)
        P = F @ P @ F.T + G @ W @ G.T
        out.append(P[0:2, 0:2])
    return np.array(out)


def first_principles_shape(half, heading, radius, covariance, risk):
    """A of the ellipse enclosing the deterministic-equivalent box of one obstacle at one step."""
    normals = [np.array([math.cos(heading), math.sin(heading)]), np.array([-math.sin(heading), math.cos(heading)])]
    inflated = [half[i] + radius + norm.ppf(1.0 - risk) * math.sqrt(n @ covariance @ n) for i, n in enumerate(normals)]
    semi_axes = math.sqrt(2.0) * np.array(inflated)
    R = np.column_stack(normals)
    return R @ np.diag(1.0 / semi_axes**2) @ R.T


def assert_dynamics_and_bounds(model, settings, result, x0):
    np.testing.assert_allclose(result.states[0], x0, atol=1e-9)
    np.testing.assert_allclose(model.rollout(x0, result.inputs, DT), result.states, atol=1e-5)
    tol = 1e-6
    if model.name == "double_integrator":
        assert np.all(np.linalg.norm(result.states[:, 2:4], axis=1) <= settings.max_speed_mps + tol)
        assert np.all(np.abs(result.inputs) <= settings.max_accel_mps2 + tol)
    else:
        assert np.all(result.states[:, 3] <= settings.max_speed_mps + tol)
        assert np.all(result.states[:, 3] >= settings.min_speed_mps - tol)
        assert np.all(np.abs(result.inputs[:, 0]) <= settings.max_accel_mps2 + tol)
        assert np.all(np.abs(result.inputs[:, 1]) <= settings.max_turn_rate_radps + tol)


def quadratic_forms(result, shapes):
    """dᵀ A d for every used slot (rows) and step k = 1…N (columns)."""
    used = result.constraints.used
    d = result.states[None, 1:, 0:2] - result.constraints.centres[used]
    return np.einsum("jki,jkil,jkl->jk", d, shapes, d)


def independent_charge(result, forecast, settings, robot_cov):
    """Σ over obstacles and steps of P(d inside the box grown by the robot radius), by scipy.

    d ~ N(d̂, Σ) in the box frame; the rectangle probability is scipy.stats.multivariate_normal's CDF
    over the box, and Boole's inequality adds the pairs.
    """
    total = 0.0
    for j in range(forecast.track_count):
        half = forecast.half_extents[j] + settings.robot_radius_m
        for k in range(N):
            heading = forecast.headings[j, k]
            frame = np.array([[math.cos(heading), math.sin(heading)], [-math.sin(heading), math.cos(heading)]])
            d = frame @ (result.states[k + 1, 0:2] - forecast.positions[j, k])
            cov = frame @ (forecast.covariances[j, k] + robot_cov[k]) @ frame.T
            total += multivariate_normal(d, cov).cdf(half, lower_limit=-half)
    return total


@pytest.fixture(scope="module", params=["double_integrator", "unicycle"])
def planner(request):
    settings = BASE.with_changes(robot_model=request.param)
    return settings, ChanceConstrainedMPC(settings)


def test_cold_plan_obeys_dynamics_bounds_and_recomputed_ellipses(planner):
    settings, mpc = planner
    # The uniform split, so that every ellipse can be rebuilt from the documented formula.
    settings = settings.with_changes(risk_allocation="joint_uniform")
    mpc = ChanceConstrainedMPC(settings)
    x0 = X0.copy()
    forecast = scene()
    result = mpc.solve(x0, P0, GOAL, forecast)
    assert result.success, (result.status, result.solver_status)
    assert_dynamics_and_bounds(mpc.model, settings, result, x0)

    constraints = result.constraints
    # The far walker cannot come within reach during the 2 s horizon; the other three can.
    kept = list(constraints.track_ids[constraints.used])
    assert sorted(kept) == [11, 12, 13]
    assert result.obstacles_considered == 3 and result.obstacles_dropped == 0
    risk = settings.risk_level / (N * 3)  # joint allocation, Boole's inequality
    assert result.risk_per_constraint == pytest.approx(risk, rel=1e-12)

    # The ellipses of the last iteration were built along the iterate before the plan: the same
    # covariance for the double integrator, within the last step's change for the unicycle.
    robot_cov = robot_position_covariances(mpc.model, settings, x0, result.states, result.inputs)
    unicycle = settings.robot_model == "unicycle"
    shapes = np.empty((len(kept), N, 2, 2))
    for slot, track in enumerate(kept):
        j = list(forecast.track_ids).index(track)
        np.testing.assert_allclose(constraints.centres[slot], forecast.positions[j], atol=1e-12)
        for k in range(N):
            shapes[slot, k] = first_principles_shape(HALF_EXTENTS, forecast.headings[j, k], settings.robot_radius_m,
                                                     forecast.covariances[j, k] + robot_cov[k], risk)
    if not unicycle:
        np.testing.assert_allclose(constraints.shapes[constraints.used], shapes, rtol=1e-6)

    # The double integrator's tangents lie inside the ellipses exactly; the unicycle's plan is the
    # exact rollout of inputs planned on linearised dynamics, within a few centimetres of them
    # (its charge, checked below, is what is certified).
    q = quadratic_forms(result, constraints.shapes[constraints.used])
    assert np.all(q >= 1.0 - (5e-2 if unicycle else 1e-5)), q.min()
    # The standing walker blocks the straight line: some constraint must be (nearly) active,
    # otherwise this test would not exercise the obstacle constraints at all.
    assert q.min() < 1.1
    # The plan makes progress towards the goal around the obstacles.
    assert np.linalg.norm(result.states[-1, 0:2] - GOAL) < np.linalg.norm(x0[0:2] - GOAL) - 0.5
    # The charge reported is the bound recomputed along the plan's own covariance, and within α.
    charge = independent_charge(result, forecast, settings, robot_cov)
    assert result.risk_charged == pytest.approx(charge, rel=1e-4, abs=1e-10)
    assert charge <= settings.risk_level


@pytest.mark.parametrize("solver", ["sequential_qp", "ipopt"])
def test_joint_allocation_spends_more_of_the_bound_than_the_uniform_split(planner, solver):
    # Iterative allocation moves risk to the pairs that bind: over a few cycles on the same scene
    # the charge rises towards α (never above it) and the plan gets cheaper than the uniform one.
    settings, _ = planner
    results = {}
    for mode in ("joint_uniform", "joint"):
        mpc = ChanceConstrainedMPC(settings.with_changes(risk_allocation=mode, solver=solver))
        for _ in range(6):
            result = mpc.solve(X0, P0, GOAL, scene(), elapsed_s=0.0)
            assert result.success, (mode, result.status)
        robot_cov = robot_position_covariances(mpc.model, settings, X0, result.states, result.inputs)
        charge = independent_charge(result, scene(), settings, robot_cov)
        assert charge <= settings.risk_level * (1.0 + 1e-9), (mode, charge)
        results[mode] = (charge, result.cost)
    assert results["joint"][0] > 3.0 * results["joint_uniform"][0], results
    assert results["joint"][1] < results["joint_uniform"][1], results


def test_reported_margin_is_the_ray_distance_to_the_ellipse(planner):
    settings, mpc = planner
    mpc.reset()
    result = mpc.solve(X0.copy(), P0, GOAL, scene())
    assert result.success
    constraints = result.constraints
    used = constraints.used
    smallest = math.inf
    for centre_row, shape_row in zip(constraints.centres[used], constraints.shapes[used]):
        for k in range(N):
            d = result.states[k + 1, 0:2] - centre_row[k]
            direction = d / np.linalg.norm(d)
            # Boundary along the ray from the centre through the robot, found by root bracketing.
            boundary = brentq(lambda t: (t * direction) @ shape_row[k] @ (t * direction) - 1.0, 0.0, 100.0, xtol=1e-14)
            smallest = min(smallest, np.linalg.norm(d) - boundary)
    assert result.min_margin_m == pytest.approx(smallest, abs=1e-9)
    # Within a few centimetres for the unicycle (exact rollout of linearised plans, see above).
    assert result.min_margin_m >= (-5e-2 if settings.robot_model == "unicycle" else -1e-5)


def test_warm_started_cycles_stay_feasible(planner):
    settings, mpc = planner
    mpc.reset()
    x = X0.copy()
    result = mpc.solve(x, P0, GOAL, scene())
    assert result.success
    for cycle in range(1, 6):
        x = result.states[1]
        result = mpc.solve(x, P0, GOAL, scene(offset_s=cycle * DT), elapsed_s=DT)
        assert result.success, (cycle, result.status, result.solver_status)
        assert_dynamics_and_bounds(mpc.model, settings, result, x)
        constraints = result.constraints
        used = constraints.used
        # Shapes from the planner's own semi-axes and headings, by the rotated diagonal form.
        shapes = np.empty((used.sum(), N, 2, 2))
        for slot, (axes_row, heading_row) in enumerate(zip(constraints.semi_axes[used], constraints.headings[used])):
            for k in range(N):
                c, s = math.cos(heading_row[k]), math.sin(heading_row[k])
                R = np.array([[c, -s], [s, c]])
                shapes[slot, k] = R @ np.diag(1.0 / axes_row[k] ** 2) @ R.T
            # Never smaller than √2 × (footprint + robot radius): the uncertainty only adds.
            assert np.all(axes_row >= math.sqrt(2.0) * (HALF_EXTENTS + settings.robot_radius_m) - 1e-12)
        np.testing.assert_allclose(constraints.shapes[used], shapes, rtol=1e-10)
        q = quadratic_forms(result, shapes)
        # The unicycle's iterations end as soon as a plan within the bound stops moving by a
        # centimetre: its rollout may sit up to a tenth inside the last tangents' ellipse.
        assert np.all(q >= 1.0 - (1e-1 if settings.robot_model == "unicycle" else 1e-5)), (cycle, q.min())
        assert q.min() < 1.05  # still steering around the standing walker


def test_risk_level_and_mode_change_without_rebuild(planner):
    # Risk enters as numbers: swapping the settings on the built problem (as the planner node does
    # for non-structural changes) changes the ellipses at the next solve.
    settings, mpc = planner
    x0 = X0.copy()
    try:
        axes = {}
        for risk_level, mode in [(0.05, "joint_uniform"), (0.01, "joint_uniform"), (0.05, "per_constraint")]:
            mpc.settings = settings.with_changes(risk_level=risk_level, risk_allocation=mode)
            mpc.reset()
            result = mpc.solve(x0, P0, GOAL, scene())
            assert result.success, result.status
            expected = risk_level / (N * result.obstacles_considered) if mode == "joint_uniform" else risk_level
            assert result.risk_per_constraint == pytest.approx(expected, rel=1e-12)
            used = result.constraints.used
            q = quadratic_forms(result, result.constraints.shapes[used])
            assert np.all(q >= 1.0 - (5e-2 if settings.robot_model == "unicycle" else 1e-5))
            axes[(risk_level, mode)] = result.constraints.semi_axes[used]
        # A smaller per-constraint risk pushes every face further out.
        assert np.all(axes[(0.01, "joint_uniform")] > axes[(0.05, "joint_uniform")])
        assert np.all(axes[(0.05, "per_constraint")] < axes[(0.05, "joint_uniform")])
    finally:
        mpc.settings = settings
        mpc.reset()


def test_pruning_keeps_the_nearest_reachable_obstacles(planner):
    # Two slots for three reachable walkers: the one whose ellipse comes least close to the robot's
    # reach disc is dropped. Independent ranking: gap = ‖o_k − p₀‖ − largest semi-axis − v_max t_k,
    # ellipses with the cautious risk α/(N·forecast obstacles) and the robot covariance along the
    # zero-input rollout (the first iterate of a cold start).
    settings, _ = planner
    settings = settings.with_changes(max_obstacles=2)
    mpc = ChanceConstrainedMPC(settings)
    x0 = X0.copy()
    forecast = scene()
    result = mpc.solve(x0, P0, GOAL, forecast)
    assert result.success, result.status
    assert (result.obstacles_considered, result.obstacles_dropped) == (2, 1)
    robot_cov = robot_position_covariances(mpc.model, settings, x0)
    cautious = settings.risk_level / (N * forecast.track_count)
    closest_gap = {}
    for j, track in enumerate(forecast.track_ids):
        gaps = []
        for k in range(N):
            A = first_principles_shape(HALF_EXTENTS, forecast.headings[j, k], settings.robot_radius_m,
                                       forecast.covariances[j, k] + robot_cov[k], cautious)
            largest_semi_axis = 1.0 / math.sqrt(np.linalg.eigvalsh(A).min())
            gaps.append(np.linalg.norm(forecast.positions[j, k] - x0[0:2]) - largest_semi_axis
                        - settings.max_speed_mps * DT * (k + 1))
        closest_gap[int(track)] = min(gaps)
    reachable = sorted((gap, track) for track, gap in closest_gap.items() if gap <= 0.0)
    assert len(reachable) == 3
    assert [track for _, track in reachable[:2]] == list(result.constraints.track_ids[result.constraints.used])
    # The dropped walker still counts in the split: α over every reachable obstacle.
    assert result.risk_per_constraint == pytest.approx(settings.risk_level / (N * 3), rel=1e-12)


def test_obstacle_on_the_robot_is_infeasible_without_exception(planner):
    settings, mpc = planner
    mpc.reset()
    x0 = X0.copy()
    times = DT * np.arange(1, N + 1)
    on_robot = ObstacleForecast([5], times, np.zeros((1, N, 2)), np.zeros((1, N)),
                                np.tile(0.01 * np.eye(2), (1, N, 1, 1)), [[0.3, 0.3]])
    result = mpc.solve(x0, P0, GOAL, on_robot)
    assert result.success is False
    # Every position reachable in one step is inside the walker's grown box: shown infeasible.
    assert result.status == "infeasible", result.status
    # The planner recovers on the next cycle once the input is sane again.
    recovered = mpc.solve(x0, P0, GOAL, scene())
    assert recovered.success, recovered.status


@pytest.fixture(scope="module", params=["double_integrator", "unicycle"])
def hard_and_soft(request):
    hard = BASE.with_changes(robot_model=request.param)
    soft = hard.with_changes(infeasible_response="least_violation")
    return hard, ChanceConstrainedMPC(hard), ChanceConstrainedMPC(soft)


def test_least_violation_gives_the_hard_plan_when_one_exists(hard_and_soft):
    # Exact L1 penalty: when the hard problem is feasible and ρ exceeds its largest constraint
    # multiplier, its solution solves the penalised problem too (Numerical Optimization, 2nd ed.,
    # 2006, Sec. 17.2, Theorem 17.3, value from memory). Checked on the four-walker scene.
    settings, hard, soft = hard_and_soft
    hard.reset()
    soft.reset()
    expected = hard.solve(X0, P0, GOAL, scene())
    got = soft.solve(X0, P0, GOAL, scene())
    assert expected.status in ("solved", "feasible_not_converged"), expected.status
    assert got.status == expected.status, (expected.status, got.status)
    assert got.max_violation <= 1e-4
    np.testing.assert_allclose(got.states, expected.states, atol=2e-3)
    assert got.cost == pytest.approx(expected.cost, rel=1e-3)


def test_least_violation_gives_the_hard_plan_when_one_exists_interior_point(hard_and_soft):
    # The same theorem on the interior-point path, whose multipliers show its condition holds.
    settings, _, _ = hard_and_soft
    hard = ChanceConstrainedMPC(settings.with_changes(solver="ipopt"))
    soft = ChanceConstrainedMPC(settings.with_changes(solver="ipopt", infeasible_response="least_violation"))
    expected = hard.solve(X0, P0, GOAL, scene())
    got = soft.solve(X0, P0, GOAL, scene())
    assert expected.status == "solved" and got.status == "solved", (expected.status, got.status)
    obstacle_multipliers = hard._multipliers[1].reshape(N, -1)[:, -settings.max_obstacles:]
    assert np.max(np.abs(obstacle_multipliers)) < VIOLATION_PENALTY / 10  # the theorem's condition, with margin
    assert np.max(np.abs(obstacle_multipliers)) > 1e-3  # an ellipse is active: the check has teeth
    assert got.max_violation <= 1e-4
    np.testing.assert_allclose(got.states, expected.states, atol=2e-3)
    assert got.cost == pytest.approx(expected.cost, rel=1e-3)


def test_least_violation_moves_away_from_an_obstacle_on_the_robot(hard_and_soft):
    # A walker standing where the robot is: no plan meets its ellipse (the hard problem fails and
    # the robot would be stopped). The least-violation plan is a usable motion that leaves it.
    settings, hard, soft = hard_and_soft
    hard.reset()
    soft.reset()
    times = DT * np.arange(1, N + 1)
    on_robot = ObstacleForecast([5], times, np.tile([[0.1, 0.05]], (1, N, 1)), np.zeros((1, N)),
                                np.tile(0.01 * np.eye(2), (1, N, 1, 1)), [[0.3, 0.3]])
    assert hard.solve(X0, P0, GOAL, on_robot).success is False
    result = soft.solve(X0, P0, GOAL, on_robot)
    assert result.success and result.status == "least_violation", result.status
    assert result.max_violation > 0.1 and result.min_margin_m < 0.0
    assert result.risk_charged > settings.risk_level  # outside the bound, and the result says so
    assert_dynamics_and_bounds(soft.model, settings, result, X0)
    distance = np.linalg.norm(result.states[:, 0:2] - [0.1, 0.05], axis=1)
    assert distance[-1] > distance[0] + 0.5
    forms = quadratic_forms(result, result.constraints.shapes[result.constraints.used])
    assert forms[0, -1] > forms[0, 0]  # deeper inside at the start than at the end
    # The next cycle, with the obstacle gone, is an ordinary solve again.
    assert soft.solve(X0, P0, GOAL, scene()).status in ("solved", "feasible_not_converged")


@pytest.mark.parametrize("what", ["state", "covariance", "goal", "forecast_nan", "forecast_grid"])
def test_bad_input_is_reported_not_raised(planner, what):
    settings, mpc = planner
    x0, P, goal, forecast = X0.copy(), P0.copy(), GOAL.copy(), scene()
    if what == "state":
        x0 = x0.copy()
        x0[1] = math.nan
    elif what == "covariance":
        P[0, 0] = math.inf
    elif what == "goal":
        goal[0] = math.nan
    elif what == "forecast_nan":
        forecast.positions[1, 3, 0] = math.nan
    else:
        forecast = forecast.resampled(forecast.times + 0.05)  # times no longer k·Δt
    result = mpc.solve(x0, P, goal, forecast)
    assert result.success is False
    assert result.status.startswith("bad_input"), result.status
