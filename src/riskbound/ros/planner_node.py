"""Planner node: odometry, goal, obstacle forecast and the static map in; plan, reference, command and status out.

A managed node (riskbound.ros.managed_node): while active, every cycle of the timer
(control_rate_hz) checks its inputs (riskbound.ros.planner_inputs), solves the chance-constrained
MPC and publishes. Bad or stale input never produces a command: the cycle publishes an ERROR status
saying why and a throttled warning instead. An unconfigured or inactive planner commands nothing
and says so on planner_status.

Parameters: every planner setting (riskbound.planning.settings.PLANNER_SPECS) plus the node's
own NODE_SPECS below, validated by SettingSpec.check at configure and on every change. Settings
that change the optimisation problem's structure rebuild it on a background thread; the running
problem keeps planning until the new one is swapped in at the start of a cycle.

Run: python -m riskbound.ros.planner_node --ros-args --params-file config/drone.yaml -p activate_at_start:=true
"""

import sys
import threading
import traceback

import numpy as np
from diagnostic_msgs.msg import DiagnosticStatus
from geometry_msgs.msg import PoseStamped, TwistStamped
from nav_msgs.msg import OccupancyGrid, Odometry, Path
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy, qos_profile_sensor_data
from sensor_msgs.msg import PointCloud2
from trajectory_msgs.msg import MultiDOFJointTrajectory

from riskbound.forecast_schema import cloud_to_forecast
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import PLANNER_SPECS, PlannerSettings
from riskbound.ros import plan_messages
from riskbound.ros.conversions import stamp_to_seconds
from riskbound.ros.managed_node import ACTIVE, INACTIVE, UNCONFIGURED, ManagedNode
from riskbound.ros.map_messages import MAP_QOS, occupancy_from_message
from riskbound.ros.node_main import spin_node
from riskbound.ros.planner_inputs import InputProblem, forecast_on_grid, goal_position, is_out_of_order, robot_state
from riskbound.ros.throttled_warnings import ThrottledWarnings
from riskbound.settings_table import SettingSpec
from riskbound.world.static_world import StaticWorld

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
PLANNER_NAMES = frozenset(spec.name for spec in PLANNER_SPECS)

_LEVEL_OK, _LEVEL_WARN, _LEVEL_ERROR = DiagnosticStatus.OK, DiagnosticStatus.WARN, DiagnosticStatus.ERROR
# Settings every planner_status names (the values in force, or those configure will check).
STATUS_SETTINGS = ("risk_level", "risk_allocation", "robot_model", "horizon_steps", "step_s", "robot_radius_m")


