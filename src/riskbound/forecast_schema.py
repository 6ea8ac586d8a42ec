"""The `obstacle_forecast` point schema: field names, point layout, packing and unpacking of points.

One point per (track, step). Fields, little-endian, in this order:
    track_id (uint32), step (uint32), t (float32, s after header stamp), x, y, yaw,
    cov_xx, cov_xy, cov_yy, half_length, half_width (float32)
The cloud has height = 1, width = number of points, is_dense = True.

This module imports no ROS package, so the nodes (riskbound.ros.forecast_codec wraps the points in
a PointCloud2) and the offline tools reading bags share one definition of the layout.
"""

import numpy as np

from riskbound.motion.forecast import ObstacleForecast

FIELD_NAMES = ("track_id", "step", "t", "x", "y", "yaw", "cov_xx", "cov_xy", "cov_yy",
               "half_length", "half_width")
_INTEGER_FIELDS = ("track_id", "step")
POINT_DTYPE = np.dtype([(name, "<u4" if name in _INTEGER_FIELDS else "<f4") for name in FIELD_NAMES])

# Datatype codes of sensor_msgs/msg/PointField (its constants UINT32 = 6, FLOAT32 = 7).
POINTFIELD_UINT32 = 6
POINTFIELD_FLOAT32 = 7

# The cloud's field descriptions, as (name, offset [bytes], PointField datatype, count).
POINT_FIELDS = tuple((name, POINT_DTYPE.fields[name][1],
                      POINTFIELD_UINT32 if name in _INTEGER_FIELDS else POINTFIELD_FLOAT32, 1)
                     for name in FIELD_NAMES)


def forecast_points(forecast):
    """The cloud's points (a POINT_DTYPE array, track-major) for an ObstacleForecast."""
    J, S = forecast.track_count, len(forecast.times)
    points = np.zeros(J * S, dtype=POINT_DTYPE)
    points["track_id"] = np.repeat(forecast.track_ids, S)
    points["step"] = np.tile(np.arange(S), J)
    points["t"] = np.tile(forecast.times, J)
    points["x"] = forecast.positions[..., 0].ravel()
    points["y"] = forecast.positions[..., 1].ravel()
    points["yaw"] = forecast.headings.ravel()
    points["cov_xx"] = forecast.covariances[..., 0, 0].ravel()
    points["cov_xy"] = forecast.covariances[..., 0, 1].ravel()
    points["cov_yy"] = forecast.covariances[..., 1, 1].ravel()
    points["half_length"] = np.repeat(forecast.half_extents[:, 0], S)
    points["half_width"] = np.repeat(forecast.half_extents[:, 1], S)
    return points


def cloud_to_forecast(msg):
    """Decode a PointCloud2 into an ObstacleForecast.

    `msg` is any object with PointCloud2's attributes (fields with name/offset/datatype,
    is_bigendian, width, height, point_step, data): an rclpy message or one read from a bag.
    Raises ValueError naming what is wrong: missing or mistyped fields, a data size that does not
    match, or tracks with different step sets.
    """
    offsets = {f.name: (f.offset, f.datatype) for f in msg.fields}
    for name, _, expected, _ in POINT_FIELDS:
        if name not in offsets:
            raise ValueError(f"obstacle_forecast: field {name!r} is missing")
        if offsets[name][1] != expected:
            raise ValueError(f"obstacle_forecast: field {name!r} has datatype {offsets[name][1]}, expected {expected}")
    if msg.is_bigendian:
        raise ValueError("obstacle_forecast: big-endian clouds are not supported")
    count = msg.width * msg.height
    if len(msg.data) != count * msg.point_step or msg.point_step < POINT_DTYPE.itemsize:
        raise ValueError(f"obstacle_forecast: data has {len(msg.data)} bytes, expected "
                         f"{count} points × point_step {msg.point_step}")
    dtype = np.dtype({"names": list(FIELD_NAMES),
                      "formats": [POINT_DTYPE.fields[n][0] for n in FIELD_NAMES],
                      "offsets": [offsets[n][0] for n in FIELD_NAMES],
                      "itemsize": msg.point_step})
    points = np.frombuffer(bytes(msg.data), dtype=dtype, count=count)
    if count == 0:
        return ObstacleForecast.empty()
    order = np.lexsort((points["step"], points["track_id"]))
    points = points[order]
    ids, counts = np.unique(points["track_id"], return_counts=True)
    steps = counts[0]
    if np.any(counts != steps):
        raise ValueError("obstacle_forecast: tracks have different numbers of steps")
    J = len(ids)
    grid = points.reshape(J, steps)
    times = grid["t"][0].astype(float)
    if not np.allclose(grid["t"], times[None, :], atol=1e-6):
        raise ValueError("obstacle_forecast: tracks are forecast at different times")
    covariances = np.empty((J, steps, 2, 2))
    covariances[..., 0, 0] = grid["cov_xx"]
    covariances[..., 0, 1] = covariances[..., 1, 0] = grid["cov_xy"]
    covariances[..., 1, 1] = grid["cov_yy"]
    return ObstacleForecast(
        track_ids=ids.astype(np.int64), times=times,
        positions=np.stack([grid["x"], grid["y"]], axis=-1).astype(float),
        headings=grid["yaw"].astype(float), covariances=covariances,
        half_extents=np.stack([grid["half_length"][:, 0], grid["half_width"][:, 0]], axis=-1).astype(float))
