"""Forecasts of tracks over the planner grid: independent propagation, growth, fields."""

import numpy as np
import pytest

from riskbound.tracking.filters import ConstantVelocityModel, UnicycleModel
from riskbound.tracking.forecast import TrackForecaster
from riskbound.tracking.settings import TrackerSettings
from riskbound.tracking.tracker import MultiTargetTracker


def _walkers(model_name, seed=0, count=6, scans=40):
    """A tracker after `scans` scans of `count` straight walkers (10 Hz, 0.1 m noise)."""
    rng = np.random.default_rng(seed)
    tracker = MultiTargetTracker(TrackerSettings(motion_model=model_name))
    start = rng.uniform(-8, 8, (count, 2)) * np.array([1.0, 1.0])
    start[:, 0] += 4.0 * np.arange(count)
    angle = rng.uniform(-np.pi, np.pi, count)
    velocity = rng.uniform(0.8, 1.6, count)[:, None] * np.column_stack([np.cos(angle), np.sin(angle)])
    for k in range(scans):
        truth = start + velocity * 0.1 * k
        tracker.process(0.1 * k, truth + rng.normal(0.0, 0.1, truth.shape))
    return tracker, velocity


def test_linear_forecast_equals_an_independent_numpy_propagation():
    # Reference: the Kalman prediction P_{k+1} = F P_k Fᵀ + Q iterated step by step with F and the
    # discrete white-noise acceleration Q written out here (Estimation with Applications to
    # Tracking and Navigation (2001), §6.3.2, section number from memory), x_{k+1} = F x_k.
    rng = np.random.default_rng(11)
    sigma, dt, steps = 0.9, 0.1, 20
    model = ConstantVelocityModel(accel_noise_mps2=sigma, position_noise_m=0.1, heading_noise_rad=0.3,
                                  initial_speed_sigma_mps=1.0)
    forecaster = TrackForecaster(model, steps, dt)
    J = 5
    X = rng.normal(size=(J, 4))
    A = rng.normal(scale=0.3, size=(J, 4, 4))
    P = A @ np.swapaxes(A, 1, 2) + 0.01 * np.eye(4)
    forecast = forecaster.forecast(np.arange(J), X, P, np.zeros(J), np.tile([0.25, 0.2], (J, 1)))

    F = np.block([[np.eye(2), dt * np.eye(2)], [np.zeros((2, 2)), np.eye(2)]])
    G = np.vstack([0.5 * dt**2 * np.eye(2), dt * np.eye(2)])
    Q = sigma**2 * G @ G.T
    for j in range(J):
        x, p = X[j].copy(), P[j].copy()
        for k in range(steps + 1):
            np.testing.assert_allclose(forecast.positions[j, k], x[:2], atol=1e-12)
            np.testing.assert_allclose(forecast.covariances[j, k], p[:2, :2], rtol=1e-10, atol=1e-14)
            x, p = F @ x, F @ p @ F.T + Q
    np.testing.assert_allclose(forecast.times, dt * np.arange(steps + 1))


@pytest.mark.parametrize("model_name", ["constant_velocity", "unicycle"])
def test_forecast_covariance_is_non_decreasing_along_the_horizon(model_name):
    # Each step adds process noise to a prediction of the previous step: P_{k+1} − P_k ⪰ 0 for
    # tracks filtered from real motion (whose position-velocity correlation is positive).
    tracker, _ = _walkers(model_name)
    forecast = tracker.forecast()
    assert forecast.track_count == 6
    growth = np.diff(forecast.covariances, axis=1)
    assert np.all(np.linalg.eigvalsh(growth) >= -1e-12)
    assert np.all(np.linalg.eigvalsh(forecast.covariances[:, -1]) > np.linalg.eigvalsh(forecast.covariances[:, 0]))


