"""Managed (lifecycle) nodes on a live graph (localhost DDS): planner, watchdog and tracker run as
their own processes, started unconfigured; a driver node in this process feeds them inputs,
records what they publish and drives their transitions through the standard lifecycle services.
The operator command (`riskbound switch`) is exercised on a planner whose start value is invalid.

The transitions and states checked are those of the ROS 2 managed-node design (unconfigured,
inactive, active, finalized); the stop bound is the watchdog's own (WatchdogSettings.stop_bound_s).
Timing margins for a shared machine: common practice, no source.
"""

import math
import os
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import rclpy
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus
from geometry_msgs.msg import Pose, PoseArray, PoseStamped, TwistStamped
from lifecycle_msgs.srv import ChangeState, GetState
from nav_msgs.msg import Odometry
from rclpy.executors import SingleThreadedExecutor
from rclpy.lifecycle import TransitionCallbackReturn
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy, qos_profile_sensor_data
from sensor_msgs.msg import PointCloud2
from std_msgs.msg import Header

from riskbound.motion.forecast import ObstacleForecast
from riskbound.ros.conversions import yaw_to_quaternion
from riskbound.ros.forecast_codec import forecast_to_cloud
from riskbound.ros.managed_node import UNCONFIGURED, ManagedNode
from riskbound.supervision.settings import WatchdogSettings

from node_helpers import stop_process_group, wait_for

TRACKER_NS = "/lifecycle_tracking"
BAD_NS = "/lifecycle_bad"
PLANNER_ARGS = ["-p", "control_rate_hz:=5.0", "-p", "solver_time_fraction:=1.0", "-p", "horizon_steps:=15"]
# Generous staleness limits: the stop on deactivation must come from the planner saying it is
# inactive, well before its silence could be noticed.
WATCHDOG_PARAMS = {"control_rate_hz": 5.0, "status_timeout_s": 1.0, "command_timeout_s": 1.0,
                   "odom_timeout_s": 1.0, "forecast_timeout_s": 1.0, "recovery_cycles": 2}
GOAL_XY = (3.0, 0.0)


def values_of(status):
    return {kv.key: kv.value for kv in status.values}


def speed(twist_stamped):
    return math.hypot(twist_stamped.twist.linear.x, twist_stamped.twist.linear.y)


class Driver:
    """Test-side node: inputs at 20 Hz, recorders for every output, lifecycle service clients."""

    def __init__(self):
        self.node = rclpy.create_node("lifecycle_test_driver")
        self.lock = threading.Lock()
        self.received = {"plan_cmd": [], "status": [], "cmd": [], "diagnostics": [], "tracks": []}
        reliable = QoSProfile(depth=50, reliability=ReliabilityPolicy.RELIABLE)
        for key, msg_type, topic in (("plan_cmd", TwistStamped, "cmd_vel_plan"),
                                     ("status", DiagnosticStatus, "planner_status"),
                                     ("cmd", TwistStamped, "cmd_vel"),
                                     ("diagnostics", DiagnosticArray, "/diagnostics"),
                                     ("tracks", PointCloud2, f"{TRACKER_NS}/obstacle_forecast")):
            self.node.create_subscription(msg_type, topic, self._recorder(key), reliable)
        self.odom_pub = self.node.create_publisher(Odometry, "odom", 10)
        self.forecast_pub = self.node.create_publisher(PointCloud2, "obstacle_forecast",
                                                       QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE))
        self.detections_pub = self.node.create_publisher(PoseArray, f"{TRACKER_NS}/detections",
                                                         qos_profile_sensor_data)
        goal_pub = self.node.create_publisher(PoseStamped, "goal", QoSProfile(
            depth=1, reliability=ReliabilityPolicy.RELIABLE, durability=DurabilityPolicy.TRANSIENT_LOCAL))
        goal = PoseStamped(header=Header(frame_id="odom"))
        goal.pose.position.x, goal.pose.position.y = GOAL_XY
        goal.pose.orientation.w = 1.0
        goal_pub.publish(goal)
        self.clients = {}
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

    def _publish_inputs(self):
        now = self.node.get_clock().now()
        header = Header(stamp=now.to_msg(), frame_id="odom")
        odom = Odometry(header=header, child_frame_id="base_link")
        odom.pose.pose.orientation = yaw_to_quaternion(0.0)
        odom.pose.covariance[0] = odom.pose.covariance[7] = 0.01**2
        odom.pose.covariance[35] = 0.02**2
        self.odom_pub.publish(odom)
        self.ticks += 1
        if self.ticks % 2 == 0:
            self.forecast_pub.publish(forecast_to_cloud(ObstacleForecast.empty(np.arange(0.0, 2.05, 0.1)), header))
        walker = Pose()
        walker.position.x, walker.position.y = 5.0 + 0.06 * self.ticks, -2.0
        walker.orientation.w = 0.0  # zero quaternion: heading unknown
        self.detections_pub.publish(PoseArray(header=header, poses=[walker]))

    def messages(self, key, since=0.0):
        with self.lock:
            return [msg for stamp, msg in self.received[key] if stamp >= since]

    def arrivals(self, key, since=0.0):
        with self.lock:
            return [(stamp, msg) for stamp, msg in self.received[key] if stamp >= since]

    def _call(self, node_name, srv_type, suffix, request, timeout_s=30.0):
        key = (node_name, suffix)
        if key not in self.clients:
            self.clients[key] = self.node.create_client(srv_type, f"{node_name}/{suffix}")
        client = self.clients[key]
        wait_for(lambda: client.service_is_ready(), 30.0, f"{node_name}/{suffix}")
        future = client.call_async(request)
        wait_for(future.done, timeout_s, f"the answer of {node_name}/{suffix}")
        return future.result()

    def state(self, node_name):
        return self._call(node_name, GetState, "get_state", GetState.Request()).current_state.label

    def change(self, node_name, label):
        """Ask for the transition `label`; True when the node accepted it."""
        request = ChangeState.Request()
        request.transition.label = label
        return self._call(node_name, ChangeState, "change_state", request).success

    def close(self):
        self.executor.shutdown(timeout_sec=2.0)
        self.thread.join(timeout=5.0)
        self.node.destroy_node()


