"""Discrete-time robot models for the planner: dynamics, Jacobians and odometry conversion.

Each model is written once symbolically (CasADi SX); the numeric step and the Jacobians
F = ∂f/∂x, G = ∂f/∂u are CasADi functions generated from it, so the planner, the covariance
propagation and the tests all use the same equations.

Double integrator (multirotor at fixed altitude, holonomic base), exact discretisation with
zero-order-hold acceleration:
    x = [p_x, p_y, v_x, v_y] (world frame),  u = [a_x, a_y]
    p⁺ = p + v Δt + ½ a Δt²,   v⁺ = v + a Δt

Unicycle (differential drive), midpoint discretisation:
    x = [p_x, p_y, θ, v],  u = [a, ω]   (a: longitudinal acceleration, ω: turn rate)
    v̄ = v + ½ a Δt,  θ̄ = θ + ½ ω Δt
    p⁺ = p + v̄ Δt [cos θ̄, sin θ̄],   θ⁺ = θ + ω Δt,   v⁺ = v + a Δt
"""

from dataclasses import dataclass

import casadi as ca
import numpy as np

ROBOT_MODELS = ("double_integrator", "unicycle")


@dataclass(frozen=True)
class VelocityCommand:
    """A twist in the robot body frame (REP-103: x forward, y left, z up)."""

    linear_x: float
    linear_y: float
    angular_z: float


def _rotation(yaw):
    c, s = np.cos(yaw), np.sin(yaw)
    return np.array([[c, -s], [s, c]])


class RobotModel:
    """Common machinery: numeric step and Jacobians compiled from the symbolic `discrete_step`."""

    name = ""
    state_names = ()
    input_names = ()

    def __init__(self):
        x = ca.SX.sym("x", self.state_dim)
        u = ca.SX.sym("u", self.input_dim)
        dt = ca.SX.sym("dt")
        x_next = self.discrete_step(x, u, dt)
        self._step = ca.Function("step", [x, u, dt], [x_next])
        self._jacobians = ca.Function(
            "jacobians", [x, u, dt], [ca.jacobian(x_next, x), ca.jacobian(x_next, u)]
        )
        self._covariance_sequences = {}
        self._horizon_functions = {}

    @property
    def state_dim(self):
        return len(self.state_names)

    @property
    def input_dim(self):
        return len(self.input_names)

    def discrete_step(self, x, u, dt):
        raise NotImplementedError

    def step(self, x, u, dt):
        """Numeric x⁺ = f(x, u, Δt)."""
        return np.asarray(self._step(x, u, dt)).ravel()

    def jacobians(self, x, u, dt):
        """Return (F, G): the state and input Jacobians of the discrete step at (x, u)."""
        F, G = self._jacobians(x, u, dt)
        return np.asarray(F), np.asarray(G)

    def rollout(self, x0, inputs, dt):
        """States (N+1, n) obtained by applying `inputs` (N, m) from x0."""
        states = [np.asarray(x0, dtype=float)]
        for u in inputs:
            states.append(self.step(states[-1], u, dt))
        return np.array(states)

    def input_noise_covariance(self, accel_sigma, turn_sigma):
        """Covariance of the white input noise w in x⁺ = f(x, u + w); Q = G cov(w) Gᵀ."""
        raise NotImplementedError

    def covariance_sequence_function(self, steps):
        """CasADi function (X (n×N+1), U (m×N), Δt, P₀, σ_a, σ_ω) → [P₀ … P_N] stacked as (n·(N+1))×n.

        P_{k+1} = F_k P_k F_kᵀ + G_k W G_kᵀ, generated once per horizon length so that one call
        propagates the whole horizon (a per-step Python loop costs milliseconds).
        """
        if steps not in self._covariance_sequences:
            n, m = self.state_dim, self.input_dim
            X = ca.SX.sym("X", n, steps + 1)
            U = ca.SX.sym("U", m, steps)
            dt = ca.SX.sym("dt")
            P0 = ca.SX.sym("P0", n, n)
            sigma_a = ca.SX.sym("sigma_a")
            sigma_w = ca.SX.sym("sigma_w")
            W = self.input_noise_covariance(sigma_a, sigma_w)
            P = 0.5 * (P0 + P0.T)
            blocks = [P]
            for k in range(steps):
                F, G = self._jacobians(X[:, k], U[:, k], dt)
                P = F @ P @ F.T + G @ W @ G.T
                P = 0.5 * (P + P.T)
                blocks.append(P)
            self._covariance_sequences[steps] = ca.Function(
                f"covariance_sequence_{steps}", [X, U, dt, P0, sigma_a, sigma_w], [ca.vertcat(*blocks)]
            )
        return self._covariance_sequences[steps]

    def horizon_function(self, steps):
        """CasADi function (x₀, U (m×N), Δt) → (X (n×N+1), J (n·N × m·N)), generated once per horizon.

        X is the rollout of U from x₀ and J = ∂vec(x₁ … x_N)/∂vec(U) its Jacobian, so that
        x(U') ≈ x(U) + J (U' − U) near U: the condensed linearisation of the dynamics (exact for the
        double integrator). One call replaces a per-step Python loop.
        """
        if steps not in self._horizon_functions:
            n, m = self.state_dim, self.input_dim
            x0 = ca.SX.sym("x0", n)
            U = ca.SX.sym("U", m, steps)
            dt = ca.SX.sym("dt")
            states = [x0]
            for k in range(steps):
                states.append(self.discrete_step(states[-1], U[:, k], dt))
            future = ca.vertcat(*states[1:])
            self._horizon_functions[steps] = ca.Function(
                f"horizon_{steps}", [x0, U, dt], [ca.horzcat(*states), ca.densify(ca.jacobian(future, ca.vec(U)))])
        return self._horizon_functions[steps]

    @staticmethod
    def position(states):
        """Planar positions (…, 2) of states (…, n): the first two components in every model."""
        return np.asarray(states)[..., :2]


