"""The unicycle motion model of tracked people: batched and as a filterpy ExtendedKalmanFilter.

Unicycle (constant turn rate and speed; the coordinated-turn model of
Estimation with Applications to Tracking and Navigation, ch. 11),
state [x, y, θ, v, ω], exact for constant v and ω:
    with a = ½ωΔt and sinc(a) = sin(a)/a
    x⁺ = x + vΔt sinc(a) cos(θ + a)      y⁺ = y + vΔt sinc(a) sin(θ + a)
    θ⁺ = θ + ωΔt                         v⁺ = v,   ω⁺ = ω
    Q = σ_a² Γ_a Γ_aᵀ + σ_α² Γ_α Γ_αᵀ,   Γ_a = [½Δt² cos θ, ½Δt² sin θ, 0, Δt, 0]ᵀ,
                                          Γ_α = [0, 0, ½Δt², 0, Δt]ᵀ
(σ_a: white longitudinal acceleration, σ_α: white turn-rate change). The sinc form has no
singularity at ω = 0, where it reduces to straight-line motion.

Notation and the shared update: `motion_model.py`.
"""

import numpy as np
from filterpy.kalman import ExtendedKalmanFilter

from riskbound.tracking.constant_velocity import ConstantVelocityModel
from riskbound.tracking.motion_model import MotionModel, batch_transpose, direction_of_travel, wrap_angle

# Heading variance of an angle about which nothing is known: uniform on a circle (π²/3).
UNKNOWN_HEADING_VARIANCE = np.pi**2 / 3.0


def _sinc(a):
    """sin(a)/a with its limit 1 at a = 0 (no cancellation near 0: both factors are exact)."""
    a = np.asarray(a, dtype=float)
    return np.divide(np.sin(a), a, out=np.ones_like(a), where=a != 0.0)


def _sinc_derivative(a):
    """d/da sin(a)/a = (cos a − sin(a)/a)/a, by its series −a/3 + a³/30 near 0 (cancellation)."""
    a = np.asarray(a, dtype=float)
    small = np.abs(a) < 1e-3
    safe = np.where(small, 1.0, a)
    return np.where(small, a * (a * a / 30.0 - 1.0 / 3.0), (np.cos(safe) - np.sin(safe) / safe) / safe)


class UnicycleEKF(ExtendedKalmanFilter):
    """filterpy's extended Kalman filter with the unicycle's nonlinear prediction x⁻ = f(x, Δt)."""

    def __init__(self, model, x, P):
        super().__init__(dim_x=5, dim_z=2)
        self.model = model
        self.x = np.asarray(x, dtype=float).reshape(5, 1)
        self.P = np.asarray(P, dtype=float).copy()
        self.R = model.R(False)
        self._dt = 0.0

    def predict_x(self, u=0):
        self.x = self.model.normalise(self.model.f(self.x.T, self._dt)).T

    def predict_dt(self, dt):
        """F = ∂f/∂x and Q at the current estimate, then filterpy's predict (P⁻ = F P Fᵀ + Q)."""
        self._dt = dt
        self.F = self.model.jacobian(self.x.T, dt)[0]
        self.Q = self.model.process_noise(self.x.T, dt)[0]
        self.predict()


