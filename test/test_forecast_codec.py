"""The obstacle_forecast PointCloud2 codec: round trip field by field, and malformed clouds.

No ROS graph: only the message classes. The reference for every decoded number is the same
number rounded to IEEE 754 single precision by numpy (the schema stores float32).
"""

import subprocess
import sys

import numpy as np
import pytest
from builtin_interfaces.msg import Time
from sensor_msgs.msg import PointCloud2, PointField
from std_msgs.msg import Header

from riskbound.motion.forecast import ObstacleForecast
from riskbound.forecast_schema import (FIELD_NAMES, POINT_DTYPE, POINT_FIELDS, POINTFIELD_FLOAT32, POINTFIELD_UINT32,
                                      cloud_to_forecast)
from riskbound.ros.forecast_codec import forecast_to_cloud


def random_forecast(rng, tracks=3, steps=7):
    times = np.cumsum(rng.uniform(0.05, 0.3, steps))
    A = rng.normal(size=(tracks, steps, 2, 2))
    covariances = A @ np.swapaxes(A, -1, -2) + 0.01 * np.eye(2)
    return ObstacleForecast(
        track_ids=rng.choice(10_000, size=tracks, replace=False),
        times=times,
        positions=rng.uniform(-50.0, 50.0, (tracks, steps, 2)),
        headings=rng.uniform(-np.pi, np.pi, (tracks, steps)),
        covariances=covariances,
        half_extents=rng.uniform(0.1, 1.0, (tracks, 2)))


def header():
    return Header(stamp=Time(sec=1_700_000_000, nanosec=250_000_000), frame_id="odom")


def f32(values):
    return np.asarray(values, dtype=np.float32).astype(float)


def test_round_trip_field_by_field():
    rng = np.random.default_rng(5)
    forecast = random_forecast(rng)
    cloud = forecast_to_cloud(forecast, header())
    assert cloud.header.frame_id == "odom"
    assert (cloud.header.stamp.sec, cloud.header.stamp.nanosec) == (1_700_000_000, 250_000_000)
    assert (cloud.height, cloud.width) == (1, 3 * 7)
    assert [f.name for f in cloud.fields] == list(FIELD_NAMES)
    # 2 uint32 + 9 float32 = 44 bytes per point, little-endian (the `obstacle_forecast` fields in README.md, Planner node).
    assert cloud.point_step == 44 and not cloud.is_bigendian and len(cloud.data) == 44 * 21

    decoded = cloud_to_forecast(cloud)
    order = np.argsort(forecast.track_ids)  # the decoder returns tracks sorted by id
    np.testing.assert_array_equal(decoded.track_ids, forecast.track_ids[order])
    np.testing.assert_array_equal(decoded.times, f32(forecast.times))
    np.testing.assert_array_equal(decoded.positions, f32(forecast.positions[order]))
    np.testing.assert_array_equal(decoded.headings, f32(forecast.headings[order]))
    expected_cov = f32(forecast.covariances[order])
    expected_cov[..., 1, 0] = expected_cov[..., 0, 1]
    np.testing.assert_array_equal(decoded.covariances, expected_cov)
    np.testing.assert_array_equal(decoded.half_extents, f32(forecast.half_extents[order]))
    assert decoded.problems() == []


def test_schema_datatype_codes_are_the_message_constants():
    # Reference: the constants of sensor_msgs/msg/PointField as generated for rclpy.
    assert (POINTFIELD_UINT32, POINTFIELD_FLOAT32) == (PointField.UINT32, PointField.FLOAT32)
    datatypes = {name: datatype for name, _, datatype, _ in POINT_FIELDS}
    assert datatypes.pop("track_id") == datatypes.pop("step") == PointField.UINT32
    assert set(datatypes.values()) == {PointField.FLOAT32}


def test_the_schema_module_needs_no_ros_package():
    code = ("import sys, riskbound.forecast_schema; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('rclpy', 'sensor_msgs', 'std_msgs')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_points_in_any_order_decode_to_the_same_forecast():
    rng = np.random.default_rng(6)
    cloud = forecast_to_cloud(random_forecast(rng), header())
    points = np.frombuffer(bytes(cloud.data), dtype=POINT_DTYPE)
    shuffled = PointCloud2(header=cloud.header, height=1, width=cloud.width, fields=cloud.fields,
                           is_bigendian=False, point_step=cloud.point_step, row_step=cloud.row_step,
                           data=points[rng.permutation(len(points))].tobytes(), is_dense=True)
    a, b = cloud_to_forecast(cloud), cloud_to_forecast(shuffled)
    for name in ("track_ids", "times", "positions", "headings", "covariances", "half_extents"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))


