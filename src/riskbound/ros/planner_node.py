"""Planner node: odometry, goal and obstacle forecast in; plan, reference, command and status out.

Every cycle of the timer (control_rate_hz) checks its inputs, solves the chance-constrained MPC
and publishes. Bad or stale input never produces a command: the cycle publishes an ERROR status
saying why and a throttled warning instead.

Parameters: every planner setting (riskbound.planning.settings.PLANNER_SPECS) plus the node's
own NODE_SPECS below, all validated by SettingSpec.check in `_on_set_parameters`. Settings that
change the optimisation problem's structure rebuild it on a background thread; the running
problem keeps planning until the new one is swapped in at the start of a cycle.

Run: python -m riskbound.ros.planner_node --ros-args --params-file config/drone.yaml
"""

import sys
import threading
import traceback

import numpy as np
from diagnostic_msgs.msg import DiagnosticStatus
from geometry_msgs.msg import PoseStamped, TwistStamped
from nav_msgs.msg import Odometry, Path
from rcl_interfaces.msg import SetParametersResult
from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy, qos_profile_sensor_data
from sensor_msgs.msg import PointCloud2
from trajectory_msgs.msg import MultiDOFJointTrajectory

from riskbound.forecast_schema import cloud_to_forecast
from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import PLANNER_SPECS, PlannerSettings
from riskbound.ros import plan_messages
from riskbound.ros.conversions import quaternion_to_yaw, stamp_to_seconds
from riskbound.ros.setting_parameters import parameter_descriptor
from riskbound.ros.node_main import spin_node
from riskbound.ros.throttled_warnings import ThrottledWarnings
from riskbound.settings_table import SettingSpec

NODE_NAME = "planner"
NODE_SPECS = (
    SettingSpec("planning_frame", "odom",
                "frame of the odometry pose, goal, forecast and plan (REP-105); restart to change",
                read_only=True),
    SettingSpec("odom_timeout_s", 0.5, "odometry older than this is stale: no command [s]", 0.0, 10.0,
                low_open=True),
    SettingSpec("forecast_timeout_s", 1.0, "an obstacle forecast older than this is stale [s]", 0.0, 60.0,
                low_open=True),
    SettingSpec("require_forecast", True,
                "true: no command until an obstacle forecast (possibly empty) has arrived and is fresh; "
                "false: plan without obstacles when there is none"),
    SettingSpec("goal_tolerance_m", 0.2, "within this distance of the goal the command is zero [m]",
                0.0, 100.0),
)
ALL_SPECS = {spec.name: spec for spec in PLANNER_SPECS + NODE_SPECS}
PLANNER_NAMES = frozenset(spec.name for spec in PLANNER_SPECS)

_LEVEL_OK, _LEVEL_WARN, _LEVEL_ERROR = DiagnosticStatus.OK, DiagnosticStatus.WARN, DiagnosticStatus.ERROR


class InputProblem(Exception):
    """An input the cycle must not plan from; `kind` is the status word, the message says why."""

    def __init__(self, kind, message):
        super().__init__(message)
        self.kind = kind


def _finite(*values):
    return bool(np.all(np.isfinite(np.asarray(values, dtype=float))))


