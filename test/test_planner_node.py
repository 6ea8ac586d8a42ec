"""Planner node in a real ROS graph (localhost DDS): the node runs as its own process, a driver
node in this process publishes odometry, goal and a forecast of two walkers and listens.

Scene: the robot stands at the origin facing +y (yaw = π/2); the goal is 4 m along +x, i.e. to
the robot's right; one walker stands in the way, another walks by.
"""

import math
import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import rclpy
from builtin_interfaces.msg import Time
from diagnostic_msgs.msg import DiagnosticStatus
from geometry_msgs.msg import PoseStamped, TwistStamped
from nav_msgs.msg import OccupancyGrid, Odometry, Path
from rclpy.executors import SingleThreadedExecutor
from rclpy.parameter import Parameter
from rclpy.parameter_client import AsyncParameterClient
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
from sensor_msgs.msg import PointCloud2
from std_msgs.msg import Header
from trajectory_msgs.msg import MultiDOFJointTrajectory

from riskbound.motion.forecast import ObstacleForecast
from riskbound.motion.robot_models import make_robot_model
from riskbound.ros.plan_messages import plan_kinematics
from riskbound.ros.conversions import seconds_to_stamp, stamp_to_seconds, yaw_to_quaternion
from riskbound.ros.forecast_codec import forecast_to_cloud

from node_helpers import stop_process_group, wait_for

HORIZON_STEPS = 20
STEP_S = 0.1
# 5 Hz with the whole period for the solver: the test machine is shared, and a cycle that hits
# the wall-time cap publishes no plan (correctly, but the test then waits longer).
CONTROL_RATE_HZ = 5.0
ROBOT_YAW = math.pi / 2
GOAL_XY = (4.0, 0.0)
REQUIRED_KEYS = ("solve_ms", "iterations", "solver_status", "status", "cost", "obstacles_considered",
                 "obstacles_dropped", "risk_level", "risk_allocation", "risk_per_constraint", "min_margin_m")


def values_of(status):
    return {kv.key: kv.value for kv in status.values}


def run_cli(*args, timeout_s=30):
    return subprocess.run([sys.executable, "-m", "riskbound.cli", "tune", *args], capture_output=True,
                          text=True, timeout=timeout_s)


def walker_forecast():
    """Two walkers on constant-velocity forecasts, 2 s ahead in 0.1 s steps, covariance growing with time."""
    times = np.round(np.arange(0.0, 2.05, 0.1), 10)
    starts = np.array([[1.6, 0.1], [3.0, -2.5]])
    velocities = np.array([[0.0, 0.05], [0.0, 0.8]])
    positions = starts[:, None, :] + velocities[:, None, :] * times[None, :, None]
    sigma = 0.05 + 0.1 * times
    covariances = np.zeros((2, len(times), 2, 2))
    covariances[..., 0, 0] = covariances[..., 1, 1] = sigma**2
    headings = np.tile(np.arctan2(velocities[:, 1], velocities[:, 0])[:, None], (1, len(times)))
    return ObstacleForecast([7, 11], times, positions, headings, covariances, [[0.25, 0.2], [0.25, 0.2]])