def test_padded_points_with_an_extra_field_decode():
    """Producers may add fields (e.g. a z) and pad points; offsets, not positions, locate fields."""
    rng = np.random.default_rng(7)
    forecast = random_forecast(rng, tracks=2, steps=4)
    plain = np.frombuffer(bytes(forecast_to_cloud(forecast, header()).data), dtype=POINT_DTYPE)
    padded_dtype = np.dtype({"names": ["z"] + list(FIELD_NAMES),
                             "formats": ["<f4"] + [POINT_DTYPE.fields[n][0] for n in FIELD_NAMES],
                             "offsets": [0] + [4 + POINT_DTYPE.fields[n][1] for n in FIELD_NAMES],
                             "itemsize": 56})
    points = np.zeros(len(plain), dtype=padded_dtype)
    for name in FIELD_NAMES:
        points[name] = plain[name]
    fields = [PointField(name="z", offset=0, datatype=PointField.FLOAT32, count=1)] + [
        PointField(name=name, offset=4 + POINT_DTYPE.fields[name][1],
                   datatype=PointField.UINT32 if name in ("track_id", "step") else PointField.FLOAT32, count=1)
        for name in FIELD_NAMES]
    cloud = PointCloud2(header=header(), height=1, width=len(points), fields=fields, is_bigendian=False,
                        point_step=56, row_step=56 * len(points), data=points.tobytes(), is_dense=True)
    decoded = cloud_to_forecast(cloud)
    np.testing.assert_array_equal(decoded.positions, f32(forecast.positions[np.argsort(forecast.track_ids)]))


def test_empty_forecast_round_trip():
    cloud = forecast_to_cloud(ObstacleForecast.empty(np.arange(1, 6) * 0.1), header())
    assert cloud.width == 0 and len(cloud.data) == 0
    decoded = cloud_to_forecast(cloud)
    assert decoded.track_count == 0 and decoded.problems() == []


def good_cloud():
    return forecast_to_cloud(random_forecast(np.random.default_rng(8)), header())


def test_missing_field_is_named():
    cloud = good_cloud()
    cloud.fields = [f for f in cloud.fields if f.name != "cov_xy"]
    with pytest.raises(ValueError, match="field 'cov_xy' is missing"):
        cloud_to_forecast(cloud)


def test_wrong_datatype_is_named():
    cloud = good_cloud()
    fields = list(cloud.fields)
    index = [f.name for f in fields].index("x")
    fields[index] = PointField(name="x", offset=fields[index].offset, datatype=PointField.FLOAT64, count=1)
    cloud.fields = fields
    with pytest.raises(ValueError, match=f"field 'x' has datatype {PointField.FLOAT64}, expected {PointField.FLOAT32}"):
        cloud_to_forecast(cloud)


def test_truncated_data_is_reported_with_sizes():
    cloud = good_cloud()
    cloud.data = bytes(cloud.data)[:-10]
    with pytest.raises(ValueError, match=r"data has 914 bytes, expected 21 points × point_step 44"):
        cloud_to_forecast(cloud)


def test_point_step_smaller_than_the_schema_is_rejected():
    cloud = good_cloud()
    cloud.point_step = 40
    cloud.data = bytes(cloud.data)[:40 * cloud.width]
    with pytest.raises(ValueError, match="point_step 40"):
        cloud_to_forecast(cloud)


def test_big_endian_is_rejected():
    cloud = good_cloud()
    cloud.is_bigendian = True
    with pytest.raises(ValueError, match="big-endian"):
        cloud_to_forecast(cloud)


def test_tracks_with_different_step_counts_are_rejected():
    cloud = good_cloud()
    points = np.frombuffer(bytes(cloud.data), dtype=POINT_DTYPE)[:-1]  # last track loses a step
    cloud.width = len(points)
    cloud.row_step = cloud.point_step * len(points)
    cloud.data = points.tobytes()
    with pytest.raises(ValueError, match="different numbers of steps"):
        cloud_to_forecast(cloud)


def test_tracks_at_different_times_are_rejected():
    cloud = good_cloud()
    points = np.frombuffer(bytes(cloud.data), dtype=POINT_DTYPE).copy()
    points["t"][points["track_id"] == points["track_id"].max()] += 0.05
    cloud.data = points.tobytes()
    with pytest.raises(ValueError, match="different times"):
        cloud_to_forecast(cloud)


def test_nan_values_decode_but_are_reported_as_unusable():
    """The codec carries numbers; deciding that NaN is unusable is ObstacleForecast.problems()."""
    cloud = good_cloud()
    points = np.frombuffer(bytes(cloud.data), dtype=POINT_DTYPE).copy()
    points["x"][3] = np.nan
    cloud.data = points.tobytes()
    assert "forecast positions contain NaN or Inf" in cloud_to_forecast(cloud).problems()
