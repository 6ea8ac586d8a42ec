"""Tracker node: detections in; obstacle forecast and track markers out.

Each `detections` PoseArray (one scan, in the planning frame; heading in the orientation when
the detector knows it) goes to the multi-target tracker (riskbound.tracking); the forecast of the
confirmed tracks is published on `obstacle_forecast` through the codec the planner reads, stamped
with the scan's time, and covariance ellipses with track ids on `tracks_markers` for viewers.

Bad input never stops the node: poses with NaN/Inf positions are dropped, scans in another frame
are rejected, late scans beyond the tolerance are dropped, all with a throttled warning naming
what was wrong; an empty scan ages the tracks; time running backwards restarts the tracker with a
warning.

A managed node (riskbound.ros.managed_node): detections are taken in only while it is active.

Parameters: every tracker setting (riskbound.tracking.settings.TRACKER_SPECS) plus
`planning_frame`, validated by SettingSpec.check at configure and on every change.

Run: python -m riskbound.ros.tracker_node --ros-args --params-file config/ground_robot.yaml -p activate_at_start:=true
"""

import logging
import sys
import traceback

import numpy as np
from builtin_interfaces.msg import Time
from geometry_msgs.msg import Point, PoseArray
from rclpy.qos import QoSProfile, ReliabilityPolicy, qos_profile_sensor_data
from sensor_msgs.msg import PointCloud2
from std_msgs.msg import ColorRGBA, Header
from visualization_msgs.msg import Marker, MarkerArray

from riskbound.ros.conversions import quaternion_to_yaw, seconds_to_stamp, stamp_to_seconds, yaw_to_quaternion
from riskbound.ros.forecast_codec import forecast_to_cloud
from riskbound.ros.managed_node import ManagedNode
from riskbound.ros.node_main import spin_node
from riskbound.ros.throttled_warnings import ThrottledWarnings
from riskbound.settings_table import SettingSpec
from riskbound.tracking.gating import covariance_ellipses
from riskbound.tracking.settings import TRACKER_SPECS, TrackerSettings
from riskbound.tracking.tracker import MultiTargetTracker

NODE_NAME = "tracker"
NODE_SPECS = (
    SettingSpec("planning_frame", "odom",
                "frame the detections must be in and the forecast is published in (REP-105); restart to change",
                read_only=True),
)
TRACKER_NAMES = frozenset(spec.name for spec in TRACKER_SPECS)
# Probability mass inside the drawn covariance ellipses.
MARKER_PROBABILITY = 0.95
_CONFIRMED = ColorRGBA(r=0.1, g=0.55, b=1.0, a=0.45)
_TENTATIVE = ColorRGBA(r=0.6, g=0.6, b=0.6, a=0.3)
_FORECAST = ColorRGBA(r=1.0, g=0.6, b=0.1, a=0.8)
_TEXT = ColorRGBA(r=1.0, g=1.0, b=1.0, a=0.9)


class _NodeLogHandler(logging.Handler):
    """Forwards the tracking core's log records (e.g. a reset) to the node's logger."""

    def __init__(self, node_logger):
        super().__init__(level=logging.INFO)
        self._logger = node_logger

    def emit(self, record):
        message = self.format(record)
        if record.levelno >= logging.ERROR:
            self._logger.error(message)
        elif record.levelno >= logging.WARNING:
            self._logger.warning(message)
        else:
            self._logger.info(message)


