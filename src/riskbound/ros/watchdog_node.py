"""Watchdog node: the last word before the robot. Only its `cmd_vel` reaches the base.

Every control period (control_rate_hz) it asks riskbound.supervision.health.HealthMonitor whether
the planner may drive: if so it republishes the planner's latest cmd_vel_plan, otherwise a stop
(riskbound.supervision.stop: zero, or a ramp within the deceleration limits), latched until
recovery_cycles fault-free cycles in a row. Between control cycles it checks for stopping faults
at check_rate_hz and sends the stop at once, so a fault stops the robot within its staleness limit
plus one check period, well inside the required limit plus one control period. A planned command
is also forwarded the moment it arrives when the robot is not stopped and no stopping fault is
present: waiting for the next control cycle would add up to one control period of latency between
the plan and the robot (measured in the closed loop on the replayed crowd: a walker 0.1 s closer
than planned for). The control cycle then does not send it again, so cmd_vel still carries one
message per control period. It publishes
/diagnostics (one DiagnosticStatus, level OK/WARN/ERROR for healthy/degraded/stopped) at
diagnostics_rate_hz and at every transition.

Inputs: cmd_vel_plan (TwistStamped), planner_status (DiagnosticStatus: level, status, solve_ms,
reason), odom (Odometry, sensor-data QoS; header stamp), obstacle_forecast (PointCloud2; header
stamp only, the body is the planner's business).

A managed node (riskbound.ros.managed_node): it gates only while active. A planner that is
unconfigured, inactive or shut down says so on planner_status (status unconfigured / inactive /
finalized): a stopping fault, `planner_inactive` (riskbound.supervision.health).

Run: python -m riskbound.ros.watchdog_node --ros-args --params-file config/drone.yaml -p activate_at_start:=true
"""

import logging
import math
import sys
import traceback

from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from geometry_msgs.msg import TwistStamped
from nav_msgs.msg import Odometry
from rclpy.qos import QoSProfile, ReliabilityPolicy, qos_profile_sensor_data
from sensor_msgs.msg import PointCloud2

from riskbound.motion.robot_models import VelocityCommand
from riskbound.ros.conversions import stamp_to_seconds
from riskbound.ros.managed_node import INACTIVE, ManagedNode
from riskbound.ros.node_main import spin_node
from riskbound.ros.throttled_warnings import ThrottledWarnings
from riskbound.supervision.health import DEGRADED, HEALTHY, STOPPED, HealthMonitor, planner_status_from_values
from riskbound.supervision.settings import WATCHDOG_SPECS, WatchdogSettings
from riskbound.supervision.stop import ZERO_VELOCITY, stop_command

NODE_NAME = "watchdog"
DIAGNOSTIC_NAME = "riskbound watchdog"
_LEVELS = {HEALTHY: DiagnosticStatus.OK, DEGRADED: DiagnosticStatus.WARN}


def _format(value):
    if value is None:
        return "none"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


class _ToNodeLogger(logging.Handler):
    """Sends the core's log records (transitions with their causes) to the node's ROS logger."""

    def __init__(self, node_logger):
        super().__init__(logging.INFO)
        self._node_logger = node_logger

    def emit(self, record):
        if record.levelno >= logging.ERROR:
            self._node_logger.error(record.getMessage())
        elif record.levelno >= logging.WARNING:
            self._node_logger.warning(record.getMessage())
        else:
            self._node_logger.info(record.getMessage())


