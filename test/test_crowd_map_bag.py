"""Crowd bags carry the scenario's static world: one latched nav_msgs/OccupancyGrid on /map at the
start, the message a node would publish, replayed latched."""

import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import rclpy
from nav_msgs.msg import OccupancyGrid
from rclpy.executors import SingleThreadedExecutor
from rclpy.qos import DurabilityPolicy, ReliabilityPolicy
from rclpy.serialization import deserialize_message
from rosbags.interfaces import QosDurability, QosReliability
from rosbags.typesys import Stores, get_typestore

from node_helpers import stop_process_group
from riskbound.crowd.record import generate_crowd_bag
from riskbound.crowd.scenario import load_scenario
from riskbound.crowd.static_map import scenario_occupancy
from riskbound.logs import bag_io
from riskbound.logs.playback import BagPlayback, ReplaySettings
from riskbound.ros.map_messages import MAP_QOS, occupancy_from_message, occupancy_to_message
from riskbound.ros.message_types import qos_from_bag

SCENARIO = Path(__file__).resolve().parent.parent / "config" / "crowd_courtyard_40.yaml"


@pytest.fixture(scope="module")
def crowd_bag(tmp_path_factory):
    path = tmp_path_factory.mktemp("map") / "courtyard"
    generate_crowd_bag(SCENARIO, path, seed=7, duration_s=0.5)
    return path


def test_the_map_is_the_first_message_and_the_only_one_on_its_topic(crowd_bag):
    assert bag_io.bag_topics(crowd_bag)[bag_io.TOPIC_MAP] == (bag_io.OCCUPANCY_GRID, 1)
    first_topic, _, first_ns, _ = next(bag_io.read_raw(crowd_bag))
    assert first_topic == bag_io.TOPIC_MAP
    clock_ns = [time_ns for _, _, time_ns, _ in bag_io.read_raw(crowd_bag, [bag_io.TOPIC_CLOCK])]
    assert first_ns == clock_ns[0]


def test_the_bag_map_is_the_scenario_map(crowd_bag):
    expected = scenario_occupancy(load_scenario(SCENARIO), frame_id="odom")
    stored = bag_io.read_static_map(crowd_bag, expected_frame_id="odom")
    np.testing.assert_array_equal(stored.values, expected.values)
    assert (stored.origin_x_m, stored.origin_y_m, stored.origin_yaw_rad) == (
        expected.origin_x_m, expected.origin_y_m, expected.origin_yaw_rad)
    assert stored.resolution_m == pytest.approx(expected.resolution_m)   # float32 in the message
    # The crowd bag reader returns the same map with the crowd.
    bag = bag_io.read_crowd_bag(crowd_bag)
    assert len(bag.truth) == 6
    np.testing.assert_array_equal(bag.static_map.values, expected.values)


def test_stored_message_is_what_a_node_publishes(crowd_bag):
    # rclpy's own deserialiser is the reference for the nav_msgs/OccupancyGrid CDR encoding (bytes
    # may differ only in alignment padding, which the encoding leaves unspecified).
    _, _, time_ns, stored = next(bag_io.read_raw(crowd_bag, [bag_io.TOPIC_MAP]))
    decoded = deserialize_message(bytes(stored), OccupancyGrid)
    live = occupancy_to_message(bag_io.read_static_map(crowd_bag), time_ns * 1e-9)
    assert decoded.header == live.header and decoded.info == live.info
    assert decoded.data == live.data and len(decoded.data) == 520 * 440


def test_the_map_is_stored_and_replayed_latched(crowd_bag):
    topic = BagPlayback(ReplaySettings(bag=str(crowd_bag))).topics[bag_io.TOPIC_MAP]
    assert topic.qos.reliability == QosReliability.RELIABLE
    assert topic.qos.durability == QosDurability.TRANSIENT_LOCAL
    profile = qos_from_bag(topic.qos)
    assert profile.durability == DurabilityPolicy.TRANSIENT_LOCAL
    assert profile.reliability == ReliabilityPolicy.RELIABLE and profile.depth == 1


def test_a_bag_without_a_map_reads_as_none(tmp_path):
    path = tmp_path / "no_map"
    with bag_io.BagWriter(path, {bag_io.TOPIC_CLOCK: bag_io.CROWD_TOPICS[bag_io.TOPIC_CLOCK]}) as writer:
        writer.write(bag_io.TOPIC_CLOCK, 1, bag_io.clock_cdr(1))
    assert bag_io.read_static_map(path) is None


def test_a_map_in_another_frame_is_a_bag_error(crowd_bag):
    with pytest.raises(bag_io.BagError, match="the map must be in the frame 'map'"):
        bag_io.read_static_map(crowd_bag, expected_frame_id="map")


def test_a_damaged_map_is_a_bag_error(crowd_bag, tmp_path):
    # Cells outside -1..100 cannot come from a map server (nav_msgs/OccupancyGrid documentation).
    path = tmp_path / "damaged"
    occupancy = bag_io.read_static_map(crowd_bag)
    data = bag_io.occupancy_grid_cdr(0, occupancy)
    broken = bytearray(data)
    broken[-40:-20] = b"\x7f" * 20
    with bag_io.BagWriter(path, bag_io.MAP_TOPICS) as writer:
        writer.write(bag_io.TOPIC_MAP, 0, bytes(broken))
    with pytest.raises(bag_io.BagError, match="does not hold a usable map: values: 20 cells outside -1..100"):
        bag_io.read_static_map(path)


def test_bag_and_live_type_definitions_agree():
    # Bags are written with the Humble definitions (bag_io); the nodes run Kilted. The type hash
    # (REP-2011 type description hash, computed by rosbags) must be the same in both.
    assert (get_typestore(Stores.ROS2_HUMBLE).hash_rihs01(bag_io.OCCUPANCY_GRID)
            == get_typestore(Stores.ROS2_KILTED).hash_rihs01(bag_io.OCCUPANCY_GRID))


def test_replay_keeps_the_map_for_a_subscriber_that_comes_late(crowd_bag, tmp_path):
    # Transient-local durability: a late-joining subscriber with a transient-local request receives
    # the last message a live publisher sent (DDS durability QoS, common practice, no source).
    log_path = tmp_path / "replay.log"
    with open(log_path, "w") as log:
        replay = subprocess.Popen([sys.executable, "-m", "riskbound.ros.replay_node", "--ros-args",
                                   "-p", f"bag:={crowd_bag}", "-p", "repeat:=false", "-p", "exit_at_end:=false",
                                   "-p", "await_timeout_s:=0.0"],
                                  stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    context = rclpy.Context()
    rclpy.init(context=context)
    node = None
    try:
        deadline = time.monotonic() + 30.0
        while "done:" not in log_path.read_text() and time.monotonic() < deadline:
            assert replay.poll() is None, log_path.read_text()
            time.sleep(0.1)
        assert "done:" in log_path.read_text(), log_path.read_text()   # the map went out before we listen
        received = []
        node = rclpy.create_node("late_map_listener", context=context)
        node.create_subscription(OccupancyGrid, bag_io.TOPIC_MAP, received.append, MAP_QOS)
        executor = SingleThreadedExecutor(context=context)
        executor.add_node(node)
        while not received and time.monotonic() < deadline:
            executor.spin_once(timeout_sec=0.1)
        assert len(received) == 1, log_path.read_text()
        occupancy = occupancy_from_message(received[0], expected_frame_id="odom")
        np.testing.assert_array_equal(occupancy.values, bag_io.read_static_map(crowd_bag).values)
    finally:
        if node is not None:
            node.destroy_node()
        rclpy.try_shutdown(context=context)
        stop_process_group(replay)
