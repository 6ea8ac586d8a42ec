"""ObstacleForecast: checks of unusable forecasts and resampling onto the planner's grid."""

import math

import numpy as np
import pytest

from riskbound.motion.forecast import ObstacleForecast


def linear_forecast(times, start=((0.0, 1.0), (3.0, -2.0)), velocity=((0.5, -0.2), (-1.0, 0.4)),
                    covariance_at_zero=None, covariance_rate=None):
    """Tracks moving at constant velocity with covariance C(t) = C₀ + t·Ċ (both PSD, so C(t) is PSD for t ≥ 0)."""
    times = np.asarray(times, dtype=float)
    start, velocity = np.asarray(start, dtype=float), np.asarray(velocity, dtype=float)
    J = len(start)
    C0 = np.array([[[0.02, 0.005], [0.005, 0.03]]] * J) if covariance_at_zero is None else covariance_at_zero
    C1 = np.array([[[0.04, -0.01], [-0.01, 0.02]]] * J) if covariance_rate is None else covariance_rate
    positions = start[:, None, :] + velocity[:, None, :] * times[None, :, None]
    covariances = C0[:, None] + C1[:, None] * times[None, :, None, None]
    headings = np.arctan2(velocity[:, 1], velocity[:, 0])[:, None].repeat(len(times), axis=1)
    return ObstacleForecast(np.arange(10, 10 + J), times, positions, headings, covariances,
                            np.tile([0.3, 0.2], (J, 1))), (start, velocity, C0, C1)


def is_psd(covariances):
    return np.all(np.linalg.eigvalsh(covariances) >= -1e-12)


# --- problems() -----------------------------------------------------------------------------------


def test_a_clean_forecast_has_no_problems():
    forecast, _ = linear_forecast([0.0, 0.5, 1.0, 1.5])
    assert forecast.problems() == []
    assert forecast.track_count == 2


def test_empty_forecast_is_usable():
    empty = ObstacleForecast.empty([0.1, 0.2, 0.3])
    assert empty.problems() == []
    assert empty.track_count == 0
    assert empty.positions.shape == (0, 3, 2)
    resampled = empty.resampled([0.05, 0.5])
    assert resampled.track_count == 0 and resampled.positions.shape == (0, 2, 2)


@pytest.mark.parametrize("field", ["times", "positions", "headings", "covariances", "half_extents"])
def test_nan_is_reported_by_field(field):
    forecast, _ = linear_forecast([0.0, 0.5, 1.0])
    getattr(forecast, field).flat[1] = math.nan
    problems = forecast.problems()
    assert any(field in reason and "NaN" in reason for reason in problems), problems


def test_inf_is_reported():
    forecast, _ = linear_forecast([0.0, 0.5, 1.0])
    forecast.positions[0, 2, 1] = math.inf
    assert any("positions" in reason for reason in forecast.problems())


@pytest.mark.parametrize("times", [[0.0, 0.5, 0.5], [0.0, 1.0, 0.5]])
def test_times_must_increase_strictly(times):
    forecast, _ = linear_forecast(times)
    assert any("strictly increasing" in reason for reason in forecast.problems())


def test_negative_half_extents_duplicate_ids_and_indefinite_covariance_are_reported():
    forecast, _ = linear_forecast([0.0, 0.5])
    forecast.half_extents[1, 0] = -0.1
    assert any("half_extents" in reason for reason in forecast.problems())

    forecast, _ = linear_forecast([0.0, 0.5])
    forecast.track_ids[1] = forecast.track_ids[0]
    assert any("duplicate track ids" in reason for reason in forecast.problems())

    forecast, _ = linear_forecast([0.0, 0.5])
    forecast.covariances[0, 1] = [[0.01, 0.05], [0.05, 0.01]]  # determinant < 0
    assert any("positive semi-definite" in reason for reason in forecast.problems())

    forecast, _ = linear_forecast([0.0, 0.5])
    forecast.covariances[1, 0] = [[-0.01, 0.0], [0.0, 0.01]]
    assert any("positive semi-definite" in reason for reason in forecast.problems())


def test_shapes_are_normalised_on_construction():
    forecast = ObstacleForecast([7], [0.0, 1.0], [[0, 0], [1, 1]], [0.0, 0.0], np.zeros((2, 2, 2)), [0.3, 0.2])
    assert forecast.positions.shape == (1, 2, 2)
    assert forecast.covariances.shape == (1, 2, 2, 2)
    assert forecast.half_extents.shape == (1, 2)
    assert forecast.track_ids.dtype == np.int64


# --- resampled() ----------------------------------------------------------------------------------


def test_interpolation_is_exact_for_linear_motion():
    forecast, (start, velocity, C0, C1) = linear_forecast([0.0, 0.4, 0.8, 1.2, 1.6, 2.0])
    grid = np.linspace(0.0, 2.0, 23)
    resampled = forecast.resampled(grid)
    np.testing.assert_allclose(resampled.times, grid)
    expected_positions = start[:, None, :] + velocity[:, None, :] * grid[None, :, None]
    np.testing.assert_allclose(resampled.positions, expected_positions, atol=1e-12)
    # Covariance linear in time: linear interpolation reproduces it exactly as well.
    np.testing.assert_allclose(resampled.covariances, C0[:, None] + C1[:, None] * grid[None, :, None, None], atol=1e-12)
    np.testing.assert_array_equal(resampled.track_ids, forecast.track_ids)
    np.testing.assert_array_equal(resampled.half_extents, forecast.half_extents)
    assert resampled.problems() == []


