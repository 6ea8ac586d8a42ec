"""What the review treats as damage rather than data: the bounds on a message's values.

A message holding a position that is not finite or lies beyond MAX_ABS_POSITION_M, a non-finite
heading, velocity or covariance, or a footprint half-extent outside [0, MAX_HALF_EXTENT_M] is left
out whole (a damaged message cannot be trusted in its other fields either) and counted per topic.
"""

import numpy as np

from riskbound.forecast_schema import FIELD_NAMES, POINT_DTYPE

# A position further than this from the frame's origin is damage, not data: no planar frame on
# Earth needs it (UTM northings stay below 1e7 m), and squaring it still fits a float64.
MAX_ABS_POSITION_M = 1e8
# Largest believable obstacle footprint half-extent [m] (a bus is about 6 m long).
MAX_HALF_EXTENT_M = 100.0
REJECTED_WHAT = (f"a position that is not finite or lies beyond {MAX_ABS_POSITION_M:g} m, or a non-finite "
                 f"heading, velocity or covariance, or a footprint half-extent outside [0, {MAX_HALF_EXTENT_M:g}] m")


def plausible_positions(xy):
    """Which rows of xy (..., 2) are finite and within MAX_ABS_POSITION_M of the origin."""
    xy = np.asarray(xy, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.all(np.isfinite(xy) & (np.abs(xy) <= MAX_ABS_POSITION_M), axis=-1)


def plausible_forecast(forecast):
    """True when every value of an ObstacleForecast the review uses is one a tracker could mean."""
    extents = forecast.half_extents
    return bool(np.all(plausible_positions(forecast.positions)) and np.all(np.isfinite(forecast.times))
                and np.all(np.isfinite(forecast.headings)) and np.all(np.isfinite(forecast.covariances))
                and np.all(np.isfinite(extents)) and np.all((extents >= 0.0) & (extents <= MAX_HALF_EXTENT_M)))


# Odometry fields the review uses (see cdr.odometry's layout): pose x, y and orientation, the
# planar pose covariance (x, y, yaw), twist vx, vy, wz and its planar covariance.
ODOM_POSITION = [0, 1]
ODOM_USED = [0, 1, 3, 4, 5, 6] + [7 + 6 * i + j for i in (0, 1, 5) for j in (0, 1, 5)] + [43, 44, 48] + [
    49 + 6 * i + j for i in (0, 1, 5) for j in (0, 1, 5)]

# The codec's layout (riskbound.ros.forecast_codec): uint32 = 6, float32 = 7 in sensor_msgs/PointField.
CODEC_FIELDS = [(name, POINT_DTYPE.fields[name][1], 6 if name in ("track_id", "step") else 7, 1)
                for name in FIELD_NAMES]


def points_plausible(points):
    """plausible_forecast for raw points of the codec's layout."""
    xy = np.stack([points["x"], points["y"]], axis=-1).astype(float)
    extents = np.stack([points["half_length"], points["half_width"]], axis=-1).astype(float)
    finite = np.all([np.all(np.isfinite(points[name])) for name in ("t", "yaw", "cov_xx", "cov_xy", "cov_yy")])
    with np.errstate(invalid="ignore"):
        sizes = np.all(np.isfinite(extents) & (extents >= 0.0) & (extents <= MAX_HALF_EXTENT_M))
    return bool(finite and sizes and np.all(plausible_positions(xy)))
