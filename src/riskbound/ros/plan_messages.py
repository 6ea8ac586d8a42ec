"""Planner results as ROS messages: plan (Path), reference (MultiDOFJointTrajectory), command
(TwistStamped) and status (DiagnosticStatus).

Positions, velocities and accelerations of `plan` and `reference` are in the planning frame
(REP-105 odom/map); the command is in the robot body frame (REP-103: x forward, y left), as a
velocity controller expects it.
"""

import numpy as np
from builtin_interfaces.msg import Duration, Time
from diagnostic_msgs.msg import DiagnosticStatus, KeyValue
from geometry_msgs.msg import PoseStamped, Transform, Twist, TwistStamped, Vector3
from nav_msgs.msg import Path
from std_msgs.msg import Header
from trajectory_msgs.msg import MultiDOFJointTrajectory, MultiDOFJointTrajectoryPoint

from riskbound.ros.conversions import seconds_to_stamp, stamp_to_seconds, yaw_to_quaternion

STATUS_NAME = "riskbound planner"
REFERENCE_JOINT = "base"
# Below this speed a double integrator's heading is not defined by its velocity; keep the last one.
HEADING_SPEED_MPS = 1e-3


def plan_kinematics(model_name, states, inputs, initial_yaw, step_s):
    """Planning-frame kinematics of a plan at its N+1 points.

    Returns positions (N+1, 2) [m], yaws (N+1,) [rad], velocities (N+1, 2) [m/s], yaw_rates (N+1,)
    [rad/s] and accelerations (N+1, 2) [m/s²]. The input u_k acts over [t_k, t_{k+1}] (zero-order
    hold), so point k carries u_k; the last point, beyond which nothing is planned, carries zero
    acceleration and zero yaw rate. A double integrator has no heading state: its yaw is the
    direction of travel (the odometry yaw until it moves) and its yaw rate the change per step.
    """
    states = np.asarray(states, dtype=float)
    inputs = np.asarray(inputs, dtype=float)
    count = len(states)
    held = np.zeros((count, inputs.shape[1]))
    held[:-1] = inputs
    positions = states[:, 0:2]
    if model_name == "unicycle":
        yaws, speed = states[:, 2], states[:, 3]
        accel, yaw_rates = held[:, 0], held[:, 1]
        heading = np.stack([np.cos(yaws), np.sin(yaws)], axis=-1)
        normal = np.stack([-np.sin(yaws), np.cos(yaws)], axis=-1)
        velocities = speed[:, None] * heading
        # Tangential plus centripetal part of d/dt (v [cos θ, sin θ]).
        accelerations = accel[:, None] * heading + (speed * yaw_rates)[:, None] * normal
        return positions, yaws, velocities, yaw_rates, accelerations
    velocities = states[:, 2:4]
    yaws = np.empty(count)
    yaw = float(initial_yaw)
    for k in range(count):
        if np.hypot(*velocities[k]) > HEADING_SPEED_MPS:
            yaw = float(np.arctan2(velocities[k, 1], velocities[k, 0]))
        yaws[k] = yaw
    yaw_rates = np.zeros(count)
    yaw_rates[:-1] = np.angle(np.exp(1j * np.diff(yaws))) / step_s
    return positions, yaws, velocities, yaw_rates, held


def _offset_stamp(start_s, offset_s):
    return seconds_to_stamp(start_s + offset_s, Time)


def _duration(seconds):
    sec = int(np.floor(seconds))
    return Duration(sec=sec, nanosec=int(round((seconds - sec) * 1e9)) % 1_000_000_000)


def plan_to_path(result, kinematics, frame_id, start_stamp):
    """nav_msgs/Path: one pose per plan point, stamped start_stamp + t_k."""
    positions, yaws = kinematics[0], kinematics[1]
    start_s = stamp_to_seconds(start_stamp)
    path = Path(header=Header(stamp=start_stamp, frame_id=frame_id))
    for t, position, yaw in zip(result.times, positions, yaws):
        pose = PoseStamped(header=Header(stamp=_offset_stamp(start_s, float(t)), frame_id=frame_id))
        pose.pose.position.x, pose.pose.position.y = float(position[0]), float(position[1])
        pose.pose.orientation = yaw_to_quaternion(yaw)
        path.poses.append(pose)
    return path


def plan_to_reference(result, kinematics, frame_id, start_stamp):
    """trajectory_msgs/MultiDOFJointTrajectory with one joint ("base"): pose, twist and
    acceleration per plan point (planning frame), time_from_start = t_k."""
    positions, yaws, velocities, yaw_rates, accelerations = kinematics
    trajectory = MultiDOFJointTrajectory(header=Header(stamp=start_stamp, frame_id=frame_id),
                                         joint_names=[REFERENCE_JOINT])
    for k, t in enumerate(result.times):
        point = MultiDOFJointTrajectoryPoint(time_from_start=_duration(float(t)))
        point.transforms = [Transform(translation=Vector3(x=float(positions[k, 0]), y=float(positions[k, 1])),
                                      rotation=yaw_to_quaternion(yaws[k]))]
        point.velocities = [Twist(linear=Vector3(x=float(velocities[k, 0]), y=float(velocities[k, 1])),
                                  angular=Vector3(z=float(yaw_rates[k])))]
        point.accelerations = [Twist(linear=Vector3(x=float(accelerations[k, 0]),
                                                    y=float(accelerations[k, 1])))]
        trajectory.points.append(point)
    return trajectory


def command_to_twist(command, frame_id, stamp):
    """geometry_msgs/TwistStamped in the body frame `frame_id` from a VelocityCommand."""
    twist = TwistStamped(header=Header(stamp=stamp, frame_id=frame_id))
    twist.twist.linear.x = float(command.linear_x)
    twist.twist.linear.y = float(command.linear_y)
    twist.twist.angular.z = float(command.angular_z)
    return twist


def zero_twist(frame_id, stamp):
    """A stop command: all velocities zero."""
    return TwistStamped(header=Header(stamp=stamp, frame_id=frame_id))


def _format(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def status_message(level, message, hardware_id, values):
    """diagnostic_msgs/DiagnosticStatus named "riskbound planner"; `values` is an ordered dict
    of key → value (floats with 6 significant digits, booleans as true/false)."""
    return DiagnosticStatus(level=level, name=STATUS_NAME, message=message, hardware_id=hardware_id,
                            values=[KeyValue(key=key, value=_format(value)) for key, value in values.items()])
