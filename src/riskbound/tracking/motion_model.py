"""What the motion models of tracked people share (`MotionModel`): the measurement model, the batched
Kalman prediction and update, and the update with a late measurement; the models themselves are
in `constant_velocity.py` and `unicycle.py`.

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
"""

import numpy as np


def wrap_angle(angle):
    """Angle(s) wrapped to [−π, π)."""
    return (np.asarray(angle) + np.pi) % (2.0 * np.pi) - np.pi


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


def batch_transpose(A):
    """Transpose of each matrix in a batch (…, n, m) → (…, m, n)."""
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
        P_pred = F @ P @ batch_transpose(F) + self.process_noise(X, dt)
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
        P_new = I_KH @ P @ batch_transpose(I_KH) + K @ R @ batch_transpose(K)
        return self.normalise(X_new), P_new

    def retrodict(self, X, P, lag_s):
        """State and covariance `lag_s` seconds before the current estimate, and the backward F.

        x_b = f(x, −lag),  P_b = F_b (P + Q(lag)) F_bᵀ  with F_b = ∂f/∂x at (x, −lag).
        """
        X_back, F_back = self.transition(X, -lag_s)
        P_back = F_back @ (P + self.process_noise(X, lag_s)) @ batch_transpose(F_back)
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
        C = P @ batch_transpose(F_back) @ H.T
        K = C @ _inverse(S)
        y = self.residual(z, X_back @ H.T)
        X_new = X + np.einsum("jnm,jm->jn", K, y)
        P_new = P - K @ S @ batch_transpose(K)
        return self.normalise(X_new), 0.5 * (P_new + batch_transpose(P_new))

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