class DoubleIntegrator(RobotModel):
    """Planar double integrator: holonomic base or multirotor holding altitude."""

    name = "double_integrator"
    state_names = ("p_x", "p_y", "v_x", "v_y")
    input_names = ("a_x", "a_y")

    def discrete_step(self, x, u, dt):
        p, v = x[0:2], x[2:4]
        return ca.vertcat(p + v * dt + 0.5 * u * dt**2, v + u * dt)

    def state_from_odometry(self, position, yaw, body_velocity, pose_cov, twist_cov):
        """State and covariance from odometry (pose in the planning frame, twist in the body frame).

        pose_cov and twist_cov are the 6×6 row-major covariances of nav_msgs/Odometry
        (x, y, z, roll, pitch, yaw); the body-frame velocity is rotated into the planning frame.
        """
        R = _rotation(yaw)
        v_world = R @ np.asarray(body_velocity[:2], dtype=float)
        P = np.zeros((4, 4))
        P[0:2, 0:2] = pose_cov[0:2, 0:2]
        P[2:4, 2:4] = R @ twist_cov[0:2, 0:2] @ R.T
        return np.array([position[0], position[1], v_world[0], v_world[1]]), P

    def command(self, states, inputs, yaw):
        """Velocity to hold over the first step (the planned velocity at its end), in the body frame."""
        v_body = _rotation(yaw).T @ states[1, 2:4]
        return VelocityCommand(float(v_body[0]), float(v_body[1]), 0.0)

    def speed(self, states):
        return np.linalg.norm(np.asarray(states)[..., 2:4], axis=-1)

    def input_noise_covariance(self, accel_sigma, turn_sigma):
        """Discrete white-noise acceleration: W = diag(σ_a², σ_a²)."""
        return ca.diag(ca.vertcat(accel_sigma**2, accel_sigma**2))


class Unicycle(RobotModel):
    """Differential-drive base: forward speed and turn rate, no lateral motion."""

    name = "unicycle"
    state_names = ("p_x", "p_y", "theta", "v")
    input_names = ("a", "omega")

    def discrete_step(self, x, u, dt):
        theta_mid = x[2] + 0.5 * u[1] * dt
        v_mid = x[3] + 0.5 * u[0] * dt
        return ca.vertcat(
            x[0] + v_mid * dt * ca.cos(theta_mid),
            x[1] + v_mid * dt * ca.sin(theta_mid),
            x[2] + u[1] * dt,
            x[3] + u[0] * dt,
        )

    def state_from_odometry(self, position, yaw, body_velocity, pose_cov, twist_cov):
        """State and covariance from odometry; indices 0, 1, 5 of the pose covariance are x, y, yaw."""
        idx = [0, 1, 5]
        P = np.zeros((4, 4))
        P[0:3, 0:3] = pose_cov[np.ix_(idx, idx)]
        P[3, 3] = twist_cov[0, 0]
        return np.array([position[0], position[1], yaw, body_velocity[0]]), P

    def command(self, states, inputs, yaw):
        """Forward speed at the end of the first step and the first turn rate."""
        return VelocityCommand(float(states[1, 3]), 0.0, float(inputs[0, 1]))

    def speed(self, states):
        return np.abs(np.asarray(states)[..., 3])

    def input_noise_covariance(self, accel_sigma, turn_sigma):
        """Noise on the commanded acceleration and turn rate: W = diag(σ_a², σ_ω²)."""
        return ca.diag(ca.vertcat(accel_sigma**2, turn_sigma**2))


def make_robot_model(name):
    """Return the robot model called `name` (one of ROBOT_MODELS)."""
    if name == "double_integrator":
        return DoubleIntegrator()
    if name == "unicycle":
        return Unicycle()
    raise ValueError(f"robot_model={name!r} is not one of {ROBOT_MODELS}")