class UnicycleModel(MotionModel):
    """Constant turn rate and speed, state [x, y, θ, v, ω]; heading measurable."""

    name = "unicycle"
    state_names = ("x", "y", "theta", "v", "omega")
    heading_index = 2

    def f(self, X, dt):
        """x⁺ = f(x, Δt) for states X (J, 5)."""
        return self.transition(X, dt, with_jacobian=False)[0]

    def jacobian(self, X, dt):
        """F = ∂f/∂x (J, 5, 5)."""
        return self.transition(X, dt)[1]

    def transition(self, X, dt, with_jacobian=True):
        """f(X, Δt) and, sharing its trigonometry, F = ∂f/∂x (J, 5, 5) (None when not with_jacobian).

        Δt is a number or one interval per state (J,).
        """
        theta, v, omega = X[:, 2], X[:, 3], X[:, 4]
        a = 0.5 * dt * omega
        s = _sinc(a)
        c, sn = np.cos(theta + a), np.sin(theta + a)
        vs_dt = v * dt * s
        X_next = X.copy()
        X_next[:, 0] += vs_dt * c
        X_next[:, 1] += vs_dt * sn
        X_next[:, 2] = theta + omega * dt
        if not with_jacobian:
            return X_next, None
        ds_term = (0.5 * dt * dt) * v * _sinc_derivative(a)
        F = np.zeros((len(X), 5, 5))
        F.reshape(len(X), 25)[:, ::6] = 1.0
        F[:, 0, 2] = -vs_dt * sn
        F[:, 1, 2] = vs_dt * c
        F[:, 0, 3] = dt * s * c
        F[:, 1, 3] = dt * s * sn
        F[:, 0, 4] = ds_term * c - 0.5 * dt * vs_dt * sn
        F[:, 1, 4] = ds_term * sn + 0.5 * dt * vs_dt * c
        F[:, 2, 4] = dt
        return X_next, F

    def mean_at(self, X, offsets_s):
        """Noise-free states (J, S, 5) at each offset (S,) after X (J, 5).

        The constant-turn step is exact for any Δt, so f(x, t_k) in one step equals k steps of
        t_k/k: all offsets are evaluated in one batched call.
        """
        J, S = len(X), len(offsets_s)
        states = self.transition(np.repeat(X, S, axis=0), np.tile(offsets_s, J), with_jacobian=False)[0]
        return self.normalise(states).reshape(J, S, 5)

    def process_noise(self, X, dt):
        """Q = σ_a² Γ_a Γ_aᵀ + σ_α² Γ_α Γ_αᵀ (J, 5, 5) for an interval of length |Δt|."""
        dt = abs(float(dt))
        half_dt2 = 0.5 * dt * dt
        G_a = np.empty((len(X), 3))
        G_a[:, 0] = half_dt2 * np.cos(X[:, 2])
        G_a[:, 1] = half_dt2 * np.sin(X[:, 2])
        G_a[:, 2] = dt
        Q = np.zeros((len(X), 5, 5))
        # Γ_a has no heading or turn-rate entries: fill only its (x, y, v) block.
        Q[:, [[0], [1], [3]], [0, 1, 3]] = self.accel_noise_mps2**2 * G_a[:, :, None] * G_a[:, None, :]
        turn = self.turn_noise_radps2**2
        Q[:, 2, 2] = turn * half_dt2**2
        Q[:, 2, 4] = Q[:, 4, 2] = turn * half_dt2 * dt
        Q[:, 4, 4] = turn * dt * dt
        return Q

    def normalise(self, X):
        X[:, 2] = wrap_angle(X[:, 2])
        return X

    def velocity(self, X):
        return X[:, 3:4] * np.stack([np.cos(X[:, 2]), np.sin(X[:, 2])], axis=1)

    def heading(self, X, P):
        """The heading state; reliable when its standard deviation is below 45°."""
        return X[:, 2].copy(), P[:, 2, 2] < (np.pi / 4.0) ** 2

    def from_position_velocity(self, X, P, heading):
        """Heading and speed from the velocity u, or from a measured heading.

        Measured heading h: θ = h (variance σ_h², uncorrelated), v = [cos h, sin h]·u;
        otherwise θ = atan2(u_y, u_x), v = |u|. Covariances through the Jacobian J of
        (x, y, θ, v) with respect to (x, y, u): P' = J P Jᵀ. The turn rate starts at 0 with
        variance σ_ω0².
        """
        count = len(X)
        u = X[:, 2:4]
        measured = np.isfinite(heading)
        speed_sq = np.maximum(np.einsum("ji,ji->j", u, u), 1e-18)
        theta = np.where(measured, np.nan_to_num(heading), np.arctan2(u[:, 1], u[:, 0]))
        direction = np.stack([np.cos(theta), np.sin(theta)], axis=1)
        J = np.zeros((count, 4, 4))
        J[:, 0, 0] = J[:, 1, 1] = 1.0
        # Rows θ, v with respect to u. A measured heading does not depend on u.
        J[:, 2, 2] = np.where(measured, 0.0, -u[:, 1] / speed_sq)
        J[:, 2, 3] = np.where(measured, 0.0, u[:, 0] / speed_sq)
        J[:, 3, 2:] = direction
        # A velocity within its own noise says little about the heading and its linearisation
        # overstates that little: scale the heading row so its variance stays at most that of an
        # unknown angle; (θ, v) stays a linear map of u, so P stays positive semi-definite.
        heading_var = np.einsum("ji,jik,jk->j", J[:, 2, 2:], P[:, 2:, 2:], J[:, 2, 2:])
        J[:, 2, 2:] *= np.sqrt(np.minimum(1.0, UNKNOWN_HEADING_VARIANCE
                                          / np.maximum(heading_var, 1e-300)))[:, None]
        P4 = J @ P @ batch_transpose(J)
        P4[:, 2, 2] = np.where(measured, self.heading_noise_rad**2, P4[:, 2, 2])
        X5 = np.zeros((count, 5))
        X5[:, :2] = X[:, :2]
        X5[:, 2] = wrap_angle(theta)
        X5[:, 3] = np.einsum("ji,ji->j", direction, u)
        P5 = np.zeros((count, 5, 5))
        P5[:, :4, :4] = P4
        P5[:, 4, 4] = self.initial_turn_rate_sigma_radps**2
        return X5, P5

    def starting_model(self):
        """Constant velocity with the same noise levels: the heading of a new track is unknown and
        the unicycle's linearisation about an unknown heading is poor."""
        return ConstantVelocityModel(self.accel_noise_mps2, self.position_noise_m, self.heading_noise_rad,
                                     self.initial_speed_sigma_mps, self.turn_noise_radps2,
                                     self.initial_turn_rate_sigma_radps)

    def ready(self, X, P, heading):
        """Hand over once the direction of travel is reliable or the heading was measured."""
        return direction_of_travel(X, P)[1] | np.isfinite(heading)

    def make_filter(self, x, P):
        """A filterpy ExtendedKalmanFilter holding one track."""
        return UnicycleEKF(self, x, P)

    def filter_predict(self, ekf, dt):
        ekf.predict_dt(dt)

    def filter_update(self, ekf, position, heading=np.nan):
        """Position update, with the heading when it is finite."""
        with_heading = bool(np.isfinite(heading))
        H = self.H(with_heading)
        z = np.append(np.asarray(position, dtype=float), heading if with_heading else [])
        ekf.update(z.reshape(-1, 1), HJacobian=lambda x: H, Hx=lambda x: H @ x, R=self.R(with_heading),
                   residual=lambda a, b: self.residual(a.T, b.T).T)
        ekf.x = self.normalise(ekf.x.T).T

