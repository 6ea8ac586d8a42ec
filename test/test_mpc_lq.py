"""MPC without obstacles against the finite-horizon LQ solution computed independently.

With the double integrator, no obstacle and no active bound, the MPC problem is the discrete
finite-horizon LQ regulator about x_ref = [r, 0, 0] (cost of planning/mpc.py):

    J = Σ_{k=0}^{N−1} (e_kᵀ Q e_k + u_kᵀ R u_k) + e_Nᵀ Q_N e_N,   e_k = x_k − x_ref
    Q = diag(w_g, w_g, w_s, w_s),  R = w_a I,  Q_N = diag(w_T, w_T, w_s, w_s)

solved here by the backward Riccati recursion (discrete LQ regulator; common practice, no source)
and, as a cross-check, by the equality-constrained QP's KKT system with numpy.linalg.solve.
"""

import numpy as np
import pytest
import scipy.linalg

from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import PlannerSettings

N, DT = 12, 0.1
WEIGHTS = {"weight_goal": 1.5, "weight_terminal": 12.0, "weight_speed": 0.2, "weight_accel": 0.15}
SETTINGS = PlannerSettings(
    horizon_steps=N, step_s=DT, max_speed_mps=20.0, max_accel_mps2=20.0, goal_reach_m=1e3,
    solver_tolerance=1e-10, solver_max_iter=3000, solver_time_fraction=1.0, control_rate_hz=1.0,
    **WEIGHTS)


@pytest.fixture(scope="module")
def mpc():
    return ChanceConstrainedMPC(SETTINGS)


def lq_matrices(settings):
    I, Z = np.eye(2), np.zeros((2, 2))
    dt = settings.step_s
    F = np.block([[I, dt * I], [Z, I]])
    G = np.vstack([0.5 * dt**2 * I, dt * I])
    w_g, w_T, w_s, w_a = settings.weight_goal, settings.weight_terminal, settings.weight_speed, settings.weight_accel
    return F, G, np.diag([w_g, w_g, w_s, w_s]), w_a * I, np.diag([w_T, w_T, w_s, w_s])


def riccati_solution(settings, x0, reference):
    """States (N+1, 4), inputs (N, 2) and cost of the finite-horizon LQ regulator."""
    F, G, Q, R, Q_N = lq_matrices(settings)
    steps = settings.horizon_steps
    P = Q_N
    gains = []
    for _ in range(steps):
        K = scipy.linalg.solve(R + G.T @ P @ G, G.T @ P @ F, assume_a="pos")
        P = Q + F.T @ P @ (F - G @ K)
        gains.append(K)
    gains.reverse()
    x_ref = np.concatenate([reference, [0.0, 0.0]])
    e = np.asarray(x0, dtype=float) - x_ref
    errors, inputs = [e], []
    for K in gains:
        u = -K @ e
        e = F @ e + G @ u
        inputs.append(u)
        errors.append(e)
    errors, inputs = np.array(errors), np.array(inputs)
    cost = (sum(e @ Q @ e + u @ R @ u for e, u in zip(errors[:-1], inputs)) + errors[-1] @ Q_N @ errors[-1])
    # The optimal cost of an LQ regulator is e₀ᵀ P₀ e₀ (value function), a second reference.
    assert cost == pytest.approx(errors[0] @ P @ errors[0], rel=1e-10)
    return errors + x_ref, inputs, cost


def kkt_solution(settings, x0, reference):
    """The same problem as one equality-constrained QP in z = [e₁ … e_N, u₀ … u_{N−1}]."""
    F, G, Q, R, Q_N = lq_matrices(settings)
    steps, n, m = settings.horizon_steps, 4, 2
    x_ref = np.concatenate([reference, [0.0, 0.0]])
    e0 = np.asarray(x0, dtype=float) - x_ref
    nz = steps * (n + m)
    H = np.zeros((nz, nz))
    for k in range(steps):
        H[k * n:(k + 1) * n, k * n:(k + 1) * n] = Q_N if k == steps - 1 else Q
        u = steps * n + k * m
        H[u:u + m, u:u + m] = R
    A = np.zeros((steps * n, nz))
    b = np.zeros(steps * n)
    for k in range(steps):
        rows = slice(k * n, (k + 1) * n)
        A[rows, k * n:(k + 1) * n] = np.eye(n)  # e_{k+1}
        A[rows, steps * n + k * m: steps * n + (k + 1) * m] = -G  # − G u_k
        if k == 0:
            b[rows] = F @ e0
        else:
            A[rows, (k - 1) * n:k * n] = -F  # − F e_k
    kkt = np.block([[2.0 * H, A.T], [A, np.zeros((steps * n, steps * n))]])
    solution = np.linalg.solve(kkt, np.concatenate([np.zeros(nz), b]))
    errors = np.vstack([e0, solution[:steps * n].reshape(steps, n)])
    return errors + x_ref, solution[steps * n:nz].reshape(steps, m)