def test_forecast_fields_follow_the_settings_and_the_motion():
    tracker, velocity = _walkers("constant_velocity")
    forecast = tracker.forecast()
    settings = tracker.settings
    assert forecast.problems() == []
    np.testing.assert_allclose(forecast.times, settings.forecast_step_s * np.arange(settings.forecast_steps + 1))
    np.testing.assert_allclose(forecast.half_extents, np.tile([0.25, 0.2], (6, 1)))
    snapshot = tracker.snapshot()
    for j, track_id in enumerate(forecast.track_ids):
        row = np.flatnonzero(snapshot.track_ids == track_id)[0]
        v = snapshot.velocities[row]
        expected_end = snapshot.positions[row] + v * forecast.times[-1]
        np.testing.assert_allclose(forecast.positions[j, -1], expected_end, atol=1e-12)
        # Heading of each step: the direction of travel, within the velocity's own error.
        true_v = velocity[np.argmin(np.linalg.norm(velocity - v, axis=1))]
        assert abs(np.angle(np.exp(1j * (forecast.headings[j, 0] - np.arctan2(true_v[1], true_v[0]))))) < 0.3


def test_forecast_resamples_onto_the_planner_grid():
    tracker, _ = _walkers("constant_velocity")
    forecast = tracker.forecast()
    grid = 0.1 * np.arange(1, 21) + 0.04
    resampled = forecast.resampled(grid)
    assert resampled.problems() == []
    assert resampled.positions.shape == (6, 20, 2)


def test_unicycle_forecast_follows_the_turn_and_matches_sampling():
    # Mean: a constant-turn arc (circle of radius v/ω, plane geometry). Covariance: the
    # linearised propagation against 20 000 samples pushed through the exact motion with the
    # same process noise (Monte Carlo reference; agreement within 10 % for small uncertainty,
    # common practice, no source).
    model = UnicycleModel(accel_noise_mps2=0.3, position_noise_m=0.1, heading_noise_rad=0.2,
                          initial_speed_sigma_mps=1.0, turn_noise_radps2=0.3)
    dt, steps = 0.1, 20
    forecaster = TrackForecaster(model, steps, dt)
    x0 = np.array([0.0, 0.0, 0.3, 1.2, 0.4])
    P0 = np.diag([0.01, 0.01, 0.01, 0.01, 0.004])
    forecast = forecaster.forecast(np.array([1]), x0[None], P0[None], np.zeros(1), np.array([[0.25, 0.2]]))
    centre = x0[:2] + (1.2 / 0.4) * np.array([-np.sin(0.3), np.cos(0.3)])
    np.testing.assert_allclose(np.linalg.norm(forecast.positions[0] - centre, axis=1), 3.0, rtol=1e-12)
    np.testing.assert_allclose(forecast.headings[0], 0.3 + 0.4 * forecast.times, atol=1e-12)

    rng = np.random.default_rng(12)
    samples = rng.multivariate_normal(x0, P0, 20000)
    G_turn = np.array([0.0, 0.0, 0.5 * dt**2, 0.0, dt])
    for _ in range(steps):
        G_accel = np.zeros_like(samples)
        G_accel[:, 0] = 0.5 * dt**2 * np.cos(samples[:, 2])
        G_accel[:, 1] = 0.5 * dt**2 * np.sin(samples[:, 2])
        G_accel[:, 3] = dt
        samples = (model.f(samples, dt) + G_accel * rng.normal(0, 0.3, (len(samples), 1))
                   + G_turn * rng.normal(0, 0.3, (len(samples), 1)))
    sampled = np.cov(samples[:, :2].T)
    predicted = forecast.covariances[0, -1]
    np.testing.assert_allclose(np.linalg.eigvalsh(predicted), np.linalg.eigvalsh(sampled), rtol=0.1)


def test_only_confirmed_tracks_are_forecast():
    tracker = MultiTargetTracker(TrackerSettings(confirm_hits=3, confirm_window=5))
    tracker.process(0.0, [[0.0, 0.0]])
    tracker.process(0.1, [[0.1, 0.0]])
    assert tracker.forecast().track_count == 0
    tracker.process(0.2, [[0.2, 0.0]])
    forecast = tracker.forecast()
    assert forecast.track_count == 1 and forecast.problems() == []


def test_empty_forecast_has_the_grid_times():
    forecast = MultiTargetTracker().forecast()
    assert forecast.track_count == 0
    np.testing.assert_allclose(forecast.times, 0.1 * np.arange(21))


@pytest.mark.parametrize("steps, step_s", [(0, 0.1), (5, 0.0), (2.5, 0.1)])
def test_forecaster_rejects_a_bad_grid(steps, step_s):
    model = ConstantVelocityModel(1.0, 0.1, 0.3, 1.0)
    with pytest.raises(ValueError, match="step"):
        TrackForecaster(model, steps, step_s)
