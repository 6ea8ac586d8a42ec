"""Robot models: discrete dynamics, Jacobians, covariance propagation and odometry conversion."""

import math

import numpy as np
import pytest

from riskbound.motion.covariance import propagate_along_trajectory
from riskbound.motion.robot_models import ROBOT_MODELS, make_robot_model


@pytest.fixture(scope="module")
def double_integrator():
    return make_robot_model("double_integrator")


@pytest.fixture(scope="module")
def unicycle():
    return make_robot_model("unicycle")


def textbook_double_integrator(dt):
    """Zero-order-hold discretisation of the planar double integrator.

    F = [[I, Δt I], [0, I]], G = [[Δt²/2 I], [Δt I]]: common practice (the same matrices are the
    kinematic constant-velocity/white-acceleration model of Estimation with Applications to
    Tracking and Navigation (2001), §6.3; section number from memory).
    """
    I, Z = np.eye(2), np.zeros((2, 2))
    return np.block([[I, dt * I], [Z, I]]), np.vstack([0.5 * dt**2 * I, dt * I])


def central_differences(function, point, h=1e-6):
    point = np.asarray(point, dtype=float)
    columns = []
    for i in range(len(point)):
        e = np.zeros_like(point)
        e[i] = h
        columns.append((function(point + e) - function(point - e)) / (2.0 * h))
    return np.column_stack(columns)


def rotation(yaw):
    c, s = math.cos(yaw), math.sin(yaw)
    return np.array([[c, -s], [s, c]])


# --- double integrator ----------------------------------------------------------------------------


@pytest.mark.parametrize("dt", [0.02, 0.1, 0.5])
def test_double_integrator_matrices_are_the_textbook_discretisation(double_integrator, dt):
    F_ref, G_ref = textbook_double_integrator(dt)
    rng = np.random.default_rng(1)
    for _ in range(5):
        x, u = rng.normal(size=4), rng.normal(size=2)
        F, G = double_integrator.jacobians(x, u, dt)
        np.testing.assert_allclose(F, F_ref, atol=1e-15)
        np.testing.assert_allclose(G, G_ref, atol=1e-15)
        np.testing.assert_allclose(double_integrator.step(x, u, dt), F_ref @ x + G_ref @ u, rtol=1e-14, atol=1e-14)


