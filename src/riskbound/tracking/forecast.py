"""Forecast tracks over the planner's grid: mean, heading and growing position covariance per step.

Times are t_k = k·Δ for k = 0 … steps, seconds after the tracker's time (the stamp of the
newest scan); step 0 is the current estimate. Each step is the filter's prediction without
measurements,
    x_{k+1} = f(x_k, Δ),   P_{k+1} = F_k P_k F_kᵀ + Q_k,
so the covariance grows with the process noise of the model the tracks were filtered with.

For the linear constant-velocity model this has a closed form evaluated for all tracks and steps
at once (the hot path): with F(t) = [[I, t I], [0, I]] and Q̄_k = Σ_{i<k} F(iΔ) Q(Δ) F(iΔ)ᵀ
(the same for every track, computed once per grid),
    p_k = p + t_k v,   P_pos,k = P_pp + t_k (P_pv + P_vp) + t_k² P_vv + Q̄_k[pos].
The unicycle's mean is evaluated at every step in one call (its step is exact for any interval);
its covariance is propagated step by step with the Jacobians along that mean, batched over
tracks.
"""

import numpy as np

from riskbound.motion.forecast import ObstacleForecast


class TrackForecaster:
    """Forecasts for one motion model and one grid (steps × step_s)."""

    def __init__(self, model, steps, step_s):
        if int(steps) != steps or steps < 1:
            raise ValueError(f"steps={steps!r} must be a positive integer")
        if not step_s > 0.0:
            raise ValueError(f"step_s={step_s!r} must be > 0")
        self.model = model
        self.steps = int(steps)
        self.step_s = float(step_s)
        self.times = self.step_s * np.arange(self.steps + 1)
        if model.linear:
            F, Q = model.F(self.step_s), model.Q(self.step_s)
            accumulated = np.zeros((self.steps + 1, 4, 4))
            for k in range(1, self.steps + 1):
                accumulated[k] = F @ accumulated[k - 1] @ F.T + Q
            self._accumulated_noise = accumulated[:, :2, :2]

    def forecast(self, track_ids, X, P, headings, half_extents):
        """ObstacleForecast of J tracks with states X (J, n), covariances P (J, n, n).

        headings: (J,) heading held for each track (used by models without a heading state);
        half_extents: (J, 2).
        """
        J = len(track_ids)
        if J == 0:
            return ObstacleForecast.empty(self.times)
        if self.model.linear:
            positions, covariances = self._linear(X, P)
            step_headings = np.repeat(np.asarray(headings, dtype=float)[:, None], self.steps + 1, axis=1)
        else:
            positions, covariances, step_headings = self._stepwise(X, P)
        return ObstacleForecast(track_ids=track_ids, times=self.times, positions=positions,
                                headings=step_headings, covariances=covariances, half_extents=half_extents)

    def _linear(self, X, P):
        t = self.times[None, :]
        t2 = t**2
        positions = np.empty((len(X), len(self.times), 2))
        positions[..., 0] = X[:, 0, None] + t * X[:, 2, None]
        positions[..., 1] = X[:, 1, None] + t * X[:, 3, None]
        # Element by element: three distinct entries of a symmetric 2×2 cost a fraction of the
        # batched matrix expression on these small arrays.
        covariances = np.empty((len(X), len(self.times), 2, 2))
        Q = self._accumulated_noise
        for i, j in ((0, 0), (0, 1), (1, 1)):
            covariances[..., i, j] = (P[:, i, j, None] + t * (P[:, i, 2 + j, None] + P[:, 2 + i, j, None])
                                      + t2 * P[:, 2 + i, 2 + j, None] + Q[None, :, i, j])
        covariances[..., 1, 0] = covariances[..., 0, 1]
        return positions, covariances

    def _stepwise(self, X, P):
        J, S, n = len(X), self.steps + 1, X.shape[1]
        states = self.model.mean_at(X, self.times)
        # Jacobians and process noise of every step at once, at the state where the step starts;
        # only the covariance recursion itself is sequential.
        starts = states[:, :-1].reshape(-1, n)
        _, F = self.model.transition(starts, self.step_s)
        Q = self.model.process_noise(starts, self.step_s)
        F, Q = F.reshape(J, S - 1, n, n), Q.reshape(J, S - 1, n, n)
        covariances = np.empty((J, S, 2, 2))
        covariances[:, 0] = P[:, :2, :2]
        p = P
        for k in range(S - 1):
            p = F[:, k] @ p @ np.swapaxes(F[:, k], -1, -2) + Q[:, k]
            covariances[:, k + 1] = p[:, :2, :2]
        return states[..., :2].copy(), covariances, states[..., self.model.heading_index].copy()