def empty_forecast(settings):
    return ObstacleForecast.empty(settings.step_s * np.arange(1, settings.horizon_steps + 1))


def assert_bounds_inactive(settings, states, inputs):
    # The comparison is only meaningful if no bound binds: stay well inside them.
    assert np.max(np.abs(inputs)) < 0.5 * settings.max_accel_mps2
    assert np.max(np.linalg.norm(states[:, 2:4], axis=1)) < 0.5 * settings.max_speed_mps


def test_kkt_and_riccati_agree():
    x0 = np.array([0.2, -0.1, 0.3, 0.0])
    states, inputs, _ = riccati_solution(SETTINGS, x0, np.array([1.0, 0.5]))
    kkt_states, kkt_inputs = kkt_solution(SETTINGS, x0, np.array([1.0, 0.5]))
    np.testing.assert_allclose(kkt_states, states, atol=1e-9)
    np.testing.assert_allclose(kkt_inputs, inputs, atol=1e-9)


@pytest.mark.parametrize("goal", [(0.8, -0.5), (-1.5, 2.0), (0.05, 0.0)])
def test_mpc_matches_lq_solution_from_rest(mpc, goal):
    mpc.reset()
    x0 = np.array([0.3, 0.4, 0.0, 0.0])
    goal = np.array(goal)
    result = mpc.solve(x0, 0.01 * np.eye(4), goal, empty_forecast(SETTINGS))
    assert result.success, result.status
    assert result.status == "solved"
    states, inputs, cost = riccati_solution(SETTINGS, x0, goal)
    assert_bounds_inactive(SETTINGS, states, inputs)
    np.testing.assert_allclose(result.states, states, atol=1e-4)
    np.testing.assert_allclose(result.inputs, inputs, atol=1e-4)
    kkt_states, kkt_inputs = kkt_solution(SETTINGS, x0, goal)
    np.testing.assert_allclose(result.states, kkt_states, atol=1e-4)
    np.testing.assert_allclose(result.inputs, kkt_inputs, atol=1e-4)
    assert result.cost == pytest.approx(cost, rel=1e-6, abs=1e-9)
    np.testing.assert_allclose(result.times, DT * np.arange(N + 1))
    assert result.obstacles_considered == 0


def test_warm_started_solve_matches_lq_from_the_next_state(mpc):
    # The second cycle starts from the shifted previous solution (warm start, different IPOPT
    # options); it must still land on the LQ optimum from its own initial state.
    mpc.reset()
    goal = np.array([1.0, -0.6])
    first = mpc.solve(np.zeros(4), 0.01 * np.eye(4), goal, empty_forecast(SETTINGS))
    assert first.success
    x1 = first.states[1] + np.array([0.01, -0.005, 0.02, 0.0])  # the robot did not follow exactly
    second = mpc.solve(x1, 0.01 * np.eye(4), goal, empty_forecast(SETTINGS), elapsed_s=DT)
    assert second.success, second.status
    states, inputs, _ = riccati_solution(SETTINGS, x1, goal)
    np.testing.assert_allclose(second.states, states, atol=1e-4)
    np.testing.assert_allclose(second.inputs, inputs, atol=1e-4)


def test_moving_start_matches_lq(mpc):
    mpc.reset()
    x0 = np.array([0.0, 0.0, 0.6, -0.4])
    goal = np.array([0.5, 0.5])
    result = mpc.solve(x0, 0.01 * np.eye(4), goal, empty_forecast(SETTINGS))
    assert result.success
    states, inputs, _ = riccati_solution(SETTINGS, x0, goal)
    assert_bounds_inactive(SETTINGS, states, inputs)
    np.testing.assert_allclose(result.states, states, atol=1e-4)
    np.testing.assert_allclose(result.inputs, inputs, atol=1e-4)


def test_far_goal_is_tracked_through_the_clipped_reference():
    # goal_reach_m = 0: the reference is the goal pulled back to max_speed·horizon from the robot.
    settings = SETTINGS.with_changes(goal_reach_m=0.0, max_speed_mps=2.0, weight_accel=5.0)
    mpc = ChanceConstrainedMPC(settings)
    x0 = np.array([1.0, 1.0, 0.0, 0.0])
    goal = np.array([31.0, 41.0])  # 50 m away along (0.6, 0.8)
    reach = settings.max_speed_mps * settings.horizon_steps * settings.step_s
    reference = x0[0:2] + reach * np.array([0.6, 0.8])
    result = mpc.solve(x0, 0.01 * np.eye(4), goal, empty_forecast(settings))
    assert result.success
    states, inputs, _ = riccati_solution(settings, x0, reference)
    assert_bounds_inactive(settings, states, inputs)
    np.testing.assert_allclose(result.states, states, atol=1e-4)
    np.testing.assert_allclose(result.inputs, inputs, atol=1e-4)