class Driver:
    """Test-side node: publishes inputs at 20 Hz and records everything the planner publishes."""

    def __init__(self):
        self.node = rclpy.create_node("planner_test_driver")
        self.lock = threading.Lock()
        self.odom_mode = "ok"
        self.forecast_mode = "ok"
        self.received = {"plan": [], "reference": [], "cmd": [], "status": []}
        reliable = QoSProfile(depth=50, reliability=ReliabilityPolicy.RELIABLE)
        latched = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                             durability=DurabilityPolicy.TRANSIENT_LOCAL)
        self.odom_pub = self.node.create_publisher(Odometry, "odom", 10)
        self.goal_pub = self.node.create_publisher(PoseStamped, "goal", latched)
        self.forecast_pub = self.node.create_publisher(PointCloud2, "obstacle_forecast",
                                                       QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE))
        for key, msg_type, topic in (("plan", Path, "plan"),
                                     ("reference", MultiDOFJointTrajectory, "reference"),
                                     ("cmd", TwistStamped, "cmd_vel_plan"),
                                     ("status", DiagnosticStatus, "planner_status")):
            self.node.create_subscription(msg_type, topic, self._recorder(key), reliable)
        self.params = AsyncParameterClient(self.node, "/planner")
        self.forecast = walker_forecast()
        self.ticks = 0
        self.node.create_timer(0.05, self._publish_inputs)
        self.executor = SingleThreadedExecutor()
        self.executor.add_node(self.node)
        self.thread = threading.Thread(target=self.executor.spin, daemon=True)
        self.thread.start()

    def _recorder(self, key):
        def record(msg):
            with self.lock:
                self.received[key].append((time.monotonic(), msg))
        return record

    def now_s(self):
        return self.node.get_clock().now().nanoseconds * 1e-9

    def publish_goal(self, x, y):
        goal = PoseStamped(header=Header(stamp=self.node.get_clock().now().to_msg(), frame_id="odom"))
        goal.pose.position.x, goal.pose.position.y = float(x), float(y)
        goal.pose.orientation.w = 1.0
        self.goal_pub.publish(goal)

    def _publish_inputs(self):
        now_s = self.now_s()
        odom = Odometry(child_frame_id="base_link")
        odom.header.frame_id = "map" if self.odom_mode == "wrong_frame" else "odom"
        odom.header.stamp = seconds_to_stamp(now_s - (2.0 if self.odom_mode == "stale" else 0.0), Time)
        odom.pose.pose.position.x = float("nan") if self.odom_mode == "nan" else 0.0
        odom.pose.pose.orientation = yaw_to_quaternion(ROBOT_YAW)
        odom.pose.covariance[0] = odom.pose.covariance[7] = 0.01**2
        odom.pose.covariance[35] = 0.02**2
        odom.twist.covariance[0] = odom.twist.covariance[7] = 0.02**2
        self.odom_pub.publish(odom)
        self.ticks += 1
        if self.ticks % 4 == 0:
            header = Header(stamp=seconds_to_stamp(now_s, Time), frame_id="odom")
            cloud = forecast_to_cloud(self.forecast, header)
            if self.forecast_mode == "missing_field":
                cloud.fields = [f for f in cloud.fields if f.name != "cov_xx"]
            self.forecast_pub.publish(cloud)

    def messages(self, key, since=0.0):
        with self.lock:
            return [msg for stamp, msg in self.received[key] if stamp >= since]

    def arrivals(self, key, since=0.0):
        with self.lock:
            return [stamp for stamp, _ in self.received[key] if stamp >= since]

    def set_parameter(self, name, value, timeout_s=10.0):
        future = self.params.set_parameters([Parameter(name, value=value)])
        wait_for(future.done, timeout_s, f"set_parameters {name}")
        return future.result().results[0]

    def close(self):
        self.executor.shutdown(timeout_sec=2.0)
        self.thread.join(timeout=5.0)
        self.node.destroy_node()


