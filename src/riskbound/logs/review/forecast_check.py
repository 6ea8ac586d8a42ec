"""What the forecast said before an event versus what happened.

For a Gaussian forecast N(μ, Σ) of an obstacle's position and the position a it actually had:
    position error       e = ‖a − μ‖
    Mahalanobis distance d = sqrt((a − μ)ᵀ Σ⁻¹ (a − μ))
    inside the risk ellipse  d² ≤ χ²₂(1 − α),
the ellipse that holds the obstacle with probability 1 − α at risk level α. For two degrees of
freedom the chi-square quantile has the closed form χ²₂(p) = −2 ln(1 − p) (the chi-square CDF
with 2 dof is 1 − e^(−x/2)), so χ²₂(1 − α) = −2 ln α.
"""

import numpy as np

LEADS_S = (0.5, 1.0, 2.0)
# A forecast older than this at the lead time is not what the planner used then.
MAX_FORECAST_AGE_S = 1.0
# A ground-truth walker and a track further apart than this at the forecast stamp are not the same.
MATCH_GATE_M = 1.0
DEFAULT_RISK_LEVEL = 0.05


def chi_square_2dof_quantile(probability):
    """χ²₂ quantile at `probability` in [0, 1): −2 ln(1 − p)."""
    return -2.0 * np.log1p(-probability)


def gaussian_check(actual, mean, covariance, risk_level):
    """Position error [m], Mahalanobis distance, the χ²₂(1 − α) bound on d² and whether d² is within it.

    A singular covariance (a track without uncertainty) gives an infinite distance unless the
    error is exactly zero.
    """
    error = np.asarray(actual, dtype=float) - np.asarray(mean, dtype=float)
    covariance = np.asarray(covariance, dtype=float)
    try:
        squared = float(error @ np.linalg.solve(covariance, error))
    except np.linalg.LinAlgError:
        squared = 0.0 if not np.any(error) else np.inf
    bound = float(chi_square_2dof_quantile(1.0 - risk_level))
    return {"position_error_m": float(np.linalg.norm(error)), "mahalanobis": float(np.sqrt(max(squared, 0.0))),
            "chi2_bound": bound, "inside_risk_ellipse": bool(squared <= bound)}


def risk_level_at(planner, time_s):
    """(risk level in force at time_s, where it came from): the newest planner_status before it."""
    if len(planner):
        levels = planner.numeric("risk_level")
        newest = int(np.searchsorted(planner.times_s, time_s, side="right")) - 1
        valid = np.nonzero(np.isfinite(levels[:newest + 1]))[0]
        if len(valid):
            return float(levels[valid[-1]]), "planner_status"
    return DEFAULT_RISK_LEVEL, "default (no planner_status before)"


def _matching_track(forecast, event, data, stamp_s):
    """Index of the forecast track that is the event's obstacle, or (None, reason)."""
    if data.obstacles.source == "obstacle_forecast":
        hits = np.nonzero(forecast.track_ids == event.obstacle_id)[0]
        return (int(hits[0]), "") if len(hits) else (None, f"track {event.obstacle_id} not in this forecast")
    if event.obstacle_id is None:
        return None, "obstacles are anonymous: no track can be matched"
    truth_xy = event.obstacle_position_at(data, stamp_s)
    if not np.all(np.isfinite(truth_xy)):
        return None, "obstacle not observed at the forecast stamp"
    now = forecast.resampled([0.0]).positions[:, 0]
    if len(now) == 0:
        return None, "forecast has no tracks"
    distances = np.linalg.norm(now - truth_xy, axis=1)
    j = int(np.argmin(distances))
    if distances[j] > MATCH_GATE_M:
        return None, f"no track within {MATCH_GATE_M} m of the obstacle (nearest {distances[j]:.2f} m)"
    return j, ""


def check_event(event, data, leads_s=LEADS_S):
    """One dict per lead: the forecast made lead_s before the closest approach, evaluated at it."""
    checks = []
    forecasts = data.forecasts
    actual = np.asarray(event.obstacle_xy_at_min, dtype=float)
    for lead in leads_s:
        t_ref = event.t_min - lead
        entry = {"lead_s": float(lead), "available": False}
        checks.append(entry)
        if len(forecasts) == 0:
            entry["reason"] = "no obstacle_forecast in the bag"
            continue
        index = forecasts.index_before(t_ref)
        if index is None:
            entry["reason"] = "no forecast before this time"
            continue
        stamp = float(forecasts.stamps_s[index])
        if t_ref - stamp > MAX_FORECAST_AGE_S:
            entry["reason"] = f"newest forecast is {t_ref - stamp:.2f} s older than the lead time"
            continue
        forecast = forecasts.get(index)
        if forecast is None:
            entry["reason"] = f"forecast does not decode: {forecasts.errors.get(index, '')}"
            continue
        j, reason = _matching_track(forecast, event, data, stamp)
        if j is None:
            entry["reason"] = reason
            continue
        ahead = event.t_min - stamp
        predicted = forecast.resampled([ahead])
        risk, risk_source = risk_level_at(data.planner, t_ref)
        entry.update(available=True, forecast_stamp=stamp, track_id=int(forecast.track_ids[j]),
                     predicted_position=predicted.positions[j, 0].tolist(),
                     predicted_covariance=predicted.covariances[j, 0].tolist(), actual_position=actual.tolist(),
                     extrapolated=bool(ahead > forecast.times[-1]), risk_level=risk, risk_level_source=risk_source,
                     **gaussian_check(actual, predicted.positions[j, 0], predicted.covariances[j, 0], risk))
    return checks
