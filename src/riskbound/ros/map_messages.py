"""nav_msgs/OccupancyGrid ↔ riskbound.world.occupancy.OccupancyMap for the nodes.

The field mapping is riskbound.world.grid_message's (shared with the bag reader); this module adds
the rclpy message classes and the QoS of the `map` topic: reliable and transient local, depth 1,
so a node that starts after the map was published still receives it (a latched topic).
"""

import array

from builtin_interfaces.msg import Time
from geometry_msgs.msg import Point, Pose, Quaternion
from nav_msgs.msg import MapMetaData, OccupancyGrid
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
from std_msgs.msg import Header

from riskbound.ros.conversions import seconds_to_stamp
from riskbound.world.grid_message import grid_message_fields, occupancy_from_grid_message
from riskbound.world.occupancy import DEFAULT_OCCUPIED_THRESHOLD

MAP_QOS = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE, durability=DurabilityPolicy.TRANSIENT_LOCAL)


def occupancy_to_message(occupancy, stamp_s):
    """OccupancyMap → nav_msgs/OccupancyGrid stamped `stamp_s` [s] (also its map_load_time)."""
    fields = grid_message_fields(occupancy)
    stamp = seconds_to_stamp(stamp_s, Time)
    x, y, z = fields["position"]
    qx, qy, qz, qw = fields["orientation"]
    info = MapMetaData(map_load_time=stamp, resolution=fields["resolution"], width=fields["width"],
                       height=fields["height"],
                       origin=Pose(position=Point(x=x, y=y, z=z), orientation=Quaternion(x=qx, y=qy, z=qz, w=qw)))
    message = OccupancyGrid(header=Header(stamp=stamp, frame_id=fields["frame_id"]), info=info)
    message.data = array.array("b", fields["data"].tobytes())
    return message


def occupancy_from_message(message, expected_frame_id=None, occupied_threshold=DEFAULT_OCCUPIED_THRESHOLD,
                           unknown_is_occupied=True):
    """nav_msgs/OccupancyGrid → OccupancyMap. ValueError naming the problem for a map in another
    frame than expected_frame_id (when given) or a malformed message; a node logs it and keeps
    planning without the map instead of crashing."""
    if not isinstance(message, OccupancyGrid):
        raise ValueError(f"message is a {type(message).__name__}: must be a nav_msgs/OccupancyGrid")
    return occupancy_from_grid_message(message, expected_frame_id=expected_frame_id,
                                       occupied_threshold=occupied_threshold, unknown_is_occupied=unknown_is_occupied)
