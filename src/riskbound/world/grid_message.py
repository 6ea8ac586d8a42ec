"""nav_msgs/OccupancyGrid ↔ OccupancyMap: the one reading and the one writing of the message's fields.

Works on any object with the message's field names, so the same code reads an rclpy message
(riskbound.ros.map_messages) and a message decoded from a bag by rosbags (riskbound.logs.map_bag);
each of those builds its own message class from `grid_message_fields`. Orientation goes through
riskbound.motion.heading (via planar_yaw); the origin's z is the map plane's height and is not used.
"""

import numpy as np

from riskbound.motion.heading import yaw_to_quaternion_xyzw
from riskbound.world.occupancy import DEFAULT_OCCUPIED_THRESHOLD, OccupancyMap, planar_yaw


def occupancy_from_grid_message(message, expected_frame_id=None, occupied_threshold=DEFAULT_OCCUPIED_THRESHOLD,
                                unknown_is_occupied=True):
    """OccupancyMap from a nav_msgs/OccupancyGrid-shaped message.

    expected_frame_id: the frame the caller works in; a map in another frame raises ValueError
    (no transform is applied). Malformed messages raise ValueError naming the field.
    """
    try:
        frame_id = message.header.frame_id
        info = message.info
        resolution, width, height = info.resolution, info.width, info.height
        position, orientation = info.origin.position, info.origin.orientation
        quaternion = [orientation.x, orientation.y, orientation.z, orientation.w]
        origin_x, origin_y = position.x, position.y
        data = message.data
    except AttributeError as error:
        raise ValueError(f"not a nav_msgs/OccupancyGrid: {error}") from None
    if expected_frame_id is not None and frame_id != expected_frame_id:
        raise ValueError(f"header.frame_id={frame_id!r}: the map must be in the frame {expected_frame_id!r}; "
                         "no transform is applied")
    values = np.asarray(data)
    if values.ndim != 1:
        raise ValueError(f"data has shape {values.shape}: must be a flat sequence of cells")
    return OccupancyMap(
        resolution_m=float(resolution), width=int(width), height=int(height),
        origin_x_m=float(origin_x), origin_y_m=float(origin_y),
        origin_yaw_rad=planar_yaw(quaternion, "info.origin.orientation"),
        frame_id=frame_id, values=values,
        occupied_threshold=occupied_threshold, unknown_is_occupied=unknown_is_occupied)


def grid_message_fields(occupancy):
    """Plain values of an OccupancyGrid for `occupancy`: frame_id, resolution, width, height, origin
    position (x, y, z = 0), orientation quaternion (x, y, z, w) and data (flat row-major int8)."""
    x, y, z, w = yaw_to_quaternion_xyzw([occupancy.origin_yaw_rad])[0]
    return {
        "frame_id": occupancy.frame_id,
        "resolution": float(occupancy.resolution_m),
        "width": occupancy.width,
        "height": occupancy.height,
        "position": (occupancy.origin_x_m, occupancy.origin_y_m, 0.0),
        "orientation": (float(x), float(y), float(z), float(w)),
        "data": np.ascontiguousarray(occupancy.values, dtype=np.int8).reshape(-1),
    }