def test_double_integrator_constant_input_rollout_matches_closed_form(double_integrator):
    # p(t) = p₀ + v₀ t + a t²/2, v(t) = v₀ + a t (uniform acceleration; common practice, no source).
    # ZOH discretisation is exact for a piecewise-constant input, so this holds at every step.
    p0, v0, a, dt, steps = np.array([1.0, -2.0]), np.array([0.3, 0.7]), np.array([-0.4, 0.25]), 0.1, 37
    states = double_integrator.rollout(np.concatenate([p0, v0]), np.tile(a, (steps, 1)), dt)
    t = dt * np.arange(steps + 1)[:, None]
    np.testing.assert_allclose(states[:, 0:2], p0 + v0 * t + 0.5 * a * t**2, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(states[:, 2:4], v0 + a * t, rtol=1e-12, atol=1e-12)
    assert states.shape == (steps + 1, 4)


def test_double_integrator_odometry_rotates_body_velocity_into_world(double_integrator):
    rng = np.random.default_rng(6)
    for yaw in [0.0, math.pi / 2, -2.3, 3.0]:
        pose_cov = np.diag(rng.uniform(0.01, 0.1, size=6))
        pose_cov[0, 1] = pose_cov[1, 0] = 0.004
        twist_cov = np.diag(rng.uniform(0.01, 0.1, size=6))
        twist_cov[0, 1] = twist_cov[1, 0] = -0.003
        body = np.array([0.8, -0.3, 0.0])
        x0, P0 = double_integrator.state_from_odometry(np.array([2.0, 3.0, 0.5]), yaw, body, pose_cov, twist_cov)
        R = rotation(yaw)
        np.testing.assert_allclose(x0, [2.0, 3.0, *(R @ body[:2])], atol=1e-14)
        np.testing.assert_allclose(P0[0:2, 0:2], pose_cov[0:2, 0:2])
        np.testing.assert_allclose(P0[2:4, 2:4], R @ twist_cov[0:2, 0:2] @ R.T, atol=1e-15)
        assert np.all(np.linalg.eigvalsh(P0) > 0.0)
    # Facing +y and driving forward means moving along world +y (REP-103 body frame).
    x0, _ = double_integrator.state_from_odometry([0, 0], math.pi / 2, [1.0, 0.0, 0.0], np.eye(6), np.eye(6))
    np.testing.assert_allclose(x0[2:4], [0.0, 1.0], atol=1e-15)


def test_double_integrator_command_is_planned_velocity_in_body_frame(double_integrator):
    yaw = 0.7
    states = np.array([[0.0, 0.0, 0.0, 0.0], [0.01, 0.02, 0.3, 0.4]])
    command = double_integrator.command(states, np.zeros((1, 2)), yaw)
    expected = rotation(yaw).T @ [0.3, 0.4]
    assert (command.linear_x, command.linear_y, command.angular_z) == pytest.approx((*expected, 0.0))
    assert math.hypot(command.linear_x, command.linear_y) == pytest.approx(0.5)


# --- unicycle -------------------------------------------------------------------------------------


def test_unicycle_jacobians_equal_central_differences(unicycle):
    rng = np.random.default_rng(3)
    for _ in range(20):
        x = np.array([*rng.normal(size=2), rng.uniform(-math.pi, math.pi), rng.uniform(-0.5, 2.0)])
        u = np.array([rng.uniform(-2, 2), rng.uniform(-2, 2)])
        dt = rng.uniform(0.02, 0.5)
        F, G = unicycle.jacobians(x, u, dt)
        np.testing.assert_allclose(F, central_differences(lambda z: unicycle.step(z, u, dt), x), atol=1e-6)
        np.testing.assert_allclose(G, central_differences(lambda w: unicycle.step(x, w, dt), u), atol=1e-6)


def test_double_integrator_jacobians_equal_central_differences(double_integrator):
    x, u, dt = np.array([0.3, -1.0, 0.5, 0.2]), np.array([0.4, -0.9]), 0.15
    F, G = double_integrator.jacobians(x, u, dt)
    np.testing.assert_allclose(F, central_differences(lambda z: double_integrator.step(z, u, dt), x), atol=1e-6)
    np.testing.assert_allclose(G, central_differences(lambda w: double_integrator.step(x, w, dt), u), atol=1e-6)


def test_unicycle_straight_line(unicycle):
    # No turning, constant acceleration: the closed form along the heading.
    x0, a, dt, steps = np.array([1.0, 2.0, 0.6, 0.5]), 0.3, 0.1, 20
    states = unicycle.rollout(x0, np.tile([a, 0.0], (steps, 1)), dt)
    t = dt * np.arange(steps + 1)
    distance = 0.5 * t + 0.5 * a * t**2
    np.testing.assert_allclose(states[:, 0], 1.0 + distance * math.cos(0.6), atol=1e-12)
    np.testing.assert_allclose(states[:, 1], 2.0 + distance * math.sin(0.6), atol=1e-12)
    np.testing.assert_allclose(states[:, 3], 0.5 + a * t, atol=1e-12)


def test_unicycle_step_moves_along_the_chord_of_the_exact_arc(unicycle):
    # Constant v and ω trace a circle of radius v/ω; over one step the exact displacement has
    # direction θ + ωΔt/2 and length (2v/ω) sin(ωΔt/2) (circle geometry, common practice, no source).
    # The midpoint step keeps the direction exactly and the length to within a factor sinc(ωΔt/2).
    v, omega, theta, dt = 1.2, 0.8, 0.3, 0.1
    x_next = unicycle.step([0.0, 0.0, theta, v], [0.0, omega], dt)
    chord = 2.0 * v / omega * math.sin(omega * dt / 2.0)
    displacement = x_next[0:2]
    assert math.atan2(displacement[1], displacement[0]) == pytest.approx(theta + omega * dt / 2.0, abs=1e-14)
    assert np.linalg.norm(displacement) == pytest.approx(chord, rel=(omega * dt) ** 2 / 24.0 * 1.01)
    assert x_next[2] == pytest.approx(theta + omega * dt)


def test_unicycle_rollout_stays_on_the_circle(unicycle):
    v, omega, dt, steps = 1.0, 0.5, 0.05, 200
    states = unicycle.rollout([0.0, 0.0, 0.0, v], np.tile([0.0, omega], (steps, 1)), dt)
    centre = np.array([0.0, v / omega])
    radius = np.linalg.norm(states[:, 0:2] - centre, axis=1)
    # Chords of length v Δt instead of the true chord: the radius is off by (ωΔt)²/12 relative,
    # and the end point by the same order; an error of first order in ωΔt would fail both.
    second_order = (omega * dt) ** 2 / 8.0
    np.testing.assert_allclose(radius, v / omega, rtol=second_order)
    t = dt * steps
    on_circle = centre + v / omega * np.array([math.sin(omega * t), -math.cos(omega * t)])
    np.testing.assert_allclose(states[-1, 0:2], on_circle, atol=second_order * v / omega)


def test_unicycle_odometry_and_command(unicycle):
    pose_cov = np.arange(36, dtype=float).reshape(6, 6)
    pose_cov = pose_cov + pose_cov.T
    twist_cov = np.diag([0.04, 0.09, 0.0, 0.0, 0.0, 0.01])
    x0, P0 = unicycle.state_from_odometry([1.0, 2.0, 0.0], 0.4, [0.7, 0.0, 0.0], pose_cov, twist_cov)
    np.testing.assert_allclose(x0, [1.0, 2.0, 0.4, 0.7])
    idx = [0, 1, 5]  # x, y, yaw in nav_msgs/Odometry's 6×6 layout
    np.testing.assert_allclose(P0[0:3, 0:3], pose_cov[np.ix_(idx, idx)])
    assert P0[3, 3] == 0.04 and np.all(P0[3, 0:3] == 0.0)
    command = unicycle.command(np.array([x0, [1.07, 2.03, 0.45, 0.75]]), np.array([[0.5, 0.5]]), 0.4)
    assert (command.linear_x, command.linear_y, command.angular_z) == (0.75, 0.0, 0.5)


def test_unknown_model_is_rejected():
    with pytest.raises(ValueError, match=r"robot_model='tricycle' is not one of"):
        make_robot_model("tricycle")
    assert {make_robot_model(name).name for name in ROBOT_MODELS} == set(ROBOT_MODELS)


# --- covariance propagation -----------------------------------------------------------------------


def numpy_propagation(F_list, G_list, W, P0):
    """P_{k+1} = F_k P_k F_kᵀ + G_k W G_kᵀ (EKF prediction without updates), written as a plain loop."""
    P = [np.asarray(P0, dtype=float)]
    for F, G in zip(F_list, G_list):
        P.append(F @ P[-1] @ F.T + G @ W @ G.T)
    return np.array(P)


def test_double_integrator_covariance_matches_numpy_loop(double_integrator):
    dt, steps, sigma_a = 0.1, 25, 0.3
    rng = np.random.default_rng(8)
    root = rng.normal(size=(4, 4)) * 0.1
    P0 = root @ root.T
    inputs = rng.normal(size=(steps, 2))
    states = double_integrator.rollout(rng.normal(size=4), inputs, dt)
    F, G = textbook_double_integrator(dt)
    expected = numpy_propagation([F] * steps, [G] * steps, sigma_a**2 * np.eye(2), P0)
    got = propagate_along_trajectory(double_integrator, states, inputs, dt, P0, sigma_a)
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-14)


