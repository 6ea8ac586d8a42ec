"""Motion models of tracked people and their Kalman filters.

Each model is defined once and used two ways: as a filterpy filter for a single track (the
reference implementation, used by tests and scripts) and as batched numpy operations over all
tracks at once (the tracker's hot path: one call per scan instead of one per track). Tests check
that both give the same numbers.

Notation of Estimation with Applications to Tracking and Navigation (2001), ch. 5: x state, P its
covariance, F transition (Jacobian for the nonlinear model), Q process noise covariance, H
measurement matrix, R measurement noise covariance, y innovation, S its covariance, K gain.

    prediction   x⁻ = f(x, Δt)           P⁻ = F P Fᵀ + Q                (linear model: f(x) = F x)
    update       y = z − H x⁻            S = H P⁻ Hᵀ + R                K = P⁻ Hᵀ S⁻¹
                 x = x⁻ + K y            P = (I − K H) P⁻ (I − K H)ᵀ + K R Kᵀ

The covariance update in this form (filterpy's too, rather than P = (I − K H) P⁻) keeps P
symmetric positive semi-definite under rounding. Measurements are positions, plus the heading when the detection
carries a valid orientation and the model has a heading state; heading innovations are wrapped
to [−π, π).

Every track starts in the constant-velocity filter with a prior on its unknown velocity
(`birth`); unicycle tracks switch to the unicycle state once their direction of travel is
reliable or their heading was measured (`ready`, `from_position_velocity`).

Constant velocity, discrete white-noise acceleration (same book, §6.3.2 — section from memory),
state [x, y, vx, vy]:
    F = [[I, Δt I], [0, I]]       Q = σ_a² Γ Γᵀ per axis,  Γ = [½Δt², Δt]ᵀ

Unicycle (constant turn rate and speed; the coordinated-turn model of the same book, ch. 11),
state [x, y, θ, v, ω], exact for constant v and ω:
    with a = ½ωΔt and sinc(a) = sin(a)/a
    x⁺ = x + vΔt sinc(a) cos(θ + a)      y⁺ = y + vΔt sinc(a) sin(θ + a)
    θ⁺ = θ + ωΔt                         v⁺ = v,   ω⁺ = ω
    Q = σ_a² Γ_a Γ_aᵀ + σ_α² Γ_α Γ_αᵀ,   Γ_a = [½Δt² cos θ, ½Δt² sin θ, 0, Δt, 0]ᵀ,
                                          Γ_α = [0, 0, ½Δt², 0, Δt]ᵀ
(σ_a: white longitudinal acceleration, σ_α: white turn-rate change). The sinc form has no
singularity at ω = 0, where it reduces to straight-line motion.
"""

import numpy as np
from filterpy.common import Q_discrete_white_noise
from filterpy.kalman import ExtendedKalmanFilter, KalmanFilter

MOTION_MODELS = ("constant_velocity", "unicycle")

# Heading variance of an angle about which nothing is known: uniform on a circle (π²/3).
UNKNOWN_HEADING_VARIANCE = np.pi**2 / 3.0


def wrap_angle(angle):
    """Angle(s) wrapped to [−π, π)."""
    return (np.asarray(angle) + np.pi) % (2.0 * np.pi) - np.pi


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


def _inverse_2x2(S):
    """Batched inverse of 2×2 matrices (closed form; numpy's general inverse is slower here)."""
    det = S[..., 0, 0] * S[..., 1, 1] - S[..., 0, 1] * S[..., 1, 0]
    inv = np.empty_like(S)
    inv[..., 0, 0] = S[..., 1, 1] / det
    inv[..., 1, 1] = S[..., 0, 0] / det
    inv[..., 0, 1] = -S[..., 0, 1] / det
    inv[..., 1, 0] = -S[..., 1, 0] / det
    return inv


def _inverse(S):
    return _inverse_2x2(S) if S.shape[-1] == 2 else np.linalg.inv(S)


def _transpose(A):
    return np.swapaxes(A, -1, -2)


def direction_of_travel(X, P):
    """Heading (J,) of constant-velocity states X (J, 4) and whether it is reliable (J,): the
    speed exceeds twice its standard deviation along the velocity."""
    v = X[:, 2:4]
    speed_sq = np.einsum("ji,ji->j", v, v)
    along_var = np.einsum("ji,jik,jk->j", v, P[:, 2:4, 2:4], v) / np.maximum(speed_sq, 1e-12)
    return np.arctan2(v[:, 1], v[:, 0]), speed_sq > 4.0 * along_var


