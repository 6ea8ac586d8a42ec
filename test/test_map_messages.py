"""nav_msgs/OccupancyGrid ↔ OccupancyMap without a live graph: messages are built directly."""

import array

import numpy as np
import pytest
from geometry_msgs.msg import PoseStamped
from nav_msgs.msg import OccupancyGrid
from rclpy.qos import DurabilityPolicy, ReliabilityPolicy
from transforms3d.euler import euler2quat

from riskbound.ros.map_messages import MAP_QOS, occupancy_from_message, occupancy_to_message
from riskbound.world.occupancy import OccupancyMap


def grid_message(width=4, height=3, resolution=0.1, origin=(1.0, -2.0, 0.5), data=None, frame_id="odom"):
    message = OccupancyGrid()
    message.header.frame_id = frame_id
    message.info.resolution = resolution
    message.info.width, message.info.height = width, height
    message.info.origin.position.x, message.info.origin.position.y = origin[0], origin[1]
    w, x, y, z = euler2quat(0.0, 0.0, origin[2], axes="sxyz")   # transforms3d is w-first
    q = message.info.origin.orientation
    q.x, q.y, q.z, q.w = x, y, z, w
    values = np.zeros(width * height, dtype=np.int8) if data is None else np.asarray(data, dtype=np.int8)
    message.data = array.array("b", values.tobytes())
    return message


def test_message_fields_become_the_map():
    # nav_msgs/OccupancyGrid: row-major data starting at cell (0, 0), whose corner is info.origin.
    data = np.zeros(12, dtype=np.int8)
    data[1 + 2 * 4] = 100   # column 1, row 2
    data[3] = -1
    occupancy = occupancy_from_message(grid_message(data=data), expected_frame_id="odom")
    assert (occupancy.width, occupancy.height, occupancy.resolution_m) == (4, 3, pytest.approx(0.1))
    assert occupancy.origin_yaw_rad == pytest.approx(0.5)
    assert occupancy.values[2, 1] == 100 and occupancy.values[0, 3] == -1
    centre = np.array([1.0, -2.0]) + np.array([[np.cos(0.5), -np.sin(0.5)], [np.sin(0.5), np.cos(0.5)]]) @ [0.15, 0.25]
    occupied_centres = occupancy.occupied_centres
    assert np.min(np.linalg.norm(occupied_centres - centre, axis=1)) < 1e-6


def test_round_trip_keeps_every_field():
    rng = np.random.default_rng(0)
    values = rng.choice(np.array([-1, 0, 30, 100], dtype=np.int8), size=(7, 9))
    occupancy = OccupancyMap(0.05, 9, 7, -3.25, 4.5, -2.0, "map", values, unknown_is_occupied=False)
    message = occupancy_to_message(occupancy, 12.3)
    assert message.header.frame_id == "map"
    assert (message.header.stamp.sec, message.header.stamp.nanosec) == (12, 300_000_000)
    assert message.info.map_load_time == message.header.stamp
    q = message.info.origin.orientation
    np.testing.assert_allclose([q.w, q.x, q.y, q.z], euler2quat(0.0, 0.0, -2.0, axes="sxyz"), atol=1e-12)
    back = occupancy_from_message(message, unknown_is_occupied=False)
    np.testing.assert_array_equal(back.values, values)
    assert (back.origin_x_m, back.origin_y_m) == (-3.25, 4.5)
    assert back.origin_yaw_rad == pytest.approx(-2.0)
    assert back.resolution_m == pytest.approx(0.05)   # float32 in the message


def test_map_topic_is_latched():
    assert MAP_QOS.durability == DurabilityPolicy.TRANSIENT_LOCAL
    assert MAP_QOS.reliability == ReliabilityPolicy.RELIABLE


def test_wrong_frame_is_named():
    with pytest.raises(ValueError, match="header.frame_id='map': the map must be in the frame 'odom'"):
        occupancy_from_message(grid_message(frame_id="map"), expected_frame_id="odom")


@pytest.mark.parametrize("message, error", [
    (grid_message(width=0, height=0, data=[]), "grid is empty"),
    (grid_message(data=np.zeros(11)), "values has 11 entries"),
    (grid_message(resolution=float("nan")), "resolution_m=nan"),
    (grid_message(resolution=0.0), "resolution_m=0.0"),
    (grid_message(origin=(float("nan"), 0.0, 0.0)), "origin_x_m=nan"),
    (grid_message(data=np.full(12, -7)), "outside -1..100"),
    (grid_message(frame_id=""), "frame_id=''"),
    (PoseStamped(), "must be a nav_msgs/OccupancyGrid"),
])
def test_malformed_messages_are_named(message, error):
    with pytest.raises(ValueError, match=error):
        occupancy_from_message(message)


def test_tilted_or_degenerate_origin_is_rejected():
    tilted = grid_message()
    w, x, y, z = euler2quat(0.3, 0.0, 0.5, axes="sxyz")   # rolled by 0.3 rad
    q = tilted.info.origin.orientation
    q.x, q.y, q.z, q.w = x, y, z, w
    with pytest.raises(ValueError, match="rotates out of the x-y plane"):
        occupancy_from_message(tilted)
    zero = grid_message()
    zero.info.origin.orientation.z = zero.info.origin.orientation.w = 0.0
    with pytest.raises(ValueError, match="not a valid quaternion"):
        occupancy_from_message(zero)
