"""The constant-velocity motion model of tracked people: batched and as a filterpy KalmanFilter.

Constant velocity, discrete white-noise acceleration (Estimation with Applications to Tracking and
Navigation, §6.3.2 — section from memory), state [x, y, vx, vy]:
    F = [[I, Δt I], [0, I]]       Q = σ_a² Γ Γᵀ per axis,  Γ = [½Δt², Δt]ᵀ

Notation and the shared update: `motion_model.py`.
"""

import numpy as np
from filterpy.common import Q_discrete_white_noise
from filterpy.kalman import KalmanFilter

from riskbound.tracking.motion_model import MotionModel, direction_of_travel


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