def test_double_integrator_position_variance_closed_form(double_integrator):
    # From rest with P₀ = 0 and white acceleration noise σ², the position variance after k steps is
    # σ²Δt⁴ Σ_{i<k} (i + ½)² = σ²Δt⁴ (4k³ − k)/12 (sum of the discrete kernel; derived by hand).
    dt, steps, sigma_a = 0.1, 30, 0.5
    states = np.zeros((steps + 1, 4))
    P = propagate_along_trajectory(double_integrator, states, np.zeros((steps, 2)), dt, np.zeros((4, 4)), sigma_a)
    k = np.arange(steps + 1)
    np.testing.assert_allclose(P[:, 0, 0], sigma_a**2 * dt**4 * (4 * k**3 - k) / 12.0, rtol=1e-12, atol=1e-18)
    np.testing.assert_allclose(P[:, 2, 2], sigma_a**2 * dt**2 * k, rtol=1e-12, atol=1e-18)


def test_unicycle_covariance_matches_numpy_loop_with_finite_difference_jacobians(unicycle):
    dt, steps, sigma_a, sigma_w = 0.1, 20, 0.25, 0.15
    rng = np.random.default_rng(9)
    inputs = np.column_stack([rng.uniform(-1, 1, steps), rng.uniform(-1, 1, steps)])
    states = unicycle.rollout([0.5, -0.2, 0.3, 0.8], inputs, dt)
    P0 = np.diag([0.01, 0.02, 0.005, 0.03])
    F_list = [central_differences(lambda z: unicycle.step(z, u, dt), x) for x, u in zip(states, inputs)]
    G_list = [central_differences(lambda w: unicycle.step(x, w, dt), u) for x, u in zip(states, inputs)]
    expected = numpy_propagation(F_list, G_list, np.diag([sigma_a**2, sigma_w**2]), P0)
    got = propagate_along_trajectory(unicycle, states, inputs, dt, P0, sigma_a, sigma_w)
    np.testing.assert_allclose(got, expected, rtol=1e-6, atol=1e-9)
    assert np.all(np.linalg.eigvalsh(got) > 0.0)
    np.testing.assert_allclose(got, np.swapaxes(got, 1, 2), atol=1e-15)


def test_covariance_propagation_rejects_bad_input(double_integrator):
    states, inputs = np.zeros((6, 4)), np.zeros((5, 2))
    with pytest.raises(ValueError, match="P0 has shape"):
        propagate_along_trajectory(double_integrator, states, inputs, 0.1, np.eye(3), 0.2)
    with pytest.raises(ValueError, match="states has shape"):
        propagate_along_trajectory(double_integrator, states[:-1], inputs, 0.1, np.eye(4), 0.2)
    bad = states.copy()
    bad[2, 1] = np.nan
    with pytest.raises(ValueError, match="NaN or Inf"):
        propagate_along_trajectory(double_integrator, bad, inputs, 0.1, np.eye(4), 0.2)
