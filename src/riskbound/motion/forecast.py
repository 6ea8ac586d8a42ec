"""Obstacle forecasts: predicted positions, headings and covariances of tracked obstacles over time.

The tracker writes them, the planner reads them; both go through this container. On the wire it is
the `obstacle_forecast` PointCloud2 (point layout: riskbound.forecast_schema).
"""

from dataclasses import dataclass

import numpy as np


@dataclass
class ObstacleForecast:
    """Forecast of J tracks over S steps.

    track_ids: (J,) integer ids
    times: (S,) seconds after the forecast stamp, strictly increasing
    positions: (J, S, 2) planning-frame x, y [m]
    headings: (J, S) yaw [rad]
    covariances: (J, S, 2, 2) position covariance [m²]
    half_extents: (J, 2) footprint half-length (along heading) and half-width [m]
    """

    track_ids: np.ndarray
    times: np.ndarray
    positions: np.ndarray
    headings: np.ndarray
    covariances: np.ndarray
    half_extents: np.ndarray

    def __post_init__(self):
        self.track_ids = np.asarray(self.track_ids, dtype=np.int64).reshape(-1)
        self.times = np.asarray(self.times, dtype=float).reshape(-1)
        J, S = len(self.track_ids), len(self.times)
        self.positions = np.asarray(self.positions, dtype=float).reshape(J, S, 2)
        self.headings = np.asarray(self.headings, dtype=float).reshape(J, S)
        self.covariances = np.asarray(self.covariances, dtype=float).reshape(J, S, 2, 2)
        self.half_extents = np.asarray(self.half_extents, dtype=float).reshape(J, 2)

    @property
    def track_count(self):
        return len(self.track_ids)

    @classmethod
    def empty(cls, times=(0.0,)):
        times = np.asarray(times, dtype=float)
        S = len(times)
        return cls(np.zeros(0), times, np.zeros((0, S, 2)), np.zeros((0, S)),
                   np.zeros((0, S, 2, 2)), np.zeros((0, 2)))

    def problems(self):
        """Reasons this forecast must not be used (empty list when it is fine)."""
        reasons = []
        for name in ("times", "positions", "headings", "covariances", "half_extents"):
            if not np.all(np.isfinite(getattr(self, name))):
                reasons.append(f"forecast {name} contain NaN or Inf")
        if len(self.times) > 1 and np.any(np.diff(self.times) <= 0.0):
            reasons.append("forecast times are not strictly increasing")
        if np.any(self.half_extents < 0.0):
            reasons.append("forecast half_extents are negative")
        if len(np.unique(self.track_ids)) != len(self.track_ids):
            reasons.append("forecast has duplicate track ids")
        cov = self.covariances
        if cov.size and (np.any(cov[..., 0, 0] < 0.0) or np.any(cov[..., 1, 1] < 0.0)
                         or np.any(cov[..., 0, 0] * cov[..., 1, 1] - cov[..., 0, 1] ** 2 < -1e-12)):
            reasons.append("forecast covariances are not positive semi-definite")
        return reasons

    def resampled(self, grid_times):
        """Forecast on `grid_times` (seconds after this forecast's stamp).

        Linear interpolation between forecast steps. Beyond the last step positions and
        covariances are extrapolated linearly from the last two steps (constant velocity,
        covariance growing at its last rate); before the first step the first one is held.
        """
        grid_times = np.asarray(grid_times, dtype=float)
        t = self.times
        if len(t) == 1:
            idx0 = np.zeros(len(grid_times), dtype=int)
            idx1 = idx0
            w = np.zeros(len(grid_times))
        else:
            idx1 = np.clip(np.searchsorted(t, grid_times, side="right"), 1, len(t) - 1)
            idx0 = idx1 - 1
            w = (grid_times - t[idx0]) / (t[idx1] - t[idx0])
            w = np.clip(w, 0.0, None)

        def blend(values):
            a, b = values[:, idx0], values[:, idx1]
            shape = (1, -1) + (1,) * (values.ndim - 2)
            return a + (b - a) * w.reshape(shape)

        headings = self.headings[:, idx0] + w * np.angle(
            np.exp(1j * (self.headings[:, idx1] - self.headings[:, idx0])))
        covariances = blend(self.covariances)
        lower = np.minimum(self.covariances[:, idx0], self.covariances[:, idx1])
        covariances[..., 0, 0] = np.maximum(covariances[..., 0, 0], lower[..., 0, 0])
        covariances[..., 1, 1] = np.maximum(covariances[..., 1, 1], lower[..., 1, 1])
        # Extrapolation can break positive semi-definiteness through the cross term: bound it.
        bound = np.sqrt(covariances[..., 0, 0] * covariances[..., 1, 1])
        covariances[..., 0, 1] = np.clip(covariances[..., 0, 1], -bound, bound)
        covariances[..., 1, 0] = covariances[..., 0, 1]
        return ObstacleForecast(self.track_ids, grid_times, blend(self.positions), headings,
                                covariances, self.half_extents)
