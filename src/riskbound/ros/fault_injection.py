"""Fault injection on a live ROS graph: simulated robot, planner and watchdog as separate processes.

Used by test/test_fault_injection.py and `riskbound bench faults`. A probe node in the calling
process plays the rest of the world: it sends the goal and an obstacle forecast (empty, or one
obstacle on the robot), listens to the robot's cmd_vel and the watchdog's /diagnostics, and can
put a corrupted command on cmd_vel_plan.

Faults, how they are injected and cleared:
    planner_killed  SIGKILL to the planner's process group     a new planner process
    planner_hung    SIGSTOP to the planner's process group     SIGCONT
    solver_failure  a forecast with an obstacle on the robot   an empty forecast
    nan_command     one cmd_vel_plan with a NaN velocity       (the planner's next command)
    odom_stopped    SIGSTOP to the simulated robot             SIGCONT

The fault-to-stop latency is the header stamp of the first stop on cmd_vel minus the wall time at
injection (one clock: ROS time is system time without use_sim_time), so DDS delivery to the probe
does not count; the arrival latency at the probe is reported beside it.

Every process is started in its own session, so a signal reaches its whole process group; `close`
ends them all (SIGINT, then SIGKILL). DDS discovery stays on this machine: the children inherit
ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST (set here when the caller did not set it).
"""

import os
import random
import signal
import subprocess
import sys
import threading
import time
from collections import deque
from dataclasses import asdict, dataclass

import numpy as np

os.environ.setdefault("ROS_AUTOMATIC_DISCOVERY_RANGE", "LOCALHOST")
os.environ.setdefault("ROS_DOMAIN_ID", str(random.randint(1, 101)))

import rclpy  # noqa: E402 - after the discovery range is fixed for this process and its children
from diagnostic_msgs.msg import DiagnosticArray  # noqa: E402
from geometry_msgs.msg import PoseStamped, TwistStamped  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from rclpy.callback_groups import MutuallyExclusiveCallbackGroup  # noqa: E402
from rclpy.executors import MultiThreadedExecutor  # noqa: E402
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy, qos_profile_sensor_data  # noqa: E402
from sensor_msgs.msg import PointCloud2  # noqa: E402
from std_msgs.msg import Header  # noqa: E402

from riskbound.motion.forecast import ObstacleForecast  # noqa: E402
from riskbound.motion.robot_models import VelocityCommand  # noqa: E402
from riskbound.ros.conversions import stamp_to_seconds  # noqa: E402
from riskbound.ros.forecast_codec import forecast_to_cloud  # noqa: E402
from riskbound.ros.watchdog_node import DIAGNOSTIC_NAME  # noqa: E402
from riskbound.supervision.settings import WatchdogSettings  # noqa: E402
from riskbound.supervision.stop import is_stop  # noqa: E402


@dataclass(frozen=True)
class FaultKind:
    timeout_setting: str  # the staleness limit of the stop bound (watchdog setting name)
    causes: frozenset  # stop causes the watchdog may report for it


# Solver failure and a NaN command are seen at the first control cycle; they use the status limit
# for the bound like the planner faults ("staleness limit + one control period").
FAULTS = {
    "planner_killed": FaultKind("status_timeout_s", frozenset({"status_stale", "command_stale"})),
    "planner_hung": FaultKind("status_timeout_s", frozenset({"status_stale", "command_stale"})),
    "solver_failure": FaultKind("status_timeout_s", frozenset({"solver_failure"})),
    "nan_command": FaultKind("status_timeout_s", frozenset({"command_invalid"})),
    "odom_stopped": FaultKind("odom_timeout_s", frozenset({"odom_stale"})),
}

GOAL_DISTANCE_M = 1.0e4  # far enough that the planner never commands zero during a run
FORECAST_RATE_HZ = 10.0
OBSTACLE_HALF_EXTENTS_M = (0.5, 0.5)


