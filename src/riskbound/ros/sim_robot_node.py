"""Simulated robot node: obeys `cmd_vel`, publishes `odom` — the robot end of closed-loop tests and the demo.

Every 1/rate_hz it advances riskbound.motion.simulated_robot.SimulatedRobot by the time that really
passed (so a late timer does not slow the robot down) and publishes nav_msgs/Odometry in frame_id
(child frame child_frame_id) with the covariance from the settings. A cmd_vel older than
command_timeout_s is treated as zero velocity; command_latency_s delays every command.

Run: python -m riskbound.ros.sim_robot_node --ros-args -p robot_model:=unicycle
"""

import sys

from geometry_msgs.msg import TwistStamped
from nav_msgs.msg import Odometry
from rcl_interfaces.msg import SetParametersResult
from rclpy.node import Node
from rclpy.qos import QoSProfile, ReliabilityPolicy, qos_profile_sensor_data

from riskbound.motion.robot_models import VelocityCommand
from riskbound.motion.simulated_robot import (SIM_ROBOT_SPECS, SPECS_BY_NAME, CommandBuffer, SimRobotSettings,
                                              SimulatedRobot)
from riskbound.ros.conversions import yaw_to_quaternion
from riskbound.ros.setting_parameters import changed_settings, declare_settings
from riskbound.ros.node_main import spin_node
from riskbound.ros.throttled_warnings import ThrottledWarnings

NODE_NAME = "sim_robot"
# Longest step integrated at once: after a pause (a suspended process, an overloaded machine) the
# robot does not jump; the lost time is simply not simulated.
MAX_STEPS_PER_TICK = 5


class SimRobotNode(Node):
    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, **kwargs)
        self._settings = SimRobotSettings(**declare_settings(self, SIM_ROBOT_SPECS))
        self._robot = SimulatedRobot(self._settings)
        self._commands = CommandBuffer(self._settings.command_latency_s, self._settings.command_timeout_s)
        self._last_step_s = None
        self._obeying = False
        self._warn = ThrottledWarnings(self.get_logger()).warn
        self.add_on_set_parameters_callback(self._on_set_parameters)
        self._odom_pub = self.create_publisher(Odometry, "odom", qos_profile_sensor_data)
        self.create_subscription(TwistStamped, "cmd_vel", self._on_cmd_vel,
                                 QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE))
        self.create_timer(1.0 / self._settings.rate_hz, self._on_timer)
        s = self._settings
        self.get_logger().info(f"simulating a {s.robot_model} at ({s.initial_x}, {s.initial_y}, yaw "
                               f"{s.initial_yaw}) in '{s.frame_id}', {s.rate_hz} Hz")

    def _now_s(self):
        return self.get_clock().now().nanoseconds * 1e-9

    def _on_set_parameters(self, parameters):
        settings, _, reason = changed_settings(self._settings, SPECS_BY_NAME, parameters, NODE_NAME)
        if reason:
            return SetParametersResult(successful=False, reason=reason)
        self._settings = self._robot.settings = settings
        self._commands.latency_s = settings.command_latency_s
        self._commands.timeout_s = settings.command_timeout_s
        return SetParametersResult(successful=True)

    def _on_cmd_vel(self, msg):
        twist = msg.twist
        command = VelocityCommand(twist.linear.x, twist.linear.y, twist.angular.z)
        if msg.header.frame_id and msg.header.frame_id != self._settings.child_frame_id:
            self._warn("frame", f"cmd_vel in frame '{msg.header.frame_id}' ignored: commands must be in "
                                f"'{self._settings.child_frame_id}'")
            return
        if self._settings.robot_model == "unicycle" and command.linear_y != 0.0:
            self._warn("lateral", f"cmd_vel linear.y={command.linear_y} ignored: a unicycle cannot move sideways")
        try:
            self._commands.push(self._now_s(), command)
        except ValueError as error:
            self._warn("nan", f"{error}: ignored")

    def _on_timer(self):
        now = self.get_clock().now()
        now_s = now.nanoseconds * 1e-9
        if self._last_step_s is not None:
            dt = min(now_s - self._last_step_s, MAX_STEPS_PER_TICK / self._settings.rate_hz)
            command = self._commands.command_at(now_s)
            if (command is not None) != self._obeying:
                self._obeying = command is not None
                self.get_logger().info("obeying cmd_vel" if self._obeying else
                                       f"no fresh cmd_vel (command_timeout_s={self._settings.command_timeout_s}): "
                                       "braking to zero velocity")
            self._robot.step(command, dt)
        self._last_step_s = now_s
        self._odom_pub.publish(self._odometry(now.to_msg()))

    def _odometry(self, stamp):
        s, robot = self._settings, self._robot
        msg = Odometry()
        msg.header.stamp = stamp
        msg.header.frame_id = s.frame_id
        msg.child_frame_id = s.child_frame_id
        x, y = robot.position
        msg.pose.pose.position.x, msg.pose.pose.position.y = float(x), float(y)
        msg.pose.pose.orientation = yaw_to_quaternion(robot.yaw)
        msg.pose.covariance = s.pose_covariance().ravel().tolist()
        vx, vy = robot.body_velocity
        msg.twist.twist.linear.x, msg.twist.twist.linear.y = float(vx), float(vy)
        msg.twist.twist.angular.z = float(robot.turn_rate)
        msg.twist.covariance = s.twist_covariance().ravel().tolist()
        return msg


def main(args=None):
    """init → spin → shutdown; Ctrl-C and SIGTERM end it cleanly. Returns the exit code."""
    return spin_node(SimRobotNode, NODE_NAME, args)


if __name__ == "__main__":
    sys.exit(main())