def test_extrapolation_continues_constant_velocity():
    forecast, (start, velocity, C0, C1) = linear_forecast([0.0, 0.5, 1.0])
    grid = np.array([1.2, 1.7, 3.0])
    resampled = forecast.resampled(grid)
    np.testing.assert_allclose(resampled.positions, start[:, None, :] + velocity[:, None, :] * grid[None, :, None],
                               atol=1e-12)
    # Growing covariance keeps growing at its last rate.
    np.testing.assert_allclose(resampled.covariances, C0[:, None] + C1[:, None] * grid[None, :, None, None], atol=1e-12)


def test_extrapolation_keeps_covariances_psd_when_linear_growth_would_not():
    # Variances shrinking and the cross term growing fast: linear extrapolation alone would make
    # the diagonal negative and the determinant negative.
    times = [0.0, 0.5]
    C0 = np.array([[[0.30, 0.0], [0.0, 0.20]], [[0.05, 0.0], [0.0, 0.05]]])
    C1 = np.array([[[-0.5, 0.0], [0.0, -0.3]], [[0.01, 0.09], [0.09, 0.01]]])
    forecast, _ = linear_forecast(times, covariance_at_zero=C0, covariance_rate=C1)
    assert is_psd(forecast.covariances)
    naive = C0[:, None] + C1[:, None] * np.array([1.0, 2.0, 5.0])[None, :, None, None]
    assert not is_psd(naive)
    resampled = forecast.resampled([1.0, 2.0, 5.0])
    assert is_psd(resampled.covariances)
    np.testing.assert_allclose(resampled.covariances, np.swapaxes(resampled.covariances, -1, -2))
    assert resampled.problems() == []


def test_extrapolation_keeps_random_psd_forecasts_psd():
    rng = np.random.default_rng(21)
    for _ in range(50):
        J, S = 3, 4
        roots = rng.normal(scale=0.3, size=(J, S, 2, 2))
        covariances = roots @ np.swapaxes(roots, -1, -2)
        forecast = ObstacleForecast(np.arange(J), np.sort(rng.uniform(0, 2, S)) + np.arange(S) * 1e-3,
                                    rng.normal(size=(J, S, 2)), rng.uniform(-3, 3, (J, S)), covariances,
                                    rng.uniform(0.1, 0.5, (J, 2)))
        resampled = forecast.resampled(np.linspace(-0.5, 6.0, 30))
        assert is_psd(resampled.covariances)
        assert resampled.problems() == []


def test_before_the_first_step_the_first_step_is_held():
    forecast, _ = linear_forecast([0.5, 1.0, 1.5])
    resampled = forecast.resampled([0.0, 0.2, 0.5])
    for k in range(3):
        np.testing.assert_allclose(resampled.positions[:, k], forecast.positions[:, 0])
        np.testing.assert_allclose(resampled.covariances[:, k], forecast.covariances[:, 0])


def test_single_step_forecast_is_held_constant():
    forecast, _ = linear_forecast([0.3])
    resampled = forecast.resampled([0.1, 0.3, 2.0])
    for k in range(3):
        np.testing.assert_allclose(resampled.positions[:, k], forecast.positions[:, 0])
        np.testing.assert_allclose(resampled.headings[:, k], forecast.headings[:, 0])


def test_heading_interpolates_the_short_way_round():
    forecast = ObstacleForecast([1], [0.0, 1.0], [[[0, 0], [1, 0]]], [[3.0, -3.0]], np.zeros((1, 2, 2, 2)),
                                [[0.3, 0.2]])
    midpoint = forecast.resampled([0.5]).headings[0, 0]
    # From 3.0 rad to −3.0 rad the short way passes through ±π, not through 0.
    assert math.cos(midpoint) == pytest.approx(-1.0, abs=1e-12)
    assert abs(np.angle(np.exp(1j * (midpoint - 3.0)))) == pytest.approx(math.pi - 3.0, abs=1e-12)


def test_resampling_onto_the_planner_grid():
    # The planner asks for t_k = k·Δt + offset, k = 1…N (see ChanceConstrainedMPC.solve).
    forecast, (start, velocity, _, _) = linear_forecast(np.arange(0.0, 3.01, 0.25))
    N, dt, offset = 20, 0.1, 0.037
    grid = dt * np.arange(1, N + 1) + offset
    resampled = forecast.resampled(grid)
    assert resampled.positions.shape == (2, N, 2) and resampled.covariances.shape == (2, N, 2, 2)
    np.testing.assert_allclose(resampled.positions, start[:, None, :] + velocity[:, None, :] * grid[None, :, None],
                               atol=1e-12)