class WatchdogNode(ManagedNode):
    """Thin shell around HealthMonitor: parameters, message conversion, the control timer, publishing.

    Managed node (riskbound.ros.managed_node): configure validates the settings and opens the
    outputs; activate starts a fresh HealthMonitor (stopped until its inputs are fresh), the
    subscriptions and the timers; deactivate stops them after one last zero-velocity command, so
    the robot is not left with a moving command when nothing gates it any more.
    """

    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, WATCHDOG_SPECS, **kwargs)
        self._log_handler = _ToNodeLogger(self.get_logger())
        core_logger = logging.getLogger("riskbound.supervision")
        core_logger.setLevel(logging.INFO)
        core_logger.addHandler(self._log_handler)
        self._warn = ThrottledWarnings(self.get_logger()).warn
        self._settings = None
        self._monitor = None
        self._outputs, self._inputs, self._timers = [], [], []

    def _now_s(self):
        return self.get_clock().now().nanoseconds * 1e-9

    def destroy_node(self):
        logging.getLogger("riskbound.supervision").removeHandler(self._log_handler)
        super().destroy_node()

    # --- lifecycle -------------------------------------------------------------------------------

    def _configure(self, values):
        self._settings = WatchdogSettings(**values)
        self._cmd_pub = self.create_publisher(TwistStamped, "cmd_vel",
                                              QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE))
        self._diagnostics_pub = self.create_publisher(DiagnosticArray, "/diagnostics", 10)
        self._outputs = [self._cmd_pub, self._diagnostics_pub]
        s = self._settings
        self.get_logger().info(
            f"gating cmd_vel_plan → cmd_vel at {s.control_rate_hz} Hz; stops after status/command "
            f"{s.status_timeout_s}/{s.command_timeout_s} s, odom {s.odom_timeout_s} s, forecast "
            f"{s.forecast_timeout_s} s{'' if s.require_forecast else ' (not required)'}, deadline "
            f"{s.deadline_ms} ms; stop_mode {s.stop_mode}; recovery after {s.recovery_cycles} cycles")

    def _activate(self):
        s = self._settings
        self._monitor = HealthMonitor(s, start_s=self._now_s())
        self._published = None  # the last command sent to the robot (a ramp continues from it)
        self._published_s = None
        self._forwarded = None  # a planned command sent on arrival since the last control cycle
        self._body_frame = ""  # the planner's command frame, else odometry's child frame
        self._last_stamps = {}
        reliable = QoSProfile(depth=10, reliability=ReliabilityPolicy.RELIABLE)
        self._inputs = [
            self.create_subscription(TwistStamped, "cmd_vel_plan", self._on_command, reliable),
            self.create_subscription(DiagnosticStatus, "planner_status", self._on_status, reliable),
            self.create_subscription(Odometry, "odom", self._on_odometry, qos_profile_sensor_data),
            self.create_subscription(PointCloud2, "obstacle_forecast", self._on_forecast,
                                     QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE))]
        self._timers = [self.create_timer(s.control_period_s, self._on_control),
                        self.create_timer(s.check_period_s, self._on_check),
                        self.create_timer(1.0 / s.diagnostics_rate_hz, self._publish_diagnostics)]

    def _deactivate(self):
        for timer in self._timers:
            self.destroy_timer(timer)
        for subscription in self._inputs:
            self.destroy_subscription(subscription)
        self._timers, self._inputs = [], []
        if self._monitor is not None:
            self._publish_command(self.get_clock().now(), ZERO_VELOCITY)
            self._monitor = None

    def _release(self):
        self._deactivate()
        for publisher in self._outputs:
            self.destroy_publisher(publisher)
        self._outputs = []
        self._settings = None

    def _announce(self, state, reason):
        if state != INACTIVE or not self._outputs:
            return
        status = DiagnosticStatus(level=DiagnosticStatus.ERROR, name=DIAGNOSTIC_NAME,
                                  hardware_id=self.get_fully_qualified_name(),
                                  message="inactive: not gating, no cmd_vel until activated",
                                  values=[KeyValue(key="state", value=INACTIVE)])
        array = DiagnosticArray(status=[status])
        array.header.stamp = self.get_clock().now().to_msg()
        self._diagnostics_pub.publish(array)

    # --- parameters ------------------------------------------------------------------------------

    def _apply_changes(self, changes):
        """Apply checked parameter changes to a configured watchdog; the reason when refused."""
        try:
            settings = self._settings.with_changes(**changes)
        except ValueError as error:
            return str(error)
        self._settings = settings
        if self._monitor is not None:
            self._monitor.update_settings(settings)
        self.get_logger().info("parameters changed: " + ", ".join(f"{k}={v!r}" for k, v in changes.items()))
        return None

    # --- inputs: record and return; the decision is taken in the control cycle --------------------

    def _on_command(self, msg):
        twist = msg.twist
        self._monitor.record_command(self._now_s(), VelocityCommand(twist.linear.x, twist.linear.y,
                                                                    twist.angular.z))
        if msg.header.frame_id:
            self._body_frame = msg.header.frame_id
        self._check(forward=True)

    def _on_status(self, msg):
        values = {kv.key: kv.value for kv in msg.values}
        # `level` is a ROS byte: one-element bytes in rclpy.
        level = msg.level[0] if isinstance(msg.level, (bytes, bytearray)) else int(msg.level)
        status, problems = planner_status_from_values(level, values, msg.message)
        for problem in problems:
            self._warn("status", problem)
        self._monitor.record_status(self._now_s(), status)

    def _stamp_s(self, topic, msg):
        """Header stamp in seconds, or None (with a warning) when it is zero or goes backwards."""
        stamp_s = stamp_to_seconds(msg.header.stamp)
        if stamp_s <= 0.0:
            self._warn(topic, f"{topic} message with a zero stamp ignored")
            return None
        if stamp_s < self._last_stamps.get(topic, -math.inf):
            self._warn(topic, f"{topic} out of order: a message older than the last one was ignored")
            return None
        self._last_stamps[topic] = stamp_s
        return stamp_s

    def _on_odometry(self, msg):
        stamp_s = self._stamp_s("odom", msg)
        if stamp_s is None:
            return
        pose, twist = msg.pose.pose, msg.twist.twist
        values = (pose.position.x, pose.position.y, pose.orientation.w, pose.orientation.z,
                  twist.linear.x, twist.linear.y, twist.angular.z)
        if not all(math.isfinite(v) for v in values):
            self._warn("odom", "odometry with NaN or Inf ignored (counts as missing)")
            return
        self._monitor.record_odometry(self._now_s(), stamp_s)
        if msg.child_frame_id and not self._body_frame:
            self._body_frame = msg.child_frame_id

    def _on_forecast(self, msg):
        stamp_s = self._stamp_s("obstacle_forecast", msg)
        if stamp_s is not None:
            self._monitor.record_forecast(self._now_s(), stamp_s)

    # --- outputs -----------------------------------------------------------------------------------

    def _on_control(self):
        try:
            self._control_cycle()
        except Exception:  # noqa: BLE001 - whatever broke, the robot gets a stop and the loop goes on
            self._warn("internal", "control cycle failed, sending zero velocity:\n" + traceback.format_exc())
            self._publish_command(self.get_clock().now(), ZERO_VELOCITY)

    def _control_cycle(self):
        now = self.get_clock().now()
        verdict = self._monitor.step(now.nanoseconds * 1e-9)
        command = self._monitor.command if verdict.forward else self._stop(now)
        # A command already forwarded on arrival since the last cycle is not sent again, so cmd_vel
        # keeps one message per control period. Extra messages cost more than bandwidth: a reliable
        # writer may wait for a reader that stopped acknowledging (a hung base driver). With twice
        # the messages, the fault-injection test saw this node stall for a second once while the
        # simulated robot was SIGSTOPped.
        already_sent = verdict.forward and command is self._forwarded
        self._forwarded = None
        if not already_sent:
            self._publish_command(now, command)
        if verdict.transition is not None:
            self._publish_diagnostics()

    def _on_check(self):
        self._check(forward=False)

    def _check(self, forward):
        """Between control cycles: send the stop as soon as a stopping fault appears; with `forward`
        (a planned command just arrived) send that command at once when the robot may drive."""
        try:
            now = self.get_clock().now()
            if self._monitor.stop_now(now.nanoseconds * 1e-9) is not None:
                self._publish_command(now, self._stop(now))
                self._publish_diagnostics()
            elif forward and self._monitor.state != STOPPED:
                self._publish_command(now, self._monitor.command)
                self._forwarded = self._monitor.command
        except Exception:  # noqa: BLE001 - same fallback as the control cycle
            self._warn("internal", "fault check failed, sending zero velocity:\n" + traceback.format_exc())
            self._publish_command(self.get_clock().now(), ZERO_VELOCITY)

    def _stop(self, now):
        """The stop command; a ramp brakes for the time since the last publication (at most one period)."""
        s = self._settings
        elapsed_s = s.control_period_s
        if self._published_s is not None:
            elapsed_s = min(max(now.nanoseconds * 1e-9 - self._published_s, 0.0), s.control_period_s)
        return stop_command(s.stop_mode, self._published, elapsed_s, s.max_decel_mps2, s.max_angular_decel_radps2)

    def _publish_command(self, now, command):
        msg = TwistStamped()
        msg.header.stamp = now.to_msg()
        msg.header.frame_id = self._body_frame
        msg.twist.linear.x, msg.twist.linear.y = float(command.linear_x), float(command.linear_y)
        msg.twist.angular.z = float(command.angular_z)
        self._cmd_pub.publish(msg)
        self._published, self._published_s = command, now.nanoseconds * 1e-9

    def _publish_diagnostics(self):
        now = self.get_clock().now()
        now_s = now.nanoseconds * 1e-9
        monitor = self._monitor
        faults = monitor.faults(now_s)
        stats = monitor.statistics.summary()
        last_stop = monitor.last_stop
        message = monitor.state
        if faults:
            message += ": " + ", ".join(f.code for f in faults)
        elif monitor.state != HEALTHY:
            message += f": recovering ({monitor.fault_free_cycles}/{self._settings.recovery_cycles} fault-free cycles)"
        values = {
            "state": monitor.state,
            "faults": "; ".join(f"{f.code}: {f.detail}" for f in faults),
            "last_stop_cause": last_stop.cause if last_stop else "",
            "last_stop_detail": last_stop.detail if last_stop else "",
            "last_stop_time_s": f"{last_stop.time_s:.3f}" if last_stop else None,
            "stops_total": monitor.stops_total,
            "fault_free_cycles": monitor.fault_free_cycles,
            "solve_ms_median": stats.median_ms, "solve_ms_p95": stats.p95_ms, "solve_ms_p99": stats.p99_ms,
            "solve_ms_max": stats.max_ms, "solve_samples": stats.samples, "deadline_ms": stats.deadline_ms,
            "deadline_misses": stats.deadline_misses, "deadline_misses_total": stats.deadline_misses_total,
            "solves_total": stats.samples_total,
        }
        values.update({f"{name}_age_s": age for name, age in monitor.ages(now_s).items()})
        status = DiagnosticStatus(level=_LEVELS.get(monitor.state, DiagnosticStatus.ERROR), name=DIAGNOSTIC_NAME,
                                  message=message, hardware_id=self.get_fully_qualified_name(),
                                  values=[KeyValue(key=k, value=_format(v)) for k, v in values.items()])
        array = DiagnosticArray(status=[status])
        array.header.stamp = now.to_msg()
        self._diagnostics_pub.publish(array)


def main(args=None):
    """init → spin → shutdown; Ctrl-C and SIGTERM end it cleanly. Returns the exit code."""
    return spin_node(WatchdogNode, NODE_NAME, args)


if __name__ == "__main__":
    sys.exit(main())