def start_node(module, log_dir, name, *ros_args):
    log = open(os.path.join(log_dir, f"{name}.log"), "w")
    process = subprocess.Popen([sys.executable, "-m", f"riskbound.ros.{module}", "--ros-args", *ros_args],
                               stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    log.close()
    return process


def ros_params(params):
    return [item for name, value in params.items() for item in ("-p", f"{name}:={value}")]


@pytest.fixture(scope="module")
def graph(tmp_path_factory):
    log_dir = str(tmp_path_factory.mktemp("lifecycle"))
    processes = {
        "planner": start_node("planner_node", log_dir, "planner", *PLANNER_ARGS),
        "watchdog": start_node("watchdog_node", log_dir, "watchdog", *ros_params(WATCHDOG_PARAMS)),
        "tracker": start_node("tracker_node", log_dir, "tracker", "-r", f"__ns:={TRACKER_NS}"),
    }
    rclpy.init()
    driver = None
    try:
        driver = Driver()
        yield driver, processes
    finally:
        for process in processes.values():
            stop_process_group(process)
        if driver is not None:
            driver.close()
        rclpy.try_shutdown()
        for name in processes:
            with open(os.path.join(log_dir, f"{name}.log")) as log:
                sys.stdout.write(f"--- {name}\n{log.read()[-2500:]}")


def test_nodes_start_unconfigured_and_send_nothing(graph):
    driver, _ = graph
    for name in ("/planner", "/watchdog", f"{TRACKER_NS}/tracker"):
        assert driver.state(name) == "unconfigured"
    since = time.monotonic()
    time.sleep(1.0)
    assert driver.messages("plan_cmd", since) == [] and driver.messages("cmd", since) == []
    assert driver.messages("tracks", since) == []


def test_planner_and_watchdog_through_every_transition(graph):
    driver, processes = graph
    assert driver.change("/planner", "configure") and driver.change("/watchdog", "configure")
    assert driver.state("/planner") == driver.state("/watchdog") == "inactive"
    inactive = wait_for(lambda: [s for s in driver.messages("status") if values_of(s)["status"] == "inactive"],
                        5.0, "the planner announcing it is inactive")
    assert inactive[-1].level == DiagnosticStatus.ERROR and "no commands" in inactive[-1].message
    # Configured with fresh inputs, but not active: no command from either node.
    since = time.monotonic()
    time.sleep(1.0)
    assert driver.messages("plan_cmd", since) == [] and driver.messages("cmd", since) == []

    assert driver.change("/watchdog", "activate")
    stops = wait_for(lambda: driver.messages("cmd", since), 5.0, "the active watchdog's stop commands")
    assert all(speed(c) == 0.0 for c in stops), "nothing may drive the robot while the planner is inactive"
    assert driver.change("/planner", "activate")
    assert driver.state("/planner") == "active"
    wait_for(lambda: [c for c in driver.messages("cmd") if speed(c) > 0.05], 30.0,
             "the watchdog forwarding the active planner's commands")

    # Deactivated mid-run: the planner says so at once and the watchdog stops the robot, long
    # before the planner's silence would (status_timeout_s).
    asked = time.monotonic()
    assert driver.change("/planner", "deactivate")
    answered = time.monotonic()
    stop = wait_for(lambda: [t for t, c in driver.arrivals("cmd", asked) if speed(c) == 0.0], 5.0, "a stop")[0]
    settings = WatchdogSettings(**WATCHDOG_PARAMS)
    latency_s = stop - asked
    assert latency_s < settings.status_timeout_s < settings.stop_bound_s(settings.status_timeout_s), latency_s
    wait_for(lambda: [d for d in driver.messages("diagnostics", asked)
                      if "planner_inactive" in values_of(d.status[0]).get("faults", "")], 5.0,
             "/diagnostics naming planner_inactive")
    time.sleep(1.0)
    # Commands already on the wire when the answer left may still arrive: 0.2 s of grace.
    assert [t for t, _ in driver.arrivals("plan_cmd", answered + 0.2)] == []
    assert all(speed(c) == 0.0 for c in driver.messages("cmd", stop))

    assert driver.change("/planner", "activate")
    wait_for(lambda: driver.messages("plan_cmd", time.monotonic() - 0.1), 10.0, "commands after re-activation")
    assert not driver.change("/planner", "configure"), "configure is not a transition of an active node"
    assert driver.state("/planner") == "active"

    for name in ("/planner", "/watchdog"):
        assert driver.change(name, "deactivate") and driver.change(name, "cleanup")
        assert driver.state(name) == "unconfigured"
    wait_for(lambda: [s for s in driver.messages("status") if values_of(s)["status"] == "unconfigured"], 5.0,
             "the planner announcing it is unconfigured")
    for name in ("/planner", "/watchdog"):
        assert driver.change(name, "shutdown")
        assert processes[name.lstrip("/")].wait(timeout=10.0) == 0


def test_tracker_forecasts_only_while_active(graph):
    driver, processes = graph
    name = f"{TRACKER_NS}/tracker"
    assert driver.change(name, "configure")
    since = time.monotonic()
    time.sleep(1.0)
    assert driver.messages("tracks", since) == [], "an inactive tracker takes no detections in"
    assert driver.change(name, "activate")
    wait_for(lambda: driver.messages("tracks", since), 10.0, "forecasts from the active tracker")
    assert driver.change(name, "deactivate")
    time.sleep(0.3)
    quiet = time.monotonic()
    time.sleep(1.0)
    assert driver.messages("tracks", quiet) == []
    assert driver.change(name, "cleanup") and driver.state(name) == "unconfigured"
    assert driver.change(name, "shutdown")
    assert processes["tracker"].wait(timeout=10.0) == 0


def switch(*args):
    return subprocess.run([sys.executable, "-m", "riskbound.cli", "switch", *args], capture_output=True,
                          text=True, timeout=60)


def test_a_failed_configure_leaves_the_planner_unconfigured_with_the_reason(tmp_path):
    planner = f"{BAD_NS}/planner"
    process = start_node("planner_node", str(tmp_path), "bad_planner", "-r", f"__ns:={BAD_NS}",
                         "-p", "risk_level:=0.5", *PLANNER_ARGS)
    try:
        refused = switch(planner, "configure", "activate")
        assert refused.returncode == 1, refused.stdout + refused.stderr
        assert f"{planner}: configure refused, now unconfigured" in refused.stderr
        assert "risk_level=0.5 is out of range: must be in (0.0, 0.5)" in refused.stderr
        assert "not taken: activate" in refused.stderr
        shown = switch(planner)
        assert shown.returncode == 0 and f"{planner}: unconfigured" in shown.stdout
        assert "possible now: configure, shutdown" in shown.stdout

        fixed = subprocess.run([sys.executable, "-m", "riskbound.cli", "tune", planner, "risk_level=0.1"],
                               capture_output=True, text=True, timeout=60)
        assert fixed.returncode == 0, fixed.stderr
        done = switch(planner, "configure")
        assert done.returncode == 0 and f"{planner}: configure → inactive" in done.stdout, done.stderr
        wrong = switch(planner, "cleanup", "bogus")
        assert wrong.returncode == 1 and "'bogus' is not a step" in wrong.stderr
        finished = switch(planner, "shutdown")
        assert finished.returncode == 0 and "shutdown → finalized" in finished.stdout, finished.stderr
        assert process.wait(timeout=10.0) == 0
    finally:
        stop_process_group(process)


def test_switch_gives_up_on_a_node_that_does_not_answer():
    started = time.monotonic()
    done = switch("no_such_managed_node", "configure", "--timeout-s", "1")
    assert done.returncode == 2
    assert "/no_such_managed_node: lifecycle services not available within 1 s" in done.stderr
    assert time.monotonic() - started < 30.0


class _BrokenActuator(ManagedNode):
    """A managed node whose activation raises: it must end unconfigured, released, saying why."""

    def __init__(self, **kwargs):
        super().__init__("broken_actuator", (), **kwargs)
        self.released = 0

    def _configure(self, values):
        self.publisher = self.create_publisher(TwistStamped, "broken_cmd", 1)

    def _activate(self):
        raise RuntimeError("actuator bus not ready")

    def _deactivate(self):
        pass

    def _release(self):
        self.released += 1


def test_an_error_in_a_transition_leaves_the_node_unconfigured_and_says_why():
    context = rclpy.Context()
    rclpy.init(context=context)
    node = None
    try:
        node = _BrokenActuator(context=context)
        assert node.trigger_configure() == TransitionCallbackReturn.SUCCESS
        assert node.trigger_activate() == TransitionCallbackReturn.ERROR
        assert node.lifecycle_state == UNCONFIGURED and not node.is_active and node.released == 1
        assert node.problem == "activate failed: RuntimeError: actuator bus not ready"
        # Unconfigured indeed: configure is possible again.
        assert node.trigger_configure() == TransitionCallbackReturn.SUCCESS
    finally:
        if node is not None:
            node.destroy_node()
        rclpy.try_shutdown(context=context)
