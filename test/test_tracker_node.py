"""Tracker node in a real ROS graph (localhost DDS): the node runs as its own process; a driver
node in this process publishes detections of two walkers, listens to the forecast and the
markers, sends bad input and parameter changes, and checks the node keeps answering.
"""

import math
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np
import pytest
import rclpy
from builtin_interfaces.msg import Time
from geometry_msgs.msg import Pose, PoseArray, Quaternion
from rclpy.executors import SingleThreadedExecutor
from rclpy.parameter import Parameter
from rclpy.parameter_client import AsyncParameterClient
from rclpy.qos import QoSProfile, ReliabilityPolicy, qos_profile_sensor_data
from sensor_msgs.msg import PointCloud2
from std_msgs.msg import Header
from visualization_msgs.msg import Marker, MarkerArray

from riskbound.forecast_schema import FIELD_NAMES, cloud_to_forecast
from riskbound.ros.conversions import seconds_to_stamp, stamp_to_seconds, yaw_to_quaternion

from node_helpers import stop_process_group, wait_for

FORECAST_STEPS = 10
START_S = 1000.0
# Two walkers at 1.2 m/s: one along +x, one along +y, 3 m apart.
STARTS = np.array([[0.0, 0.0], [3.0, -2.0]])
VELOCITIES = np.array([[1.2, 0.0], [0.0, 1.2]])


class Driver:
    """Test-side node: publishes detections, records forecasts and markers."""

    def __init__(self):
        self.node = rclpy.create_node("tracker_test_driver")
        self.lock = threading.Lock()
        self.forecasts, self.markers = [], []
        self.pub = self.node.create_publisher(PoseArray, "detections", qos_profile_sensor_data)
        reliable = QoSProfile(depth=50, reliability=ReliabilityPolicy.RELIABLE)
        self.node.create_subscription(PointCloud2, "obstacle_forecast", self._record(self.forecasts), reliable)
        self.node.create_subscription(MarkerArray, "tracks_markers", self._record(self.markers), reliable)
        self.params = AsyncParameterClient(self.node, "/tracker")
        self.executor = SingleThreadedExecutor()
        self.executor.add_node(self.node)
        self.thread = threading.Thread(target=self.executor.spin, daemon=True)
        self.thread.start()

    def _record(self, store):
        def record(msg):
            with self.lock:
                store.append(msg)
        return record

    def publish(self, stamp_s, positions, frame="odom", headings=None):
        msg = PoseArray(header=Header(stamp=seconds_to_stamp(stamp_s, Time), frame_id=frame))
        for j, (x, y) in enumerate(positions):
            pose = Pose()
            pose.position.x, pose.position.y = float(x), float(y)
            # Zero quaternion: heading unknown (the default identity would claim heading 0).
            pose.orientation = (yaw_to_quaternion(headings[j]) if headings is not None
                                else Quaternion(x=0.0, y=0.0, z=0.0, w=0.0))
            msg.poses.append(pose)
        self.pub.publish(msg)

    def latest_forecast(self):
        with self.lock:
            return self.forecasts[-1] if self.forecasts else None

    def close(self):
        self.executor.shutdown()
        self.node.destroy_node()


def walkers_at(t):
    return STARTS + VELOCITIES * t


@pytest.fixture
def tracker_process():
    log = tempfile.NamedTemporaryFile(mode="w+", suffix=".log", delete=False)
    process = subprocess.Popen(
        [sys.executable, "-m", "riskbound.ros.tracker_node", "--ros-args", "-p", "activate_at_start:=true",
         "-p", f"forecast_steps:={FORECAST_STEPS}", "-p", "confirm_hits:=2", "-p", "confirm_window:=3"],
        stdout=log, stderr=subprocess.STDOUT, start_new_session=True, env=dict(os.environ))
    try:
        yield process, log.name
    finally:
        stop_process_group(process, signal.SIGINT)
        log.close()
        os.unlink(log.name)


@pytest.fixture
def driver():
    rclpy.init()
    d = Driver()
    try:
        yield d
    finally:
        d.close()
        rclpy.try_shutdown()


def node_log(path):
    with open(path) as handle:
        return handle.read()