class PlannerNode(ManagedNode):
    """Thin shell around ChanceConstrainedMPC: parameters, message checks and conversion, publishing.

    Managed node (riskbound.ros.managed_node): configure validates the settings, builds the
    problem and opens the topics; only while active does the cycle timer run and commands go out.
    The status publisher lives as long as the node, so every change of state is announced on
    planner_status (status unconfigured / inactive / finalized, level ERROR, with the reason): the
    watchdog treats any of them as a stop.
    """

    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, PLANNER_SPECS + NODE_SPECS, **kwargs)
        self._status_pub = self.create_publisher(DiagnosticStatus, "planner_status",
                                                 QoSProfile(depth=10, reliability=ReliabilityPolicy.RELIABLE))
        self._build_lock = threading.Lock()
        self._build_generation = 0
        self._warn = ThrottledWarnings(self.get_logger()).warn
        self._inputs, self._outputs = [], []
        self._timer = None
        self._mpc = None
        self._forget_inputs()

    def _forget_inputs(self):
        self._built = None  # (generation, mpc) from the background thread, taken by the next cycle
        self._build_error = ""
        self._odom = None
        self._goal = None
        self._goal_changed = False
        self._forecast = None  # (stamp_s, frame_id, ObstacleForecast) of the newest decodable cloud
        self._forecast_error = None  # why the newest cloud could not be decoded
        self._static_world = None  # StaticWorld of the newest usable map
        self._static_note = "none: no map received (walls and pillars are not avoided)"
        self._last_solve_s = None

    # --- lifecycle -------------------------------------------------------------------------------

    def _configure(self, values):
        self._planning_frame = values["planning_frame"]
        if not self._planning_frame:
            raise ValueError("planning_frame='' is not allowed: must name a frame")
        self._node_values = {spec.name: values[spec.name] for spec in NODE_SPECS}
        self._settings = PlannerSettings(**{name: values[name] for name in PLANNER_NAMES})
        self._mpc = ChanceConstrainedMPC(self._settings)
        reliable = QoSProfile(depth=10, reliability=ReliabilityPolicy.RELIABLE)
        latched = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                             durability=DurabilityPolicy.TRANSIENT_LOCAL)
        forecast_qos = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE)
        self._plan_pub = self.create_publisher(Path, "plan", reliable)
        self._reference_pub = self.create_publisher(MultiDOFJointTrajectory, "reference", reliable)
        self._cmd_pub = self.create_publisher(TwistStamped, "cmd_vel_plan", reliable)
        self._outputs = [self._plan_pub, self._reference_pub, self._cmd_pub]
        self._inputs = [self.create_subscription(Odometry, "odom", self._on_odom, qos_profile_sensor_data),
                        self.create_subscription(PoseStamped, "goal", self._on_goal, latched),
                        self.create_subscription(PointCloud2, "obstacle_forecast", self._on_forecast, forecast_qos),
                        self.create_subscription(OccupancyGrid, "map", self._on_map, MAP_QOS)]
        self.get_logger().info(
            f"planning in '{self._planning_frame}' with {self._settings.robot_model}, "
            f"{self._settings.horizon_steps} steps of {self._settings.step_s} s at "
            f"{self._settings.control_rate_hz} Hz, risk_level={self._settings.risk_level} "
            f"({self._settings.risk_allocation})")

    def _activate(self):
        self._take_rebuilt()
        self._mpc.reset()
        self._last_solve_s = None
        self._timer = self.create_timer(1.0 / self._mpc.settings.control_rate_hz, self._on_timer)

    def _deactivate(self):
        if self._timer is not None:
            self.destroy_timer(self._timer)
            self._timer = None

    def _release(self):
        self._deactivate()
        for subscription in self._inputs:
            self.destroy_subscription(subscription)
        for publisher in self._outputs:
            self.destroy_publisher(publisher)
        self._inputs, self._outputs = [], []
        with self._build_lock:
            self._build_generation += 1  # a build still running is dropped when it ends
        self._mpc = None
        self._forget_inputs()

    def _announce(self, state, reason):
        if state == ACTIVE:
            return  # the cycles speak for an active planner
        why = {UNCONFIGURED: "not configured", INACTIVE: "inactive", "finalized": "shut down"}[state]
        message = f"planner {why}: no commands" + (f" ({reason})" if reason else "")
        self._publish_status(_LEVEL_ERROR, message, {"status": state, "reason": message})

    # --- parameters ------------------------------------------------------------------------------

    def _apply_changes(self, changes):
        """Apply checked parameter changes to a configured planner; the reason when refused."""
        planner_changes = {name: value for name, value in changes.items() if name in PLANNER_NAMES}
        node_changes = {name: value for name, value in changes.items() if name not in PLANNER_NAMES}
        try:
            settings = self._settings.with_changes(**planner_changes)
        except ValueError as error:
            return str(error)
        rebuild = self._settings.needs_rebuild(settings)
        self._settings = settings
        self._node_values.update(node_changes)
        if rebuild:
            self._start_build(settings)
        else:
            self._mpc.settings = self._running_settings(self._mpc)
        self.get_logger().info("parameters changed: " + ", ".join(
            f"{name}={value!r}" for name, value in changes.items()) + (" (rebuilding the problem)" if rebuild else ""))
        return None

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
        if mpc.settings.control_rate_hz != old_rate and self._timer is not None:
            self._timer.timer_period_ns = int(round(1e9 / mpc.settings.control_rate_hz))
        self.get_logger().info(f"planning problem rebuilt: {mpc.settings.robot_model}, "
                               f"{mpc.settings.horizon_steps} steps of {mpc.settings.step_s} s, "
                               f"{mpc.settings.max_obstacles} obstacle slots")

    def _rebuild_pending(self):
        return self._mpc.settings.needs_rebuild(self._settings)

    # --- subscriptions: keep the newest message; checks happen in the cycle so the status says why

    def _is_out_of_order(self, stamp_s, newest_s, timeout_s):
        return is_out_of_order(stamp_s, newest_s, self.get_clock().now().nanoseconds * 1e-9, timeout_s)

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

    def _on_map(self, msg):
        """A new static world. A map that cannot be used (wrong frame, malformed, too large) is
        ignored with a warning and the status says so: planning goes on without walls."""
        try:
            try:
                occupancy = occupancy_from_message(msg, expected_frame_id=self._planning_frame)
                self._static_world = StaticWorld(occupancy)
                self._static_note = self._static_world.describe()
                self.get_logger().info(f"static map: {self._static_note}")
            except ValueError as error:
                self._static_world = None
                self._static_note = f"none: map ignored ({error})"
                self._warn("map_ignored", f"map ignored, planning without walls: {error}")
        except Exception:  # noqa: BLE001
            self._warn("internal_error", "map callback failed:\n" + traceback.format_exc())

    # --- the cycle -------------------------------------------------------------------------------

    def _on_timer(self):
        if not self.is_active:
            return
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
        odom_stamp_s, x0, P0, yaw, body_frame = robot_state(self._odom, self._planning_frame, now_s,
                                                            self._node_values["odom_timeout_s"], self._mpc.model)
        goal = goal_position(self._goal, self._planning_frame)
        forecast, forecast_note = forecast_on_grid(
            self._forecast, self._forecast_error, self._planning_frame, now_s, odom_stamp_s, self._mpc.settings,
            self._node_values["forecast_timeout_s"], self._node_values["require_forecast"])
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
        result = self._mpc.solve(x0, P0, goal, forecast, elapsed_s=elapsed_s, static_world=self._static_world)
        self._last_solve_s = now_s
        values = {
            "solve_ms": result.solve_ms, "iterations": result.iterations,
            "solver_status": result.solver_status, "status": result.status, "cost": result.cost,
            "obstacles_considered": result.obstacles_considered,
            "obstacles_dropped": result.obstacles_dropped,
            "risk_per_constraint": result.risk_per_constraint, "min_margin_m": result.min_margin_m,
            "risk_charged": result.risk_charged, "risk_static": result.risk_static, "start": result.start,
            "static_map": self._static_note,
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
        # A plan within the risk bound is fine to fly whether or not its iterations converged.
        level = _LEVEL_OK if result.status in ("solved", "feasible_not_converged") else _LEVEL_WARN
        message = f"{result.status} in {result.solve_ms:.1f} ms, {result.iterations} iterations"
        if result.status == "least_violation":
            # infeasible_response least_violation: a usable motion, but not within the risk bound.
            values["max_violation"] = result.max_violation
            values["reason"] = (f"no plan within the risk bound: commanding the least-violation plan "
                                f"(deepest obstacle-row violation {result.max_violation:.2f} m, margin "
                                f"{result.min_margin_m:.2f} m, risk charged {result.risk_charged:.3g} > "
                                f"{settings.risk_level:g}): the risk bound does not hold for it")
            message += "; " + values["reason"]
            self._warn("least_violation", values["reason"])
        if forecast_note:
            level = _LEVEL_WARN
            values["reason"] = values["reason"] + "; " + forecast_note if "reason" in values else forecast_note
            message += f"; {forecast_note}"
            self._warn("forecast_ignored", forecast_note)
        self._publish_status(level, message, values)

    # --- output ----------------------------------------------------------------------------------

    def _fail(self, kind, reason, warn=True):
        """No command; an ERROR status and a throttled warning naming what was wrong."""
        if warn:
            self._warn(kind, reason)
        self._publish_status(_LEVEL_ERROR, reason, {"status": kind, "reason": reason})

    # --- planner_status: what every status carries is decided here, and only here ----------------

    def _publish_status(self, level, message, values):
        """Publish one planner_status: the cycle's (or the lifecycle announcement's) `values`,
        completed by the fields every status carries."""
        self._status_pub.publish(plan_messages.status_message(level, message, self.get_fully_qualified_name(),
                                                              self._status_values(values)))

    def _status_values(self, values):
        full = {
            "solve_ms": 0.0, "iterations": 0, "solver_status": "", "status": "", "cost": float("nan"),
            "obstacles_considered": 0, "obstacles_dropped": 0,
        }
        full.update(values)
        if self._mpc is not None:
            in_force = {name: getattr(self._mpc.settings, name) for name in STATUS_SETTINGS}
        else:  # unconfigured: the values configure will check
            in_force = {name: self.get_parameter(name).value for name in STATUS_SETTINGS}
        full.update({
            "risk_level": in_force["risk_level"], "risk_allocation": in_force["risk_allocation"],
            "risk_per_constraint": values.get("risk_per_constraint", float("nan")),
            "min_margin_m": values.get("min_margin_m", float("nan")),
            "robot_model": in_force["robot_model"], "horizon_steps": in_force["horizon_steps"],
            "step_s": in_force["step_s"], "robot_radius_m": in_force["robot_radius_m"],
            "rebuild_pending": self._mpc is not None and self._rebuild_pending(),
        })
        with self._build_lock:
            if self._build_error:
                full["rebuild_error"] = self._build_error
        if "reason" in full:
            full["reason"] = full.pop("reason")
        return full

def main(args=None):
    """init → spin → shutdown; Ctrl-C and SIGTERM end it cleanly. Returns the exit code."""
    return spin_node(PlannerNode, NODE_NAME, args)


if __name__ == "__main__":
    sys.exit(main())
