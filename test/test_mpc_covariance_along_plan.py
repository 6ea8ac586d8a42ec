"""A unicycle at rest with an uncertain heading: the plan's risk is charged along the plan's own covariance.

Planned from rest, a zero-input guess keeps the robot standing, so heading uncertainty never turns
into sideways position uncertainty there; along a plan that drives off it does. The charge the
planner reports must be the bound computed along the returned plan (recomputed here by a plain
numpy propagation with finite-difference Jacobians), and flying the plan open loop with the
nonlinear unicycle must not collide more often than α.
"""

import math

import numpy as np
from scipy.stats import beta

from riskbound.clearance import disc_box_clearance
from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import PlannerSettings
from test_mpc_obstacles import independent_charge, robot_position_covariances

N, DT = 20, 0.1
ALPHA = 0.05
YAW_SIGMA_RAD = 0.12
PERSON_SIGMA_M = 0.03
HALF_EXTENTS = (0.25, 0.2)
DRAWS = 40_000


def standing_persons():
    times = DT * np.arange(1, N + 1)
    positions = np.tile(np.array([[2.5, 0.6], [1.2, -0.9]])[:, None, :], (1, N, 1))
    covariances = np.tile(PERSON_SIGMA_M**2 * np.eye(2), (2, N, 1, 1))
    return ObstacleForecast([1, 2], times, positions, np.zeros((2, N)), covariances, np.tile(HALF_EXTENTS, (2, 1)))


def test_charge_and_monte_carlo_along_the_returned_plan():
    settings = PlannerSettings(robot_model="unicycle", risk_level=ALPHA, control_rate_hz=1.0,
                               solver_time_fraction=1.0)
    mpc = ChanceConstrainedMPC(settings)
    x0 = np.zeros(4)  # at rest at the origin, facing +x
    P0 = np.diag([0.02**2, 0.02**2, YAW_SIGMA_RAD**2, 0.01**2])
    forecast = standing_persons()
    result = mpc.solve(x0, P0, np.array([5.0, 0.0]), forecast)
    assert result.success, result.status
    assert np.linalg.norm(result.states[-1, 0:2]) > 1.0  # it drives off: the case the defect was about

    along_plan = robot_position_covariances(mpc.model, settings, x0, result.states, result.inputs, initial=P0)
    # The heading uncertainty has turned into sideways uncertainty along the plan.
    heading = result.states[-1, 2]
    sideways = np.array([-math.sin(heading), math.cos(heading)])
    assert math.sqrt(sideways @ along_plan[-1] @ sideways) > 0.1
    charge = independent_charge(result, forecast, settings, along_plan)
    assert abs(result.risk_charged - charge) <= 1e-4 * charge + 1e-10
    assert charge <= ALPHA

    # Fly the plan open loop: start drawn from P0, white noise on the inputs as the planner assumes,
    # the exact unicycle step; persons drawn from their forecasts.
    rng = np.random.default_rng(42)
    x = rng.multivariate_normal(x0, P0, size=DRAWS)
    noise = np.array([settings.robot_accel_noise, settings.robot_turn_noise])
    collided = np.zeros(DRAWS, dtype=bool)
    for k in range(N):
        u = result.inputs[k] + rng.normal(size=(DRAWS, 2)) * noise
        theta_mid, v_mid = x[:, 2] + 0.5 * u[:, 1] * DT, x[:, 3] + 0.5 * u[:, 0] * DT
        x = np.stack([x[:, 0] + v_mid * DT * np.cos(theta_mid), x[:, 1] + v_mid * DT * np.sin(theta_mid),
                      x[:, 2] + u[:, 1] * DT, x[:, 3] + u[:, 0] * DT], axis=1)
        for j in range(forecast.track_count):
            person = rng.multivariate_normal(forecast.positions[j, k], forecast.covariances[j, k], size=DRAWS)
            collided |= disc_box_clearance(x[:, 0:2], settings.robot_radius_m, person, 0.0, HALF_EXTENTS) < 0.0
    hits = int(collided.sum())
    # Not significantly above α: the one-sided 95 % Clopper–Pearson lower bound (exact binomial
    # interval from beta quantiles, scipy.stats.beta) must not exceed α.
    lower = 0.0 if hits == 0 else beta.ppf(0.05, hits, DRAWS - hits + 1)
    assert lower <= ALPHA, (hits, DRAWS)