@dataclass
class TrialResult:
    fault: str
    bound_s: float
    latency_s: float  # stop command stamp − injection time (nan: no stop seen)
    arrival_latency_s: float  # stop command arrival at the probe − injection time
    cause: str  # the watchdog's reported stop cause
    recovery_s: float  # first normal command stamp − clearing time (nan: did not resume)

    @property
    def within_bound(self):
        return bool(self.latency_s <= self.bound_s)

    @property
    def cause_expected(self):
        """The reported cause (one code or several, comma-separated) is one this fault can produce."""
        codes = set(self.cause.split(", ")) - {""}
        return bool(codes) and codes <= FAULTS[self.fault].causes

    def as_dict(self):
        return dict(asdict(self), within_bound=self.within_bound, cause_expected=self.cause_expected)


class ManagedProcess:
    """A node process in its own session (signals go to its process group); output to a log file."""

    def __init__(self, name, module, ros_args, log_dir):
        self.name = name
        self.argv = [sys.executable, "-m", module, "--ros-args", *ros_args]
        self.log_path = os.path.join(log_dir, f"{name}.log")
        self.process = None

    def start(self):
        with open(self.log_path, "ab") as log:
            self.process = subprocess.Popen(self.argv, stdout=log, stderr=subprocess.STDOUT,
                                            stdin=subprocess.DEVNULL, start_new_session=True)

    def signal(self, signum):
        if self.process is not None and self.process.poll() is None:
            os.killpg(self.process.pid, signum)

    def stop(self, timeout_s=5.0):
        """SIGCONT (in case it is paused), SIGINT, then SIGKILL to the whole group."""
        if self.process is None:
            return
        for signum in (signal.SIGCONT, signal.SIGINT):
            try:
                os.killpg(self.process.pid, signum)
            except ProcessLookupError:
                break
        try:
            self.process.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            pass
        try:
            os.killpg(self.process.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        self.process.wait()

    def tail(self, lines=20):
        try:
            with open(self.log_path, "rb") as log:
                return b"".join(log.readlines()[-lines:]).decode(errors="replace")
        except OSError:
            return ""


class Probe:
    """The probe node and its spinning thread, in a ROS context of its own."""

    def __init__(self, frame_id="odom"):
        self.frame_id = frame_id
        self.context = rclpy.Context()
        rclpy.init(context=self.context)
        self.node = rclpy.create_node("fault_probe", context=self.context)
        self.commands = deque(maxlen=20000)  # (arrival_s, stamp_s, VelocityCommand)
        self.planned = deque(maxlen=20000)  # (arrival_s, VelocityCommand) of cmd_vel_plan
        self.diagnostics = deque(maxlen=5000)  # (arrival_s, {key: value})
        self.position = None
        self.forecast_mode = "empty"
        node = self.node
        # Listening and publishing in separate callback groups on two threads: publishing a forecast
        # to a planner that is SIGSTOPped may wait for its acknowledgement (a reliable writer), and
        # that must not keep the probe from seeing the stop it is there to time.
        listen = MutuallyExclusiveCallbackGroup()
        reliable = QoSProfile(depth=50, reliability=ReliabilityPolicy.RELIABLE)
        node.create_subscription(TwistStamped, "cmd_vel", self._on_cmd_vel, reliable, callback_group=listen)
        node.create_subscription(DiagnosticArray, "/diagnostics", self._on_diagnostics, 50, callback_group=listen)
        node.create_subscription(TwistStamped, "cmd_vel_plan", self._on_planned, reliable, callback_group=listen)
        node.create_subscription(Odometry, "odom", self._on_odom, qos_profile_sensor_data, callback_group=listen)
        self._forecast_pub = node.create_publisher(
            PointCloud2, "obstacle_forecast", QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE))
        self._goal_pub = node.create_publisher(
            PoseStamped, "goal", QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                                            durability=DurabilityPolicy.TRANSIENT_LOCAL))
        self._plan_cmd_pub = node.create_publisher(
            TwistStamped, "cmd_vel_plan", QoSProfile(depth=10, reliability=ReliabilityPolicy.RELIABLE))
        self._lock = threading.Lock()
        node.create_timer(1.0 / FORECAST_RATE_HZ, self.publish_forecast, callback_group=MutuallyExclusiveCallbackGroup())
        self._executor = MultiThreadedExecutor(num_threads=2, context=self.context)
        self._executor.add_node(node)
        self._running = True
        self._thread = threading.Thread(target=self._spin, name="fault_probe", daemon=True)
        self._thread.start()

    def _spin(self):
        while self._running:
            self._executor.spin_once(timeout_sec=0.05)

    def close(self):
        self._running = False
        self._thread.join(timeout=5.0)
        self._executor.shutdown(timeout_sec=5.0)
        self.node.destroy_node()
        rclpy.try_shutdown(context=self.context)

    def _on_cmd_vel(self, msg):
        t = msg.twist
        self.commands.append((time.time(), stamp_to_seconds(msg.header.stamp),
                              VelocityCommand(t.linear.x, t.linear.y, t.angular.z)))

    def _on_planned(self, msg):
        t = msg.twist
        self.planned.append((time.time(), VelocityCommand(t.linear.x, t.linear.y, t.angular.z)))

    def _on_diagnostics(self, msg):
        for status in msg.status:
            if status.name == DIAGNOSTIC_NAME:
                self.diagnostics.append((time.time(), {kv.key: kv.value for kv in status.values}))

    def _on_odom(self, msg):
        self.position = (msg.pose.pose.position.x, msg.pose.pose.position.y)

    def publish_goal(self, x, y):
        goal = PoseStamped()
        goal.header.frame_id = self.frame_id
        goal.header.stamp = self.node.get_clock().now().to_msg()
        goal.pose.position.x, goal.pose.position.y = float(x), float(y)
        goal.pose.orientation.w = 1.0
        self._goal_pub.publish(goal)

    def publish_forecast(self):
        """One forecast for the current mode, stamped now. Also runs at FORECAST_RATE_HZ."""
        with self._lock:
            header = Header(frame_id=self.frame_id, stamp=self.node.get_clock().now().to_msg())
            if self.forecast_mode == "on_robot" and self.position is not None:
                times = np.arange(0.0, 3.01, 0.5)
                S = len(times)
                forecast = ObstacleForecast(
                    track_ids=[1], times=times, positions=np.tile(self.position, (1, S, 1)),
                    headings=np.zeros((1, S)), covariances=np.tile(0.01 * np.eye(2), (1, S, 1, 1)),
                    half_extents=[OBSTACLE_HALF_EXTENTS_M])
            else:
                forecast = ObstacleForecast.empty()
            self._forecast_pub.publish(forecast_to_cloud(forecast, header))

    def publish_nan_command(self, frame_id="base_link"):
        msg = TwistStamped()
        msg.header.frame_id = frame_id
        msg.header.stamp = self.node.get_clock().now().to_msg()
        msg.twist.linear.x = float("nan")
        self._plan_cmd_pub.publish(msg)

    def watchdog_state(self):
        return self.diagnostics[-1][1].get("state") if self.diagnostics else None