class TrackerNode(ManagedNode):
    """Thin shell around MultiTargetTracker: parameters, message conversion, publishing.

    Managed node (riskbound.ros.managed_node): configure validates the settings, builds the
    tracker and its publishers; only while active are detections taken in (and forecasts sent).
    """

    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, TRACKER_SPECS + NODE_SPECS, **kwargs)
        self._warn = ThrottledWarnings(self.get_logger()).warn
        self._core_log = logging.getLogger("riskbound.tracking")
        self._core_log_handler = _NodeLogHandler(self.get_logger())
        self._core_log.addHandler(self._core_log_handler)
        self._tracker = None
        self._outputs = []
        self._detections = None

    def destroy_node(self):
        self._core_log.removeHandler(self._core_log_handler)
        return super().destroy_node()

    # --- lifecycle -------------------------------------------------------------------------------

    def _configure(self, values):
        self._planning_frame = values["planning_frame"]
        if not self._planning_frame:
            raise ValueError("planning_frame='' is not allowed: must name a frame")
        self._tracker = MultiTargetTracker(TrackerSettings(**{name: values[name] for name in TRACKER_NAMES}))
        reliable = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE)
        self._forecast_pub = self.create_publisher(PointCloud2, "obstacle_forecast", reliable)
        self._markers_pub = self.create_publisher(MarkerArray, "tracks_markers", reliable)
        self._outputs = [self._forecast_pub, self._markers_pub]
        s = self._tracker.settings
        self.get_logger().info(
            f"tracking in '{self._planning_frame}' with {s.motion_model}, gate {s.gate_probability}, "
            f"confirm {s.confirm_hits} of {s.confirm_window}, forecast {s.forecast_steps} steps of "
            f"{s.forecast_step_s} s")

    def _activate(self):
        self._detections = self.create_subscription(PoseArray, "detections", self._on_detections,
                                                    qos_profile_sensor_data)

    def _deactivate(self):
        if self._detections is not None:
            self.destroy_subscription(self._detections)
            self._detections = None

    def _release(self):
        self._deactivate()
        for publisher in self._outputs:
            self.destroy_publisher(publisher)
        self._outputs = []
        self._tracker = None

    # --- parameters ------------------------------------------------------------------------------

    def _apply_changes(self, changes):
        """Apply checked parameter changes to a configured tracker; the reason when refused."""
        tracker_changes = {name: value for name, value in changes.items() if name in TRACKER_NAMES}
        try:
            settings = self._tracker.settings.with_changes(**tracker_changes)
        except ValueError as error:
            return str(error)
        restart = self._tracker.settings.needs_reset(settings)
        self._tracker.configure(settings)
        if tracker_changes:
            self.get_logger().info("parameters changed: " + ", ".join(
                f"{name}={value!r}" for name, value in tracker_changes.items())
                + (" (every track restarted)" if restart else ""))
        return None

    # --- scans -----------------------------------------------------------------------------------

    def _on_detections(self, msg):
        if not self.is_active:
            return
        try:
            self._process(msg)
        except Exception:  # noqa: BLE001 - a callback must never stop the executor
            self._warn("internal_error", "detections callback failed:\n" + traceback.format_exc())

    def _process(self, msg):
        if msg.header.frame_id != self._planning_frame:
            self._warn("frame", f"detections in frame '{msg.header.frame_id}' rejected: expected "
                                f"'{self._planning_frame}' (planning_frame)")
            return
        stamp_s = stamp_to_seconds(msg.header.stamp)
        if stamp_s == 0.0:
            stamp_s = self.get_clock().now().nanoseconds * 1e-9
            self._warn("stamp", "detections without a stamp: using the time they arrived")
        positions = np.array([(p.position.x, p.position.y) for p in msg.poses], dtype=float).reshape(-1, 2)
        if self._tracker.settings.use_heading:
            headings = np.array([quaternion_to_yaw(p.orientation) for p in msg.poses], dtype=float)
        else:
            headings = None
        report = self._tracker.process(stamp_s, positions, headings)
        if report.invalid_detections:
            self._warn("invalid", f"{report.invalid_detections} of {len(msg.poses)} detections had a NaN or "
                                  "Inf position and were dropped")
        if report.refused_starts:
            self._warn("max_tracks", f"{report.refused_starts} detections started no track: max_tracks="
                                     f"{self._tracker.settings.max_tracks} reached")
        if report.status == "dropped":
            self._warn("dropped", f"detections dropped: {report.reason}")
            return
        self._publish()

    def _publish(self):
        header = Header(stamp=seconds_to_stamp(self._tracker.time_s, Time), frame_id=self._planning_frame)
        forecast = self._tracker.forecast()
        self._forecast_pub.publish(forecast_to_cloud(forecast, header))
        # Markers cost a message per track: build them only for someone watching.
        if self._markers_pub.get_subscription_count() > 0:
            self._markers_pub.publish(self._markers(header, forecast))

    def _markers(self, header, forecast):
        snapshot = self._tracker.snapshot()
        major, minor, angle = covariance_ellipses(snapshot.position_covariances, MARKER_PROBABILITY)
        markers = [Marker(header=header, action=Marker.DELETEALL)]
        for j, track_id in enumerate(snapshot.track_ids):
            marker_id = int(track_id) % 2**31
            x, y = float(snapshot.positions[j, 0]), float(snapshot.positions[j, 1])
            ellipse = Marker(header=header, ns="track_covariance", id=marker_id, type=Marker.CYLINDER,
                             action=Marker.ADD)
            ellipse.pose.position = Point(x=x, y=y, z=0.0)
            ellipse.pose.orientation = yaw_to_quaternion(angle[j])
            ellipse.scale.x = max(2.0 * float(major[j]), 1e-3)
            ellipse.scale.y = max(2.0 * float(minor[j]), 1e-3)
            ellipse.scale.z = 0.02
            ellipse.color = _CONFIRMED if snapshot.confirmed[j] else _TENTATIVE
            label = Marker(header=header, ns="track_id", id=marker_id, type=Marker.TEXT_VIEW_FACING,
                           action=Marker.ADD, text=str(int(track_id)))
            label.pose.position = Point(x=x, y=y, z=1.0)
            label.pose.orientation.w = 1.0
            label.scale.z = 0.3
            label.color = _TEXT
            markers.extend([ellipse, label])
        for j, track_id in enumerate(forecast.track_ids):
            path = Marker(header=header, ns="track_forecast", id=int(track_id) % 2**31, type=Marker.LINE_STRIP,
                          action=Marker.ADD)
            path.pose.orientation.w = 1.0
            path.scale.x = 0.04
            path.color = _FORECAST
            path.points = [Point(x=float(p[0]), y=float(p[1]), z=0.0) for p in forecast.positions[j]]
            markers.append(path)
        return MarkerArray(markers=markers)


def main(args=None):
    """init → spin → shutdown; Ctrl-C and SIGTERM end it cleanly. Returns the exit code."""
    return spin_node(TrackerNode, NODE_NAME, args)


if __name__ == "__main__":
    sys.exit(main())