@pytest.fixture(scope="module")
def graph(tmp_path_factory):
    log_path = tmp_path_factory.mktemp("planner") / "planner.log"
    with open(log_path, "w") as log:
        process = subprocess.Popen(
            [sys.executable, "-m", "riskbound.ros.planner_node", "--ros-args", "-p", "activate_at_start:=true",
             "-p", f"horizon_steps:={HORIZON_STEPS}", "-p", f"step_s:={STEP_S}",
             "-p", f"control_rate_hz:={CONTROL_RATE_HZ}", "-p", "solver_time_fraction:=1.0",
             "-p", "risk_level:=0.05", "-p", "goal_tolerance_m:=0.2"],
            stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    rclpy.init()
    driver = None
    try:
        driver = Driver()
        driver.publish_goal(*GOAL_XY)
        wait_for(lambda: any(s.level == DiagnosticStatus.OK for s in driver.messages("status")), 30.0,
                 "a first OK planner_status")
        yield driver, process
    finally:
        stop_process_group(process)
        if driver is not None:
            driver.close()
        rclpy.try_shutdown()
        sys.stdout.write(log_path.read_text()[-3000:])


def newest_ok_status(driver, since=0.0):
    ok = [s for s in driver.messages("status", since) if s.level == DiagnosticStatus.OK]
    return ok[-1] if ok else None


def test_unicycle_reference_on_a_circle_has_centripetal_acceleration():
    """Uniform circular motion: |a| = v ω = v²/r, pointing at the centre (common practice, no source)."""
    v, omega, dt, yaw0 = 0.8, 0.5, 0.1, 0.3
    model = make_robot_model("unicycle")
    inputs = np.tile([0.0, omega], (10, 1))
    states = model.rollout([1.0, 2.0, yaw0, v], inputs, dt)
    positions, yaws, velocities, yaw_rates, accelerations = plan_kinematics("unicycle", states, inputs, yaw0, dt)
    radius = v / omega
    centre = np.array([1.0, 2.0]) + radius * np.array([-math.sin(yaw0), math.cos(yaw0)])
    to_centre = (centre - positions[:-1]) / np.linalg.norm(centre - positions[:-1], axis=1, keepdims=True)
    assert np.linalg.norm(accelerations[:-1], axis=1) == pytest.approx(np.full(10, v * omega), rel=1e-9)
    # The midpoint step's chord is v Δt instead of 2r sin(ωΔt/2): relative error (ωΔt)²/24 ≈ 1e-4
    # per step, so the rolled-out points sit that far off the exact circle.
    assert accelerations[:-1] / (v * omega) == pytest.approx(to_centre, abs=5e-4)
    assert np.linalg.norm(velocities, axis=1) == pytest.approx(np.full(11, v), rel=1e-12)
    assert yaw_rates[:-1] == pytest.approx(np.full(10, omega)) and yaw_rates[-1] == 0.0
    assert np.all(accelerations[-1] == 0.0), "nothing is planned beyond the last point"


def test_double_integrator_yaw_follows_the_velocity():
    states = np.array([[0.0, 0.0, 0.0, 0.0], [0.0, 0.005, 0.0, 0.1], [0.0, 0.02, 0.0, 0.2]])
    inputs = np.array([[0.0, 1.0], [0.0, 1.0]])
    _, yaws, _, yaw_rates, accelerations = plan_kinematics("double_integrator", states, inputs, 0.3, 0.1)
    assert yaws == pytest.approx([0.3, math.pi / 2, math.pi / 2]), "at rest the odometry yaw is kept"
    assert yaw_rates == pytest.approx([(math.pi / 2 - 0.3) / 0.1, 0.0, 0.0])
    assert accelerations == pytest.approx(np.array([[0.0, 1.0], [0.0, 1.0], [0.0, 0.0]]))


def test_inputs_in_plan_command_and_status_out(graph):
    driver, _ = graph
    wait_for(lambda: len(driver.messages("cmd")) >= 3 and driver.messages("plan") and driver.messages("reference"),
             10.0, "plan, reference and three commands")
    status = newest_ok_status(driver)
    values = values_of(status)
    assert status.name == "riskbound planner"
    assert set(REQUIRED_KEYS) <= set(values)
    assert values["status"] == "solved" and values["risk_allocation"] == "joint"
    considered = int(values["obstacles_considered"])
    assert considered >= 1, "the walker standing 1.6 m ahead is within reach and must be constrained"
    # Joint allocation splits α uniformly over steps × obstacles (Boole's inequality; README.md, How it works, item 4).
    assert float(values["risk_per_constraint"]) == pytest.approx(0.05 / (HORIZON_STEPS * considered), rel=1e-5)
    assert float(values["min_margin_m"]) >= -1e-3, "the plan must lie outside every obstacle ellipse"

    plan = driver.messages("plan")[-1]
    assert plan.header.frame_id == "odom" and len(plan.poses) == HORIZON_STEPS + 1
    first = plan.poses[0].pose.position
    assert (first.x, first.y) == pytest.approx((0.0, 0.0), abs=1e-6), "a plan starts at the odometry position"
    stamps = np.array([stamp_to_seconds(p.header.stamp) for p in plan.poses])
    assert stamps[0] == pytest.approx(stamp_to_seconds(plan.header.stamp), abs=1e-6)
    assert np.diff(stamps) == pytest.approx(np.full(HORIZON_STEPS, STEP_S), abs=1e-6)
    last = plan.poses[-1].pose.position
    assert last.x > 0.3, "the plan must head for the goal along +x"

    reference = driver.messages("reference")[-1]
    assert list(reference.joint_names) == ["base"] and len(reference.points) == HORIZON_STEPS + 1
    p = np.array([[pt.transforms[0].translation.x, pt.transforms[0].translation.y] for pt in reference.points])
    v = np.array([[pt.velocities[0].linear.x, pt.velocities[0].linear.y] for pt in reference.points])
    a = np.array([[pt.accelerations[0].linear.x, pt.accelerations[0].linear.y] for pt in reference.points])
    t = np.array([pt.time_from_start.sec + 1e-9 * pt.time_from_start.nanosec for pt in reference.points])
    assert t == pytest.approx(STEP_S * np.arange(HORIZON_STEPS + 1), abs=1e-6)
    # Exact zero-order-hold discretisation of the double integrator (common practice, no source):
    # p⁺ = p + v Δt + ½ a Δt², v⁺ = v + a Δt with a held over the step.
    assert p[1:] == pytest.approx(p[:-1] + v[:-1] * STEP_S + 0.5 * a[:-1] * STEP_S**2, abs=1e-6)
    assert v[1:] == pytest.approx(v[:-1] + a[:-1] * STEP_S, abs=1e-6)

    # The command is the reference velocity at the end of the first step, in the body frame
    # (REP-103: x forward, y left). Facing +y, a goal along +x lies to the robot's right: y < 0.
    cmd = driver.messages("cmd")[-1]
    assert cmd.header.frame_id == "base_link"
    c, s = math.cos(ROBOT_YAW), math.sin(ROBOT_YAW)
    body = np.array([cmd.twist.linear.x, cmd.twist.linear.y])
    commands_world = [np.array([[c, -s], [s, c]]) @ body]
    references_world = [np.array([ref.points[1].velocities[0].linear.x, ref.points[1].velocities[0].linear.y])
                        for ref in driver.messages("reference")]
    assert any(np.allclose(commands_world[0], r, atol=1e-6) for r in references_world)
    assert cmd.twist.linear.y < 0.0
    assert abs(cmd.twist.angular.z) == 0.0


def test_risk_level_set_with_cli_shows_in_next_status(graph):
    driver, _ = graph
    done = run_cli("planner", "risk_level=0.02")
    assert done.returncode == 0, done.stderr
    since = time.monotonic()
    status = wait_for(lambda: newest_ok_status(driver, since), 5.0, "an OK status after the change")
    values = values_of(status)
    assert float(values["risk_level"]) == pytest.approx(0.02)
    considered = int(values["obstacles_considered"])
    assert float(values["risk_per_constraint"]) == pytest.approx(0.02 / (HORIZON_STEPS * max(considered, 1)), rel=1e-5)


def test_out_of_range_risk_level_is_rejected_with_reason(graph):
    driver, _ = graph
    before = values_of(wait_for(lambda: newest_ok_status(driver), 5.0, "an OK status"))["risk_level"]
    rejected = run_cli("planner", "risk_level=0.7")
    assert rejected.returncode == 1
    # rclpy checks the descriptor range first; its reason names the parameter and both bounds.
    assert "risk_level" in rejected.stderr and "0.5" in rejected.stderr and "0.0" in rejected.stderr
    # The end point passes rclpy's closed range check and reaches the node's own validation.
    edge = driver.set_parameter("risk_level", 0.5)
    assert not edge.successful
    assert edge.reason == "risk_level=0.5 is out of range: must be in (0.0, 0.5)"
    since = time.monotonic()
    after = values_of(wait_for(lambda: newest_ok_status(driver, since), 5.0, "an OK status"))["risk_level"]
    assert after == before


@pytest.mark.parametrize("mode, words", [
    ("nan", ("odometry", "NaN")),
    ("wrong_frame", ("frame_id 'map'", "planning_frame 'odom'")),
    ("stale", ("odometry", "old", "odom_timeout_s")),
])
def test_bad_odometry_yields_no_command_and_a_status_saying_why(graph, mode, words):
    driver, _ = graph
    driver.odom_mode = mode
    try:
        first_error = wait_for(
            lambda: [s for s in driver.messages("status") if s.level == DiagnosticStatus.ERROR
                     and all(w in values_of(s).get("reason", "") for w in words)], 5.0, f"an ERROR status for {mode}")
        assert first_error
        time.sleep(0.3)  # let commands already on the wire arrive
        since = time.monotonic()
        time.sleep(1.0)
        assert driver.messages("cmd", since) == []
        statuses = driver.messages("status", since)
        assert len(statuses) >= 3
        assert all(s.level == DiagnosticStatus.ERROR and all(w in s.message for w in words) for s in statuses)
    finally:
        driver.odom_mode = "ok"
    since = time.monotonic()
    wait_for(lambda: driver.messages("cmd", since), 5.0, "commands to resume with good odometry")


def test_malformed_forecast_yields_no_command(graph):
    driver, _ = graph
    driver.forecast_mode = "missing_field"
    try:
        wait_for(lambda: [s for s in driver.messages("status") if "'cov_xx' is missing" in values_of(s).get("reason", "")],
                 5.0, "a status naming the missing forecast field")
        time.sleep(0.3)
        since = time.monotonic()
        time.sleep(0.8)
        assert driver.messages("cmd", since) == []
    finally:
        driver.forecast_mode = "ok"
    since = time.monotonic()
    wait_for(lambda: driver.messages("cmd", since), 5.0, "commands to resume with a good forecast")


def test_goal_reached_gives_a_zero_command(graph):
    driver, _ = graph
    driver.publish_goal(0.1, 0.05)
    try:
        since = time.monotonic()
        wait_for(lambda: [s for s in driver.messages("status", since) if values_of(s)["status"] == "goal_reached"],
                 5.0, "status goal_reached")
        time.sleep(0.3)
        since = time.monotonic()
        commands = wait_for(lambda: driver.messages("cmd", since), 5.0, "commands at the goal")
        assert all((c.twist.linear.x, c.twist.linear.y, c.twist.angular.z) == (0.0, 0.0, 0.0) for c in commands)
    finally:
        driver.publish_goal(*GOAL_XY)
    since = time.monotonic()
    wait_for(lambda: [s for s in driver.messages("status", since) if values_of(s)["status"] == "solved"],
             5.0, "solving again for the far goal")


def test_horizon_change_rebuilds_without_stopping_status(graph):
    driver, _ = graph
    since = time.monotonic()
    result = driver.set_parameter("horizon_steps", 15)
    assert result.successful, result.reason
    rebuilt = wait_for(lambda: [s for s in driver.messages("status", since)
                                if values_of(s)["horizon_steps"] == "15" and s.level == DiagnosticStatus.OK],
                       15.0, "an OK status from the rebuilt problem")
    assert rebuilt
    time.sleep(0.5)
    arrivals = np.array(driver.arrivals("status", since))
    # 5 Hz: a gap of a whole second would mean the build stalled the control loop.
    assert np.max(np.diff(arrivals)) < 1.0
    plan_since = time.monotonic()
    plan = wait_for(lambda: driver.messages("plan", plan_since), 5.0, "a plan from the rebuilt problem")[-1]
    assert len(plan.poses) == 16
    result = driver.set_parameter("horizon_steps", HORIZON_STEPS)
    assert result.successful


def test_infeasible_response_decides_between_no_command_and_the_least_violation_plan(graph):
    # A walker standing on the robot: no plan meets its ellipse. With the default response the cycle
    # fails (ERROR, no command: the watchdog stops the robot); with least_violation the planner
    # commands the plan that leaves the ellipse, at level WARN, saying the risk bound does not hold.
    driver, _ = graph
    times = np.round(np.arange(0.0, 2.05, 0.1), 10)
    on_robot = ObstacleForecast([5], times, np.tile([[[0.05, 0.05]]], (1, len(times), 1)), np.zeros((1, len(times))),
                                np.tile(0.01 * np.eye(2), (1, len(times), 1, 1)), [[0.3, 0.3]])
    normal = driver.forecast
    driver.forecast = on_robot
    try:
        since = time.monotonic()
        failed = wait_for(lambda: [s for s in driver.messages("status", since) if values_of(s)["status"] == "infeasible"],
                          10.0, "an infeasible status with the default response")
        assert failed[-1].level == DiagnosticStatus.ERROR
        time.sleep(0.3)
        quiet = time.monotonic()
        time.sleep(0.6)
        assert driver.messages("cmd", quiet) == []

        assert driver.set_parameter("infeasible_response", "least_violation").successful
        since = time.monotonic()
        escaping = wait_for(lambda: [s for s in driver.messages("status", since)
                                     if values_of(s)["status"] == "least_violation"], 20.0, "a least_violation status")
        values = values_of(escaping[-1])
        assert escaping[-1].level == DiagnosticStatus.WARN
        assert float(values["max_violation"]) > 0.0 and float(values["min_margin_m"]) < 0.0
        assert "risk bound does not hold" in values["reason"]
        commands = wait_for(lambda: driver.messages("cmd", since), 5.0, "commands while escaping")
        assert max(math.hypot(c.twist.linear.x, c.twist.linear.y) for c in commands) > 0.05
    finally:
        driver.forecast = normal
        assert driver.set_parameter("infeasible_response", "stop").successful
    since = time.monotonic()
    wait_for(lambda: [s for s in driver.messages("status", since)
                      if values_of(s)["status"] == "solved" and s.level == DiagnosticStatus.OK], 20.0,
             "solving again with the default response")


def test_map_in_the_wrong_frame_is_ignored_and_a_good_one_is_used(graph):
    # The planning frame is 'odom' (REP-105); a map in another frame must not be used silently.
    # (Runs late: a latched map stays in force, and the tests above plan without one.)
    from riskbound.ros.map_messages import MAP_QOS, occupancy_to_message
    from riskbound.world.occupancy import OccupancyMap
    driver, _ = graph
    publisher = driver.node.create_publisher(OccupancyGrid, "map", MAP_QOS)
    try:
        values = np.zeros((40, 60), dtype=np.int8)
        values[0, :] = 100  # a wall along the hall's bottom edge, far from the robot's path
        for frame, expected in (("base_link", "map ignored"), ("odom", "60×40 cells of 0.1 m in 'odom'")):
            occupancy = OccupancyMap(0.1, 60, 40, -2.0, -6.0, 0.0, frame, values)
            since = time.monotonic()
            publisher.publish(occupancy_to_message(occupancy, driver.now_s()))
            wait_for(lambda: [s for s in driver.messages("status", since) if expected in values_of(s).get("static_map", "")],
                     10.0, f"a status saying '{expected}'")
        since = time.monotonic()
        wait_for(lambda: newest_ok_status(driver, since), 10.0, "an OK status planning with the map")
    finally:
        driver.node.destroy_publisher(publisher)


def test_sigterm_stops_the_node_cleanly(graph):
    _, process = graph
    os.killpg(process.pid, signal.SIGTERM)
    assert process.wait(timeout=10) == 0
