"""Goal node: gives the planner its goal once, latched, and optionally ends when the robot is there.

Publishes one geometry_msgs/PoseStamped on `goal` with reliable, transient-local QoS (the planner's
goal subscription), so a planner that starts later still receives it. Watches `odom`: when the
robot's position first comes within arrival_tolerance_m of the goal it logs the arrival and, with
exit_on_arrival, ends the process (exit code 0) linger_s later (node clock), so that a launch file
can end a whole run at the goal (on_exit="shutdown") after the recorder has seen the robot settle.

Run: python -m riskbound.ros.goal_node --ros-args -p x:=22.5 -p y:=10.0
"""

import math
import sys
import time

import rclpy
from geometry_msgs.msg import PoseStamped
from nav_msgs.msg import Odometry
from rclpy.exceptions import ParameterException
from rclpy.executors import ExternalShutdownException
from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy, qos_profile_sensor_data

from riskbound.ros.conversions import yaw_to_quaternion
from riskbound.ros.setting_parameters import declare_settings
from riskbound.settings_table import SettingSpec

NODE_NAME = "goal_publisher"
GOAL_SPECS = (
    SettingSpec("x", 0.0, "goal position x in frame_id [m]", -1e6, 1e6, read_only=True),
    SettingSpec("y", 0.0, "goal position y in frame_id [m]", -1e6, 1e6, read_only=True),
    SettingSpec("yaw", 0.0, "goal heading [rad]", -math.pi, math.pi, read_only=True),
    SettingSpec("frame_id", "odom", "frame of the goal: the planner's planning_frame", read_only=True),
    SettingSpec("arrival_tolerance_m", 0.3, "the robot has arrived within this distance of the goal [m]",
                0.0, 100.0, low_open=True, read_only=True),
    SettingSpec("exit_on_arrival", False, "end the node (exit code 0) linger_s after the arrival",
                read_only=True),
    SettingSpec("linger_s", 1.0, "time between the arrival and the exit [s]", 0.0, 3600.0, read_only=True),
)
WARN_THROTTLE_S = 2.0
LATCHED = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE, durability=DurabilityPolicy.TRANSIENT_LOCAL)


class GoalNode(Node):
    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, **kwargs)
        self.settings = declare_settings(self, GOAL_SPECS)
        if not self.settings["frame_id"]:
            raise ValueError("frame_id='' is not allowed: must name a frame")
        self.arrived_s = None
        self.done = False
        self._last_warned_s = -math.inf
        self._publisher = self.create_publisher(PoseStamped, "goal", LATCHED)
        self.create_subscription(Odometry, "odom", self._on_odom, qos_profile_sensor_data)
        s = self.settings
        goal = PoseStamped()
        goal.header.stamp = self.get_clock().now().to_msg()
        goal.header.frame_id = s["frame_id"]
        goal.pose.position.x, goal.pose.position.y = float(s["x"]), float(s["y"])
        goal.pose.orientation = yaw_to_quaternion(s["yaw"])
        self._publisher.publish(goal)
        self.get_logger().info(f"goal ({s['x']}, {s['y']}) in '{s['frame_id']}' published (latched)"
                               + (f"; ending {s['linger_s']} s after arrival" if s["exit_on_arrival"] else ""))

    def _on_odom(self, msg):
        now_s = self.get_clock().now().nanoseconds * 1e-9
        s = self.settings
        if self.arrived_s is None:
            if msg.header.frame_id != s["frame_id"]:
                self._warn(f"odometry in frame '{msg.header.frame_id}' ignored: the goal is in '{s['frame_id']}'")
                return
            position = msg.pose.pose.position
            distance = math.hypot(position.x - s["x"], position.y - s["y"])
            if not math.isfinite(distance):
                self._warn("odometry with a NaN or Inf position ignored")
                return
            if distance > s["arrival_tolerance_m"]:
                return
            self.arrived_s = now_s
            self.get_logger().info(f"robot arrived: {distance:.2f} m from the goal at t={now_s:.2f} s")
        if s["exit_on_arrival"] and now_s - self.arrived_s >= s["linger_s"]:
            self.done = True

    def _warn(self, message):
        now_s = time.monotonic()
        if now_s - self._last_warned_s >= WARN_THROTTLE_S:
            self._last_warned_s = now_s
            self.get_logger().warning(message)


def main(args=None):
    """init → spin until arrival (exit_on_arrival) or Ctrl-C/SIGTERM → shutdown. Returns the exit code."""
    rclpy.init(args=args)
    node = None
    code = 0
    try:
        node = GoalNode()
        while rclpy.ok() and not node.done:
            rclpy.spin_once(node, timeout_sec=0.1)
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    except (ValueError, ParameterException) as error:
        rclpy.logging.get_logger(NODE_NAME).fatal(f"invalid configuration: {error}")
        code = 1
    finally:
        if node is not None:
            node.destroy_node()
        rclpy.try_shutdown()
    return code


if __name__ == "__main__":
    sys.exit(main())