class MotionModel:
    """What both models share: measurement model, batched Kalman update, late-measurement update."""

    name = ""
    state_names = ()
    heading_index = None
    linear = False

    def __init__(self, accel_noise_mps2, position_noise_m, heading_noise_rad, initial_speed_sigma_mps,
                 turn_noise_radps2=1.0, initial_turn_rate_sigma_radps=0.5):
        self.accel_noise_mps2 = float(accel_noise_mps2)
        self.turn_noise_radps2 = float(turn_noise_radps2)
        self.position_noise_m = float(position_noise_m)
        self.heading_noise_rad = float(heading_noise_rad)
        self.initial_speed_sigma_mps = float(initial_speed_sigma_mps)
        self.initial_turn_rate_sigma_radps = float(initial_turn_rate_sigma_radps)

    @property
    def dim_x(self):
        return len(self.state_names)

    @property
    def has_heading(self):
        return self.heading_index is not None

    def H(self, with_heading=False):
        """Measurement matrix: position rows, plus the heading row when it is measured."""
        rows = [0, 1] + ([self.heading_index] if with_heading else [])
        return np.eye(self.dim_x)[rows]

    def R(self, with_heading=False):
        """Measurement noise covariance matching H(with_heading)."""
        variances = [self.position_noise_m**2] * 2 + ([self.heading_noise_rad**2] if with_heading else [])
        return np.diag(variances)

    def residual(self, z, z_predicted):
        """y = z − ẑ with a heading component (index 2) wrapped to [−π, π)."""
        y = np.asarray(z, dtype=float) - np.asarray(z_predicted, dtype=float)
        if y.shape[-1] == 3:
            y[..., 2] = wrap_angle(y[..., 2])
        return y

    def transition(self, X, dt):
        """Return (f(X, Δt) (J, n), F): F is (n, n) when shared by all tracks, else (J, n, n)."""
        raise NotImplementedError

    def process_noise(self, X, dt):
        """Q for an interval of length |Δt|: (n, n) when shared by all tracks, else (J, n, n)."""
        raise NotImplementedError

    def normalise(self, X):
        """Keep angle states in [−π, π) after an update."""
        return X

    def predict(self, X, P, dt):
        """Batched prediction of J tracks by Δt ≥ 0: x⁻ = f(x), P⁻ = F P Fᵀ + Q."""
        X_pred, F = self.transition(X, dt)
        P_pred = F @ P @ _transpose(F) + self.process_noise(X, dt)
        return self.normalise(X_pred), P_pred

    def measurement_prediction(self, X, P):
        """Predicted position measurement ẑ (J, 2) and its innovation covariance S (J, 2, 2)."""
        return X[:, :2].copy(), P[:, :2, :2] + self.R(False)

    def update(self, X, P, z, with_heading=False):
        """Batched Kalman update of J predicted tracks with measurements z (J, 2) or (J, 3).

        y = z − H x⁻,  S = H P⁻ Hᵀ + R,  K = P⁻ Hᵀ S⁻¹,  x = x⁻ + K y,
        P = (I − K H) P⁻ (I − K H)ᵀ + K R Kᵀ
        """
        H, R = self.H(with_heading), self.R(with_heading)
        PHt = P @ H.T
        S = H @ PHt + R
        K = PHt @ _inverse(S)
        y = self.residual(z, X @ H.T)
        X_new = X + np.einsum("jnm,jm->jn", K, y)
        I_KH = np.eye(self.dim_x) - K @ H
        P_new = I_KH @ P @ _transpose(I_KH) + K @ R @ _transpose(K)
        return self.normalise(X_new), P_new

    def retrodict(self, X, P, lag_s):
        """State and covariance `lag_s` seconds before the current estimate, and the backward F.

        x_b = f(x, −lag),  P_b = F_b (P + Q(lag)) F_bᵀ  with F_b = ∂f/∂x at (x, −lag).
        """
        X_back, F_back = self.transition(X, -lag_s)
        P_back = F_back @ (P + self.process_noise(X, lag_s)) @ _transpose(F_back)
        return self.normalise(X_back), P_back, F_back

    def late_measurement_prediction(self, X, P, lag_s):
        """ẑ (J, 2) and S (J, 2, 2) of a position measured `lag_s` seconds ago."""
        X_back, P_back, _ = self.retrodict(X, P, lag_s)
        return self.measurement_prediction(X_back, P_back)

    def late_update(self, X, P, z, lag_s, with_heading=False):
        """Update the current estimate with a measurement taken `lag_s` seconds ago.

        Approximate one-lag out-of-sequence update: the measurement is predicted from the
        retrodicted state, and its covariance with the current state is C = P F_bᵀ Hᵀ;
        K = C S⁻¹, x = x + K y, P = P − K S Kᵀ. The correlation between the current estimation
        error and the process noise over the lag is neglected, which is exact as that noise
        vanishes and costs little for lags of a few scan periods.
        """
        H, R = self.H(with_heading), self.R(with_heading)
        X_back, P_back, F_back = self.retrodict(X, P, lag_s)
        S = H @ P_back @ H.T + R
        C = P @ _transpose(F_back) @ H.T
        K = C @ _inverse(S)
        y = self.residual(z, X_back @ H.T)
        X_new = X + np.einsum("jnm,jm->jn", K, y)
        P_new = P - K @ S @ _transpose(K)
        return self.normalise(X_new), 0.5 * (P_new + _transpose(P_new))

    def velocity(self, X):
        """Planar velocity (J, 2) of each state."""
        raise NotImplementedError

    def heading(self, X, P):
        """Heading (J,) from the state and whether it is reliable (J,) bool."""
        raise NotImplementedError

    def from_position_velocity(self, X, P, heading):
        """Model state and covariance from constant-velocity estimates X (J, 4), P (J, 4, 4);
        heading (J,): measured heading or NaN."""
        raise NotImplementedError

    def starting_model(self):
        """The model a new track is filtered with until its state can be written in this one's."""
        return self

    def ready(self, X, P, heading):
        """Starting-model tracks (J,) whose estimate can be handed over to this model."""
        return np.ones(len(X), dtype=bool)


