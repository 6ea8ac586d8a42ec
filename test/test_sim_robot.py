"""Simulated robot: a constant command follows the analytic trajectory of its model.

References (common practice, no source):
- constant-acceleration kinematics p(t) = ½ a t² until v is reached, then p = v t − v²/(2a);
- constant speed v and turn rate ω from the origin, heading 0: the circular arc
  x = v/ω sin(ωt), y = v/ω (1 − cos ωt), θ = ωt.
The unicycle model uses a midpoint step, whose chord is v Δt instead of the exact (2v/ω) sin(ωΔt/2):
a relative error of (ωΔt)²/24 per step, about 2e-5 at ωΔt = 0.02, hence the 1e-3 m tolerance
over a full circle.
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
from geometry_msgs.msg import TwistStamped
from nav_msgs.msg import Odometry
from rclpy.executors import SingleThreadedExecutor
from rclpy.qos import qos_profile_sensor_data

from riskbound.motion.robot_models import VelocityCommand
from riskbound.motion.simulated_robot import CommandBuffer, SimRobotSettings, SimulatedRobot
from riskbound.ros.conversions import quaternion_to_yaw, stamp_to_seconds

DT = 0.02


def _drive(robot, command, seconds):
    positions = [robot.position]
    for _ in range(int(round(seconds / DT))):
        robot.step(command, DT)
        positions.append(robot.position)
    return np.array(positions)


@pytest.mark.parametrize("yaw", [0.0, 0.7, -2.5])
def test_double_integrator_from_rest_accelerates_then_runs_straight(yaw):
    v, a = 1.2, 1.5  # reaches v after v/a = 0.8 s, a whole number of steps
    settings = SimRobotSettings(initial_x=1.0, initial_y=-2.0, initial_yaw=yaw, max_accel_mps2=a)
    robot = SimulatedRobot(settings)
    positions = _drive(robot, VelocityCommand(v, 0.0, 0.0), 3.0)
    t = DT * np.arange(len(positions))
    along = np.where(t <= v / a, 0.5 * a * t**2, v * t - v**2 / (2.0 * a))
    expected = np.array([1.0, -2.0]) + along[:, None] * np.array([math.cos(yaw), math.sin(yaw)])
    np.testing.assert_allclose(positions, expected, atol=1e-9)
    np.testing.assert_allclose(robot.body_velocity, [v, 0.0], atol=1e-12)
    assert robot.yaw == pytest.approx(yaw)


def test_double_integrator_moves_sideways_in_its_body_frame():
    settings = SimRobotSettings(initial_yaw=math.pi / 2)
    robot = SimulatedRobot(settings, speed_mps=0.0)
    robot.state[2:4] = [-0.5, 0.0]  # already moving at body (0, 0.5): world (−0.5, 0)
    positions = _drive(robot, VelocityCommand(0.0, 0.5, 0.0), 2.0)
    t = DT * np.arange(len(positions))
    np.testing.assert_allclose(positions, np.stack([-0.5 * t, 0.0 * t], axis=1), atol=1e-9)


@pytest.mark.parametrize("v, omega", [(1.0, 1.0), (0.6, -0.8), (1.5, 0.3)])
def test_unicycle_constant_command_follows_the_circular_arc(v, omega):
    robot = SimulatedRobot(SimRobotSettings(robot_model="unicycle"), speed_mps=v)
    seconds = 2.0 * math.pi / abs(omega)
    positions = _drive(robot, VelocityCommand(v, 0.0, omega), seconds)
    t = DT * np.arange(len(positions))
    expected = np.stack([v / omega * np.sin(omega * t), v / omega * (1.0 - np.cos(omega * t))], axis=1)
    np.testing.assert_allclose(positions, expected, atol=1e-3)
    assert robot.yaw == pytest.approx(math.remainder(omega * t[-1], 2 * math.pi), abs=1e-9)
    assert robot.body_velocity[0] == pytest.approx(v) and robot.turn_rate == omega


def test_unicycle_arc_from_an_offset_pose():
    x0, y0, yaw0, v, omega = 2.0, 3.0, 1.0, 0.8, 0.5
    robot = SimulatedRobot(SimRobotSettings(robot_model="unicycle", initial_x=x0, initial_y=y0,
                                            initial_yaw=yaw0), speed_mps=v)
    positions = _drive(robot, VelocityCommand(v, 0.0, omega), 4.0)
    t = DT * np.arange(len(positions))
    # The arc above, rotated by the initial heading and moved to the initial position.
    local = np.stack([v / omega * np.sin(omega * t), v / omega * (1.0 - np.cos(omega * t))], axis=1)
    rotation = np.array([[math.cos(yaw0), -math.sin(yaw0)], [math.sin(yaw0), math.cos(yaw0)]])
    np.testing.assert_allclose(positions, local @ rotation.T + [x0, y0], atol=1e-3)


def test_unicycle_speed_ramps_within_the_acceleration_limit():
    robot = SimulatedRobot(SimRobotSettings(robot_model="unicycle", max_accel_mps2=1.0))
    speeds = []
    for _ in range(100):
        robot.step(VelocityCommand(0.9, 0.0, 0.0), DT)
        speeds.append(robot.body_velocity[0])
    # v(t) = min(a t, v_cmd), common practice.
    np.testing.assert_allclose(speeds, np.minimum(1.0 * DT * np.arange(1, 101), 0.9), atol=1e-12)


def test_process_noise_spreads_the_velocity_by_sigma_dt_per_step():
    # With a zero command the controller cancels the velocity each step, so after a step the
    # velocity is the noise alone: w Δt with w ~ N(0, σ²) per axis. The sample variance of n
    # draws lies within ±4·sqrt(2/n) of σ²Δt² (normal approximation to the chi-square), common practice.
    sigma, n = 0.5, 4000
    robot = SimulatedRobot(SimRobotSettings(accel_noise_mps2=sigma, seed=7, max_accel_mps2=100.0))
    velocities = []
    for _ in range(n):
        robot.step(VelocityCommand(0.0, 0.0, 0.0), DT)
        velocities.append(robot.state[2:4].copy())
    variance = np.var(np.array(velocities), axis=0)
    expected = (sigma * DT) ** 2
    assert np.all(np.abs(variance / expected - 1.0) < 4.0 * math.sqrt(2.0 / n))


def test_command_buffer_delays_and_times_out():
    buffer = CommandBuffer(latency_s=0.1, timeout_s=0.5)
    command = VelocityCommand(0.4, 0.0, 0.1)
    assert buffer.command_at(0.0) is None
    buffer.push(1.0, command)
    assert buffer.command_at(1.05) is None
    assert buffer.command_at(1.1) == command
    assert buffer.command_at(1.6) == command
    assert buffer.command_at(1.61) is None
    with pytest.raises(ValueError, match="not finite"):
        buffer.push(2.0, VelocityCommand(float("nan"), 0.0, 0.0))


@pytest.mark.parametrize("changes, name", [({"rate_hz": 0.0}, "rate_hz"), ({"robot_model": "car"}, "robot_model"),
                                           ({"frame_id": ""}, "frame_id"), ({"initial_yaw": 4.0}, "initial_yaw")])
def test_invalid_settings_are_rejected_naming_the_parameter(changes, name):
    with pytest.raises(ValueError, match=name):
        SimRobotSettings(**changes)


def test_covariance_matches_the_configured_stds():
    settings = SimRobotSettings(pose_std_m=0.1, yaw_std_rad=0.05, twist_std_mps=0.2, twist_std_radps=0.3)
    pose, twist = settings.pose_covariance(), settings.twist_covariance()
    assert pose[0, 0] == pose[1, 1] == pytest.approx(0.01) and pose[5, 5] == pytest.approx(0.0025)
    assert twist[0, 0] == pytest.approx(0.04) and twist[5, 5] == pytest.approx(0.09)
    assert np.all(np.linalg.eigvalsh(pose) > 0.0) and np.all(np.linalg.eigvalsh(twist) > 0.0)


def test_node_publishes_odometry_and_obeys_then_drops_cmd_vel():
    """The node on a localhost graph: frames, covariance, speed under a constant command, stop on timeout."""
    process = subprocess.Popen(
        [sys.executable, "-m", "riskbound.ros.sim_robot_node", "--ros-args", "-r", "__node:=sim_robot_under_test",
         "-p", "rate_hz:=50.0", "-p", "initial_yaw:=0.5", "-p", "command_timeout_s:=0.3",
         "-p", "pose_std_m:=0.1"],
        start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    context = rclpy.Context()
    rclpy.init(context=context)
    node = rclpy.create_node("sim_robot_probe", context=context)
    executor = SingleThreadedExecutor(context=context)
    executor.add_node(node)
    odometry = []
    node.create_subscription(Odometry, "odom", odometry.append, qos_profile_sensor_data)
    cmd_pub = node.create_publisher(TwistStamped, "cmd_vel", 1)
    spinning = threading.Event()
    spinning.set()

    def spin():
        while spinning.is_set():
            executor.spin_once(timeout_sec=0.05)

    spinner = threading.Thread(target=spin, daemon=True)
    spinner.start()
    try:
        deadline = time.monotonic() + 20.0
        while not odometry and time.monotonic() < deadline:
            time.sleep(0.05)
        assert odometry, "no odometry from the simulated robot within 20 s"
        first = odometry[-1]
        assert first.header.frame_id == "odom" and first.child_frame_id == "base_link"
        assert first.pose.covariance[0] == pytest.approx(0.01) and first.pose.covariance[7] == pytest.approx(0.01)
        assert quaternion_to_yaw(first.pose.pose.orientation) == pytest.approx(0.5)
        command = TwistStamped()
        command.header.frame_id = "base_link"
        command.twist.linear.x = 0.5
        for _ in range(40):  # 2 s at 20 Hz: 1/3 s to accelerate, then constant speed
            command.header.stamp = node.get_clock().now().to_msg()
            cmd_pub.publish(command)
            time.sleep(0.05)
        moving = [m for m in odometry if m.twist.twist.linear.x > 0.49]
        assert len(moving) > 20
        a, b = moving[0], moving[-1]
        dt = stamp_to_seconds(b.header.stamp) - stamp_to_seconds(a.header.stamp)
        dx = b.pose.pose.position.x - a.pose.pose.position.x
        dy = b.pose.pose.position.y - a.pose.pose.position.y
        # Straight along the initial heading at the commanded speed (5 % for timer jitter).
        assert math.hypot(dx, dy) / dt == pytest.approx(0.5, rel=0.05)
        assert math.atan2(dy, dx) == pytest.approx(0.5, abs=1e-6)
        time.sleep(1.0)  # no command: after command_timeout_s the robot brakes to zero
        assert abs(odometry[-1].twist.twist.linear.x) < 1e-9
    finally:
        spinning.clear()
        spinner.join(timeout=2.0)
        node.destroy_node()
        rclpy.shutdown(context=context)
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGINT)
        try:
            process.wait(timeout=5.0)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()
    assert process.returncode == 0, process.stderr.read().decode()