class PlannerNode(Node):
    """Thin shell around ChanceConstrainedMPC: parameters, message checks and conversion, publishing."""

    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, **kwargs)
        for spec in ALL_SPECS.values():
            self.declare_parameter(spec.name, spec.default, parameter_descriptor(spec))
        values = {name: self.get_parameter(name).value for name in ALL_SPECS}
        for name, value in values.items():
            reason = ALL_SPECS[name].check(value)
            if reason:
                raise ValueError(reason)
        self._planning_frame = values["planning_frame"]
        if not self._planning_frame:
            raise ValueError("planning_frame='' is not allowed: must name a frame")
        self._node_values = {spec.name: values[spec.name] for spec in NODE_SPECS}
        self._settings = PlannerSettings(**{name: values[name] for name in PLANNER_NAMES})
        self._mpc = ChanceConstrainedMPC(self._settings)

        self._build_lock = threading.Lock()
        self._build_generation = 0
        self._built = None  # (generation, mpc) from the background thread, taken by the next cycle
        self._build_error = ""
        self._odom = None
        self._goal = None
        self._goal_changed = False
        self._forecast = None  # (stamp_s, frame_id, ObstacleForecast) of the newest decodable cloud
        self._forecast_error = None  # why the newest cloud could not be decoded
        self._last_solve_s = None
        self._warn = ThrottledWarnings(self.get_logger()).warn

        self.add_on_set_parameters_callback(self._on_set_parameters)
        reliable = QoSProfile(depth=10, reliability=ReliabilityPolicy.RELIABLE)
        latched = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                             durability=DurabilityPolicy.TRANSIENT_LOCAL)
        forecast_qos = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE)
        self._plan_pub = self.create_publisher(Path, "plan", reliable)
        self._reference_pub = self.create_publisher(MultiDOFJointTrajectory, "reference", reliable)
        self._cmd_pub = self.create_publisher(TwistStamped, "cmd_vel_plan", reliable)
        self._status_pub = self.create_publisher(DiagnosticStatus, "planner_status", reliable)
        self.create_subscription(Odometry, "odom", self._on_odom, qos_profile_sensor_data)
        self.create_subscription(PoseStamped, "goal", self._on_goal, latched)
        self.create_subscription(PointCloud2, "obstacle_forecast", self._on_forecast, forecast_qos)
        self._timer = self.create_timer(1.0 / self._settings.control_rate_hz, self._on_timer)
        self.get_logger().info(
            f"planning in '{self._planning_frame}' with {self._settings.robot_model}, "
            f"{self._settings.horizon_steps} steps of {self._settings.step_s} s at "
            f"{self._settings.control_rate_hz} Hz, risk_level={self._settings.risk_level} "
            f"({self._settings.risk_allocation})")

    # --- parameters ------------------------------------------------------------------------------

    def _on_set_parameters(self, parameters):
        """The one place parameter changes are validated and applied."""
        planner_changes, node_changes = {}, {}
        for parameter in parameters:
            spec = ALL_SPECS.get(parameter.name)
            if spec is None:
                continue  # rclpy's own parameters (use_sim_time...) are checked by rclpy
            value = parameter.value
            if isinstance(spec.default, float) and isinstance(value, int) and not isinstance(value, bool):
                value = float(value)
            reason = spec.check(value)
            if reason:
                return SetParametersResult(successful=False, reason=reason)
            (planner_changes if spec.name in PLANNER_NAMES else node_changes)[spec.name] = value
        try:
            settings = self._settings.with_changes(**planner_changes)
        except ValueError as error:
            return SetParametersResult(successful=False, reason=str(error))
        rebuild = self._settings.needs_rebuild(settings)
        self._settings = settings
        self._node_values.update(node_changes)
        if rebuild:
            self._start_build(settings)
        else:
            self._mpc.settings = self._running_settings(self._mpc)
        if planner_changes or node_changes:
            self.get_logger().info("parameters changed: " + ", ".join(
                f"{name}={value!r}" for name, value in {**planner_changes, **node_changes}.items())
                + (" (rebuilding the problem)" if rebuild else ""))
        return SetParametersResult(successful=True)

    def _running_settings(self, mpc):
        """The latest settings with the structural ones of the problem `mpc` was built for."""
        return self._settings.with_changes(**{spec.name: getattr(mpc.settings, spec.name)
                                              for spec in PLANNER_SPECS if spec.rebuild})

    def _start_build(self, settings):
        with self._build_lock:
            self._build_generation += 1
            generation = self._build_generation
        threading.Thread(target=self._build, args=(generation, settings), daemon=True,
                         name=f"planner_build_{generation}").start()

    def _build(self, generation, settings):
        """Background thread: build the problem for `settings`; only the newest build is kept."""
        try:
            mpc = ChanceConstrainedMPC(settings)
        except Exception as error:  # noqa: BLE001 - a failed build must not take the node down
            with self._build_lock:
                self._build_error = f"rebuild for {settings} failed: {error}"
            self.get_logger().error(self._build_error)
            return
        with self._build_lock:
            if generation == self._build_generation:
                self._built = (generation, mpc)
                self._build_error = ""

    def _take_rebuilt(self):
        with self._build_lock:
            built, self._built = self._built, None
        if built is None:
            return
        mpc = built[1]
        mpc.settings = self._running_settings(mpc)
        old_rate = self._mpc.settings.control_rate_hz
        self._mpc = mpc
        self._last_solve_s = None
        if mpc.settings.control_rate_hz != old_rate:
            self._timer.timer_period_ns = int(round(1e9 / mpc.settings.control_rate_hz))
        self.get_logger().info(f"planning problem rebuilt: {mpc.settings.robot_model}, "
                               f"{mpc.settings.horizon_steps} steps of {mpc.settings.step_s} s, "
                               f"{mpc.settings.max_obstacles} obstacle slots")

    def _rebuild_pending(self):
        return self._mpc.settings.needs_rebuild(self._settings)

    # --- subscriptions: keep the newest message; checks happen in the cycle so the status says why

    def _is_out_of_order(self, stamp_s, newest_s, timeout_s):
        """True for a message older than the newest one kept, while that one is still fresh.

        Once the newest is stale, older stamps are accepted again so that a source restarted with
        an earlier clock (simulation reset, bag loop) is not locked out for good.
        """
        now_s = self.get_clock().now().nanoseconds * 1e-9
        return newest_s is not None and stamp_s < newest_s and now_s - newest_s <= timeout_s

    def _on_odom(self, msg):
        try:
            newest_s = None if self._odom is None else stamp_to_seconds(self._odom.header.stamp)
            timeout_s = self._node_values["odom_timeout_s"]
            if self._is_out_of_order(stamp_to_seconds(msg.header.stamp), newest_s, timeout_s):
                self._warn("out_of_order", "odometry out of order: a message older than the last one was dropped")
                return
            self._odom = msg
        except Exception:  # noqa: BLE001 - a callback must never stop the executor
            self._warn("internal_error", "odometry callback failed:\n" + traceback.format_exc())

    def _on_goal(self, msg):
        try:
            previous = self._goal
            self._goal = msg
            if previous is None or (previous.pose.position.x, previous.pose.position.y) != (
                    msg.pose.position.x, msg.pose.position.y) or previous.header.frame_id != msg.header.frame_id:
                self._goal_changed = True
        except Exception:  # noqa: BLE001
            self._warn("internal_error", "goal callback failed:\n" + traceback.format_exc())

    def _on_forecast(self, msg):
        try:
            stamp_s = stamp_to_seconds(msg.header.stamp)
            newest_s = None if self._forecast is None else self._forecast[0]
            if self._is_out_of_order(stamp_s, newest_s, self._node_values["forecast_timeout_s"]):
                self._warn("out_of_order",
                           "obstacle_forecast out of order: a message older than the last one was dropped")
                return
            try:
                self._forecast = (stamp_s, msg.header.frame_id, cloud_to_forecast(msg))
                self._forecast_error = None
            except ValueError as error:
                self._forecast, self._forecast_error = None, str(error)
        except Exception:  # noqa: BLE001
            self._warn("internal_error", "forecast callback failed:\n" + traceback.format_exc())

    # --- the cycle -------------------------------------------------------------------------------

    def _on_timer(self):
        try:
            try:
                self._take_rebuilt()
                self._cycle()
            except InputProblem as problem:
                self._fail(problem.kind, str(problem))
        except Exception as error:  # noqa: BLE001 - the control loop must keep running
            if not self.context.ok():
                return  # SIGINT/SIGTERM shut the context down mid-cycle: nothing left to publish on
            self._warn("internal_error", "planning cycle failed:\n" + traceback.format_exc())
            self._fail("internal_error", f"planning cycle raised {type(error).__name__}: {error}", warn=False)

    def _cycle(self):
        now_s = self.get_clock().now().nanoseconds * 1e-9
        odom_stamp_s, x0, P0, yaw, body_frame = self._robot_state(now_s)
        goal = self._goal_position()
        forecast, forecast_note = self._forecast_on_grid(now_s, odom_stamp_s)
        if self._goal_changed:
            self._mpc.reset()
            self._goal_changed = False
        settings = self._mpc.settings
        model = self._mpc.model
        stamp = self.get_clock().now().to_msg()
        distance = float(np.hypot(*(goal - x0[0:2])))
        if distance <= self._node_values["goal_tolerance_m"]:
            self._mpc.reset()
            self._last_solve_s = None
            self._cmd_pub.publish(plan_messages.zero_twist(body_frame, stamp))
            self._publish_status(_LEVEL_OK, f"goal reached ({distance:.2f} m away)",
                                 {"status": "goal_reached", "distance_to_goal_m": distance})
            return

        elapsed_s = None if self._last_solve_s is None else now_s - self._last_solve_s
        if elapsed_s is not None and elapsed_s > settings.horizon_steps * settings.step_s:
            self._mpc.reset()  # after a gap longer than the horizon nothing of the old plan is left
            elapsed_s = None
        result = self._mpc.solve(x0, P0, goal, forecast, elapsed_s=elapsed_s)
        self._last_solve_s = now_s
        values = {
            "solve_ms": result.solve_ms, "iterations": result.iterations,
            "solver_status": result.solver_status, "status": result.status, "cost": result.cost,
            "obstacles_considered": result.obstacles_considered,
            "obstacles_dropped": result.obstacles_dropped,
            "risk_per_constraint": result.risk_per_constraint, "min_margin_m": result.min_margin_m,
            "distance_to_goal_m": distance,
        }
        if not result.success:
            reason = f"no plan: {result.status}" + (f" (solver: {result.solver_status})"
                                                    if result.solver_status else "")
            self._warn(result.status.split(":")[0], reason)
            self._publish_status(_LEVEL_ERROR, reason, dict(values, reason=reason))
            return
        kinematics = plan_messages.plan_kinematics(model.name, result.states, result.inputs, yaw, settings.step_s)
        odom_stamp = self._odom.header.stamp
        self._plan_pub.publish(plan_messages.plan_to_path(result, kinematics, self._planning_frame, odom_stamp))
        self._reference_pub.publish(plan_messages.plan_to_reference(result, kinematics, self._planning_frame,
                                                                    odom_stamp))
        command = model.command(result.states, result.inputs, yaw)
        self._cmd_pub.publish(plan_messages.command_to_twist(command, body_frame, stamp))
        level = _LEVEL_OK if result.status == "solved" else _LEVEL_WARN
        message = f"{result.status} in {result.solve_ms:.1f} ms, {result.iterations} iterations"
        if result.status == "least_violation":
            # infeasible_response least_violation: a usable motion, but not within the risk bound.
            values["max_violation"] = result.max_violation
            values["reason"] = (f"no plan meets every obstacle constraint: commanding the least-violation plan "
                                f"(largest ellipse violation {result.max_violation:.2f}, margin "
                                f"{result.min_margin_m:.2f} m); the risk bound does not hold for it")
            message += "; " + values["reason"]
            self._warn("least_violation", values["reason"])
        if forecast_note:
            level = _LEVEL_WARN
            values["reason"] = values["reason"] + "; " + forecast_note if "reason" in values else forecast_note
            message += f"; {forecast_note}"
            self._warn("forecast_ignored", forecast_note)
        self._publish_status(level, message, values)

    def _robot_state(self, now_s):
        """(stamp_s, x0, P0, yaw, body_frame) from the newest odometry, or InputProblem."""
        msg = self._odom
        if msg is None:
            raise InputProblem("no_odometry", "no odometry received yet on 'odom'")
        if msg.header.frame_id != self._planning_frame:
            raise InputProblem("wrong_frame", f"odometry frame_id '{msg.header.frame_id}' is not the "
                                              f"planning_frame '{self._planning_frame}'")
        if not msg.child_frame_id:
            raise InputProblem("bad_odometry", "odometry child_frame_id is empty (it is the command's body frame)")
        stamp_s = stamp_to_seconds(msg.header.stamp)
        age_s = now_s - stamp_s
        timeout_s = self._node_values["odom_timeout_s"]
        if age_s > timeout_s:
            raise InputProblem("stale_odometry", f"odometry is {age_s:.2f} s old (odom_timeout_s={timeout_s})")
        if age_s < -timeout_s:
            raise InputProblem("stale_odometry", f"odometry stamp is {-age_s:.2f} s in the future "
                                                 f"(odom_timeout_s={timeout_s})")
        pose, twist = msg.pose.pose, msg.twist.twist
        position = (pose.position.x, pose.position.y)
        body_velocity = (twist.linear.x, twist.linear.y)
        if not _finite(*position, *body_velocity, twist.angular.z):
            raise InputProblem("bad_odometry", "odometry position or velocity is NaN or Inf")
        yaw = quaternion_to_yaw(pose.orientation)
        if not np.isfinite(yaw):
            raise InputProblem("bad_odometry", "odometry orientation is NaN, Inf or a zero quaternion")
        pose_cov = np.asarray(msg.pose.covariance, dtype=float).reshape(6, 6)
        twist_cov = np.asarray(msg.twist.covariance, dtype=float).reshape(6, 6)
        if not (np.all(np.isfinite(pose_cov)) and np.all(np.isfinite(twist_cov))):
            raise InputProblem("bad_odometry", "odometry covariance is NaN or Inf")
        x0, P0 = self._mpc.model.state_from_odometry(position, yaw, body_velocity, pose_cov, twist_cov)
        return stamp_s, x0, P0, yaw, msg.child_frame_id

    def _goal_position(self):
        msg = self._goal
        if msg is None:
            raise InputProblem("no_goal", "no goal received yet on 'goal'")
        if msg.header.frame_id != self._planning_frame:
            raise InputProblem("wrong_frame", f"goal frame_id '{msg.header.frame_id}' is not the "
                                              f"planning_frame '{self._planning_frame}'")
        goal = np.array([msg.pose.position.x, msg.pose.position.y], dtype=float)
        if not np.all(np.isfinite(goal)):
            raise InputProblem("bad_goal", "goal position is NaN or Inf")
        return goal

    def _forecast_on_grid(self, now_s, odom_stamp_s):
        """The forecast resampled at the planner's grid, and a note when it was ignored (or InputProblem).

        Planner step k is at odom_stamp + k·step_s, i.e. (odom_stamp − forecast_stamp) + k·step_s
        after the forecast stamp.
        """
        settings = self._mpc.settings
        grid_s = settings.step_s * np.arange(1, settings.horizon_steps + 1)
        required = self._node_values["require_forecast"]
        if self._forecast_error is not None:
            raise InputProblem("bad_forecast", self._forecast_error)
        if self._forecast is None:
            if required:
                raise InputProblem("no_forecast", "no obstacle_forecast received yet (require_forecast is true)")
            return ObstacleForecast.empty(grid_s), ""
        stamp_s, frame_id, forecast = self._forecast
        if frame_id != self._planning_frame:
            raise InputProblem("wrong_frame", f"obstacle_forecast frame_id '{frame_id}' is not the "
                                              f"planning_frame '{self._planning_frame}'")
        age_s = now_s - stamp_s
        timeout_s = self._node_values["forecast_timeout_s"]
        if abs(age_s) > timeout_s:
            what = f"{age_s:.2f} s old" if age_s > 0 else f"stamped {-age_s:.2f} s in the future"
            note = f"obstacle_forecast is {what} (forecast_timeout_s={timeout_s})"
            if required:
                raise InputProblem("stale_forecast", note)
            return ObstacleForecast.empty(grid_s), note + ": planning without obstacles"
        problems = forecast.problems()
        if problems:
            raise InputProblem("bad_forecast", "obstacle_forecast rejected: " + "; ".join(problems))
        on_grid = forecast.resampled((odom_stamp_s - stamp_s) + grid_s)
        return ObstacleForecast(on_grid.track_ids, grid_s, on_grid.positions, on_grid.headings,
                                on_grid.covariances, on_grid.half_extents), ""

    # --- output ----------------------------------------------------------------------------------

    def _fail(self, kind, reason, warn=True):
        """No command; an ERROR status and a throttled warning naming what was wrong."""
        if warn:
            self._warn(kind, reason)
        self._publish_status(_LEVEL_ERROR, reason, {"status": kind, "reason": reason})

    def _publish_status(self, level, message, values):
        settings = self._mpc.settings
        with self._build_lock:
            build_error = self._build_error
        full = {
            "solve_ms": 0.0, "iterations": 0, "solver_status": "", "status": "", "cost": float("nan"),
            "obstacles_considered": 0, "obstacles_dropped": 0,
        }
        full.update(values)
        full.update({
            "risk_level": settings.risk_level, "risk_allocation": settings.risk_allocation,
            "risk_per_constraint": values.get("risk_per_constraint", float("nan")),
            "min_margin_m": values.get("min_margin_m", float("nan")),
            "robot_model": settings.robot_model, "horizon_steps": settings.horizon_steps,
            "step_s": settings.step_s, "robot_radius_m": settings.robot_radius_m,
            "rebuild_pending": self._rebuild_pending(),
        })
        if build_error:
            full["rebuild_error"] = build_error
        if "reason" in full:
            full["reason"] = full.pop("reason")
        self._status_pub.publish(plan_messages.status_message(level, message, self.get_fully_qualified_name(), full))


def main(args=None):
    """init → spin → shutdown; Ctrl-C and SIGTERM end it cleanly. Returns the exit code."""
    return spin_node(PlannerNode, NODE_NAME, args)


if __name__ == "__main__":
    sys.exit(main())