class ConstantVelocityModel(MotionModel):
    """Constant velocity with discrete white-noise acceleration, state [x, y, vx, vy]."""

    name = "constant_velocity"
    state_names = ("x", "y", "vx", "vy")
    linear = True
    _last_Q = None

    def F(self, dt):
        """F = [[I, Δt I], [0, I]]."""
        F = np.eye(4)
        F[0, 2] = F[1, 3] = dt
        return F

    def Q(self, dt):
        """Q = σ_a² Γ Γᵀ per axis with Γ = [½Δt², Δt]ᵀ (filterpy's discrete white-noise model)."""
        dt = abs(float(dt))
        # Scans come at a steady rate: the last interval's Q is usually the next one's.
        if self._last_Q is None or self._last_Q[0] != dt:
            self._last_Q = (dt, Q_discrete_white_noise(dim=2, dt=dt, var=self.accel_noise_mps2**2,
                                                       block_size=2, order_by_dim=False))
        return self._last_Q[1]

    def transition(self, X, dt):
        F = self.F(dt)
        return X @ F.T, F

    def process_noise(self, X, dt):
        return self.Q(dt)

    def velocity(self, X):
        return X[:, 2:4]

    def heading(self, X, P):
        return direction_of_travel(X, P)

    def from_position_velocity(self, X, P, heading):
        """The state is position and velocity already."""
        return X, P

    def birth(self, positions):
        """Constant-velocity state and covariance of tracks seen once at `positions` (J, 2).

        The velocity is unknown: prior N(0, σ_v0² I) with σ_v0 = initial_speed_sigma_mps, so the
        first prediction spreads the position by σ_v0 Δt in every direction and the next detection
        sets the velocity (two-point differencing, tempered by the prior).
        """
        count = len(positions)
        X = np.zeros((count, 4))
        X[:, :2] = positions
        P = np.zeros((count, 4, 4))
        P[:, :2, :2] = self.R(False)
        P[:, 2, 2] = P[:, 3, 3] = self.initial_speed_sigma_mps**2
        return X, P

    def make_filter(self, x, P):
        """A filterpy KalmanFilter holding one track (F and Q are set per prediction interval)."""
        kf = KalmanFilter(dim_x=4, dim_z=2)
        kf.x = np.asarray(x, dtype=float).reshape(4, 1)
        kf.P = np.asarray(P, dtype=float).copy()
        kf.H = self.H(False)
        kf.R = self.R(False)
        return kf

    def filter_predict(self, kf, dt):
        kf.predict(F=self.F(dt), Q=self.Q(dt))

    def filter_update(self, kf, position, heading=np.nan):
        """Position update; the heading is not a state of this model and is not used."""
        kf.update(np.asarray(position, dtype=float).reshape(2, 1))


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
        P4 = J @ P @ _transpose(J)
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


def make_motion_model(settings):
    """The motion model named by `settings.motion_model`, with its noise levels."""
    arguments = dict(accel_noise_mps2=settings.accel_noise_mps2,
                     position_noise_m=settings.position_noise_m,
                     heading_noise_rad=settings.heading_noise_rad,
                     initial_speed_sigma_mps=settings.initial_speed_sigma_mps,
                     turn_noise_radps2=settings.turn_noise_radps2,
                     initial_turn_rate_sigma_radps=settings.initial_turn_rate_sigma_radps)
    if settings.motion_model == "constant_velocity":
        return ConstantVelocityModel(**arguments)
    if settings.motion_model == "unicycle":
        return UnicycleModel(**arguments)
    raise ValueError(f"motion_model={settings.motion_model!r} is not one of {MOTION_MODELS}")
