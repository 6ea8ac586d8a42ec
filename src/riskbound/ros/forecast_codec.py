"""The `obstacle_forecast` PointCloud2: an ObstacleForecast wrapped in the message.

The point layout and the packing/unpacking of points are riskbound.forecast_schema's (no ROS
import there, so the offline tools share it); this module only builds the message. Decoding needs
no message type: riskbound.forecast_schema.cloud_to_forecast reads an rclpy message as well as
one read from a bag; it is offered here too, beside its inverse.
"""

from sensor_msgs.msg import PointCloud2, PointField

from riskbound.forecast_schema import POINT_DTYPE, POINT_FIELDS, cloud_to_forecast, forecast_points

__all__ = ["cloud_to_forecast", "forecast_to_cloud"]


def forecast_to_cloud(forecast, header):
    """Encode an ObstacleForecast (times relative to header.stamp) as a PointCloud2."""
    points = forecast_points(forecast)
    msg = PointCloud2()
    msg.header = header
    msg.height = 1
    msg.width = len(points)
    msg.fields = [PointField(name=name, offset=offset, datatype=datatype, count=count)
                  for name, offset, datatype, count in POINT_FIELDS]
    msg.is_bigendian = False
    msg.point_step = POINT_DTYPE.itemsize
    msg.row_step = POINT_DTYPE.itemsize * len(points)
    msg.data = points.tobytes()
    msg.is_dense = True
    return msg
