"""The `obstacle_forecast` PointCloud2 schema: the one module that writes and reads it.

One point per (track, step). Fields, little-endian, in this order:
    track_id (uint32), step (uint32), t (float32, s after header stamp), x, y, yaw,
    cov_xx, cov_xy, cov_yy, half_length, half_width (float32)
height = 1, width = number of points, is_dense = True.
"""

import numpy as np
from sensor_msgs.msg import PointCloud2, PointField

from riskbound.motion.forecast import ObstacleForecast

FIELD_NAMES = ("track_id", "step", "t", "x", "y", "yaw", "cov_xx", "cov_xy", "cov_yy",
               "half_length", "half_width")
POINT_DTYPE = np.dtype([(name, "<u4" if name in ("track_id", "step") else "<f4") for name in FIELD_NAMES])


def _fields():
    return [PointField(name=name, offset=POINT_DTYPE.fields[name][1],
                       datatype=PointField.UINT32 if name in ("track_id", "step") else PointField.FLOAT32,
                       count=1)
            for name in FIELD_NAMES]


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


def forecast_to_cloud(forecast, header):
    """Encode an ObstacleForecast (times relative to header.stamp) as a PointCloud2."""
    J, S = forecast.track_count, len(forecast.times)
    points = forecast_points(forecast)
    msg = PointCloud2()
    msg.header = header
    msg.height = 1
    msg.width = J * S
    msg.fields = _fields()
    msg.is_bigendian = False
    msg.point_step = POINT_DTYPE.itemsize
    msg.row_step = POINT_DTYPE.itemsize * J * S
    msg.data = points.tobytes()
    msg.is_dense = True
    return msg


def cloud_to_forecast(msg):
    """Decode a PointCloud2 into an ObstacleForecast.

    Raises ValueError naming what is wrong: missing or mistyped fields, a data size that does not
    match, or tracks with different step sets.
    """
    offsets = {f.name: (f.offset, f.datatype) for f in msg.fields}
    for name in FIELD_NAMES:
        if name not in offsets:
            raise ValueError(f"obstacle_forecast: field {name!r} is missing")
        expected = PointField.UINT32 if name in ("track_id", "step") else PointField.FLOAT32
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