def test_tracker_node_forecasts_walkers_and_survives_bad_input(tracker_process, driver):
    process, log_path = tracker_process
    wait_for(lambda: driver.pub.get_subscription_count() > 0 and driver.params.wait_for_services(0.1),
             30.0, "the tracker node to come up")

    # Detections in → forecast out, stamped with the scan time, in the planning frame.
    for k in range(15):
        t = 0.1 * k
        driver.publish(START_S + t, walkers_at(t))
        time.sleep(0.05)
    last_scan_s = START_S + 1.4
    msg = wait_for(lambda: (m := driver.latest_forecast()) is not None
                   and abs(stamp_to_seconds(m.header.stamp) - last_scan_s) < 1e-6 and m, 10.0, "a forecast")
    assert msg.header.frame_id == "odom"
    assert [f.name for f in msg.fields] == list(FIELD_NAMES)
    forecast = cloud_to_forecast(msg)
    assert forecast.problems() == []
    assert forecast.track_count == 2
    np.testing.assert_allclose(forecast.times, 0.1 * np.arange(FORECAST_STEPS + 1), atol=1e-6)
    np.testing.assert_allclose(forecast.half_extents, [[0.25, 0.2], [0.25, 0.2]], atol=1e-6)
    # Plausible values: noise-free walkers, so the forecast end lies near the true future position
    # and points along the walking direction; the covariance grows along the horizon.
    future = walkers_at(1.4 + forecast.times[-1])
    for j in range(2):
        person = int(np.argmin(np.linalg.norm(future - forecast.positions[j, -1], axis=1)))
        assert np.linalg.norm(forecast.positions[j, -1] - future[person]) < 0.3
        expected = math.atan2(VELOCITIES[person, 1], VELOCITIES[person, 0])
        assert abs(math.remainder(forecast.headings[j, 0] - expected, 2 * math.pi)) < 0.2
    assert np.all(np.diff(forecast.covariances[..., 0, 0], axis=1) > 0)

    # Markers: cleared, then an ellipse and an id per track, a forecast line per confirmed track.
    driver.publish(START_S + 1.5, walkers_at(1.5))
    markers = wait_for(lambda: driver.markers and abs(stamp_to_seconds(driver.markers[-1].markers[0].header.stamp)
                                                      - (START_S + 1.5)) < 1e-6 and driver.markers[-1],
                       10.0, "track markers of the last scan")
    assert markers.markers[0].action == Marker.DELETEALL
    namespaces = [m.ns for m in markers.markers[1:]]
    assert namespaces.count("track_covariance") == namespaces.count("track_id") == 2
    assert namespaces.count("track_forecast") == 2
    labels = {m.text for m in markers.markers if m.ns == "track_id"}
    assert labels == {str(i) for i in forecast.track_ids}

    # Bad input: NaN pose, wrong frame, late beyond tolerance, empty scan, time going backwards.
    driver.publish(START_S + 1.6, np.vstack([walkers_at(1.6), [[np.nan, 1.0]]]))
    driver.publish(START_S + 1.7, walkers_at(1.7), frame="map")
    driver.publish(START_S + 1.0, walkers_at(1.0))
    driver.publish(START_S + 1.8, np.zeros((0, 2)))
    aged = wait_for(lambda: (m := driver.latest_forecast()) is not None
                    and abs(stamp_to_seconds(m.header.stamp) - (START_S + 1.8)) < 1e-6 and m, 10.0,
                    "a forecast after an empty scan")
    assert cloud_to_forecast(aged).track_count == 2
    driver.publish(START_S - 100.0, walkers_at(0.0))
    wait_for(lambda: "time went backwards" in node_log(log_path), 10.0, "the reset warning")
    log = node_log(log_path)
    assert "1 of 3 detections had a NaN or Inf position" in log
    assert "detections in frame 'map' rejected" in log
    assert "beyond late_tolerance_s" in log
    assert process.poll() is None

    # Parameters: invalid values are refused with the parameter's allowed range (an open bound and
    # a bound set by another parameter: both beyond what the descriptor's range can say), a valid
    # one applies.
    for name, value, reason in (
            ("gate_probability", 1.0, "gate_probability=1.0 is out of range: must be in [0.5, 1.0)"),
            ("confirm_hits", 5, "confirm_hits=5 is out of range: must be in [1, confirm_window=3]")):
        future = driver.params.set_parameters([Parameter(name, value=value)])
        result = wait_for(lambda: future.done() and future.result(), 10.0, "set_parameters").results[0]
        assert not result.successful and reason in result.reason
    future = driver.params.set_parameters([Parameter("forecast_steps", value=5)])
    assert wait_for(lambda: future.done() and future.result(), 10.0, "set_parameters").results[0].successful

    # The node still answers after all that: the restarted tracker confirms the walkers again.
    for k in range(5):
        t = 0.1 * k
        driver.publish(START_S - 100.0 + 0.1 + t, walkers_at(t))
        time.sleep(0.05)
    final = wait_for(lambda: (m := driver.latest_forecast()) is not None
                     and cloud_to_forecast(m).track_count == 2 and len(cloud_to_forecast(m).times) == 6 and m,
                     10.0, "forecasts after the reset")
    assert min(cloud_to_forecast(final).track_ids) > max(forecast.track_ids)
    assert process.poll() is None

    os.killpg(process.pid, signal.SIGINT)
    assert process.wait(timeout=10) == 0