class FaultGraph:
    """Simulated robot + planner + watchdog processes and a probe; use as a context manager."""

    def __init__(self, log_dir, robot_model="double_integrator", watchdog_params=None, planner_params=None,
                 sim_params=None, startup_timeout_s=90.0):
        self.log_dir = log_dir
        os.makedirs(log_dir, exist_ok=True)
        self.watchdog_params = dict(watchdog_params or {})
        self.settings = WatchdogSettings(**self.watchdog_params)
        self.startup_timeout_s = startup_timeout_s
        planner_params = dict({"robot_model": robot_model, "require_forecast": True}, **(planner_params or {}))
        sim_params = dict({"robot_model": robot_model}, **(sim_params or {}))
        self.processes = {
            "sim_robot": ManagedProcess("sim_robot", "riskbound.ros.sim_robot_node", _ros_args(sim_params), log_dir),
            "watchdog": ManagedProcess("watchdog", "riskbound.ros.watchdog_node",
                                       _ros_args(dict(self.watchdog_params, activate_at_start=True)), log_dir),
            "planner": ManagedProcess("planner", "riskbound.ros.planner_node",
                                      _ros_args(dict(planner_params, activate_at_start=True)), log_dir),
        }
        self.probe = None

    def __enter__(self):
        try:
            for process in self.processes.values():
                process.start()
            self.probe = Probe()
            self.probe.publish_goal(GOAL_DISTANCE_M, 0.0)
            if not self.wait_normal(self.startup_timeout_s):
                raise RuntimeError("the graph did not reach normal operation within "
                                   f"{self.startup_timeout_s} s\n" + self.logs())
        except BaseException:
            self.close()
            raise
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        for process in self.processes.values():
            process.stop()
        if self.probe is not None:
            self.probe.close()
            self.probe = None

    def logs(self):
        return "\n".join(f"--- {name} ---\n{p.tail()}" for name, p in self.processes.items())

    def bound_s(self, fault):
        return self.settings.stop_bound_s(getattr(self.settings, FAULTS[fault].timeout_setting))

    def _normal_now(self):
        """Healthy watchdog and a moving command that arrived within two control periods."""
        if self.probe.watchdog_state() != "healthy" or not self.probe.commands:
            return False
        arrival_s, _, command = self.probe.commands[-1]
        return not is_stop(command) and time.time() - arrival_s < 2.0 * self.settings.control_period_s

    def wait_normal(self, timeout_s):
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self._normal_now():
                return True
            time.sleep(0.02)
        return False

    def inject(self, fault):
        """Inject `fault`; returns the wall time of the injection."""
        probe, planner = self.probe, self.processes["planner"]
        if fault == "planner_killed":
            t0 = time.time()
            planner.signal(signal.SIGKILL)
            planner.process.wait()
        elif fault == "planner_hung":
            t0 = time.time()
            planner.signal(signal.SIGSTOP)
        elif fault == "solver_failure":
            probe.forecast_mode = "on_robot"
            t0 = time.time()
            probe.publish_forecast()
        elif fault == "nan_command":
            t0 = time.time()
            probe.publish_nan_command()
        elif fault == "odom_stopped":
            t0 = time.time()
            self.processes["sim_robot"].signal(signal.SIGSTOP)
        else:
            raise ValueError(f"fault={fault!r} is not one of {sorted(FAULTS)}")
        return t0

    def clear(self, fault):
        """Undo `fault`; returns the wall time of the clearing."""
        t = time.time()
        if fault == "planner_killed":
            self.processes["planner"].start()
        elif fault == "planner_hung":
            self.processes["planner"].signal(signal.SIGCONT)
        elif fault == "solver_failure":
            self.probe.forecast_mode = "empty"
            self.probe.publish_forecast()
        elif fault == "odom_stopped":
            self.processes["sim_robot"].signal(signal.SIGCONT)
        return t

    def _first_command(self, after_s, stop, timeout_s):
        """(stamp_s, arrival_s) of the first stop (or non-stop) command stamped at or after after_s."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            for arrival_s, stamp_s, command in list(self.probe.commands):
                if stamp_s >= after_s and is_stop(command) == stop:
                    return stamp_s, arrival_s
            time.sleep(0.01)
        return None

    def _stop_cause(self, after_s, timeout_s=2.0):
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            for _, values in list(self.probe.diagnostics):
                if values.get("state") == "stopped" and float(values.get("last_stop_time_s", "0")) >= after_s:
                    return values.get("last_stop_cause", "")
            time.sleep(0.02)
        return ""

    def trial(self, fault, settle_timeout_s=30.0, stop_timeout_s=3.0, recovery_timeout_s=60.0):
        """Inject, measure the time to the first stop, clear, measure the time to normal commands."""
        if not self.wait_normal(settle_timeout_s):
            raise RuntimeError(f"not in normal operation before {fault}\n" + self.logs())
        t0 = self.inject(fault)
        stop = self._first_command(t0, stop=True, timeout_s=stop_timeout_s)
        cause = self._stop_cause(t0) if stop else ""
        t_clear = self.clear(fault)
        resumed = None
        if stop is not None:
            resumed = self._first_command(max(stop[0], t_clear), stop=False, timeout_s=recovery_timeout_s)
        nan = float("nan")
        return TrialResult(
            fault=fault, bound_s=self.bound_s(fault),
            latency_s=stop[0] - t0 if stop else nan, arrival_latency_s=stop[1] - t0 if stop else nan,
            cause=cause, recovery_s=resumed[0] - t_clear if resumed else nan)


def _ros_args(params):
    args = []
    for name, value in params.items():
        if isinstance(value, bool):
            value = "true" if value else "false"
        args += ["-p", f"{name}:={value}"]
    return args
