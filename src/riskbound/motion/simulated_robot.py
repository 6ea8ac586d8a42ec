"""A simulated robot for closed-loop tests and the demo: velocity commands in, true state out.

The robot's motion is one of the planner's models (riskbound.motion.robot_models), driven the way
a base's own velocity controller drives it: each step asks for the acceleration that reaches the
commanded velocity in one step, limited to max_accel_mps2, plus optional white process noise.

    double integrator  a = clip_norm((R(ψ) v_cmd − v) / Δt, a_max) + w_a,  ψ⁺ = ψ + ω_cmd Δt
                       (holonomic: the body-frame command is rotated by the heading ψ, which the
                       model itself does not carry)
    unicycle           a = clip((v_cmd − v) / Δt, ±a_max) + w_a,  ω = ω_cmd + w_ω

w_a ~ N(0, σ_a²) per axis and w_ω ~ N(0, σ_ω²), drawn once per step (discrete white noise, the
same noise model the planner assumes; riskbound.motion.robot_models.input_noise_covariance).

Commands reach the robot through `CommandBuffer`: an optional transport latency, and a timeout
after which the robot brakes to zero as a base does when its command stream stops.
"""

import math
from collections import deque
from dataclasses import dataclass, replace

import numpy as np

from riskbound.motion.robot_models import ROBOT_MODELS, VelocityCommand, make_robot_model
from riskbound.settings_table import SettingSpec, validate_fields

SIM_ROBOT_SPECS = (
    SettingSpec("robot_model", "double_integrator", "motion model of the simulated robot",
                choices=ROBOT_MODELS, read_only=True),
    SettingSpec("rate_hz", 50.0, "integration steps and odometry messages per second", 1.0, 1000.0,
                read_only=True),
    SettingSpec("frame_id", "odom", "odometry frame (REP-105)", read_only=True),
    SettingSpec("child_frame_id", "base_link", "body frame: the frame of the commands and the twist",
                read_only=True),
    SettingSpec("initial_x", 0.0, "initial position x in frame_id [m]", -1e6, 1e6, read_only=True),
    SettingSpec("initial_y", 0.0, "initial position y in frame_id [m]", -1e6, 1e6, read_only=True),
    SettingSpec("initial_yaw", 0.0, "initial heading [rad]", -math.pi, math.pi, read_only=True),
    SettingSpec("max_accel_mps2", 1.5, "acceleration limit of the base's velocity controller [m/s²]",
                0.0, 100.0, low_open=True),
    SettingSpec("command_timeout_s", 0.5, "a cmd_vel older than this is treated as zero velocity [s]",
                0.0, 10.0, low_open=True),
    SettingSpec("command_latency_s", 0.0, "delay between receiving a cmd_vel and obeying it [s]", 0.0, 2.0),
    SettingSpec("accel_noise_mps2", 0.0, "process noise: std of the random acceleration per step [m/s²]",
                0.0, 10.0),
    SettingSpec("turn_noise_radps", 0.0, "unicycle process noise: std of the random turn rate per step "
                "[rad/s]", 0.0, 10.0),
    SettingSpec("pose_std_m", 0.02, "position std reported in the odometry covariance [m]", 0.0, 10.0),
    SettingSpec("yaw_std_rad", 0.01, "heading std reported in the odometry covariance [rad]", 0.0, 10.0),
    SettingSpec("twist_std_mps", 0.02, "velocity std reported in the odometry covariance [m/s]", 0.0, 10.0),
    SettingSpec("twist_std_radps", 0.02, "turn-rate std reported in the odometry covariance [rad/s]",
                0.0, 10.0),
    SettingSpec("seed", 0, "random seed of the process noise", 0, 2**31 - 1, read_only=True),
)

SPECS_BY_NAME = {spec.name: spec for spec in SIM_ROBOT_SPECS}

# Variance reported for the axes a planar robot does not move along (z, roll, pitch): fixed by
# construction, so tiny but positive to keep the covariance positive definite.
PLANAR_FIXED_VARIANCE = 1e-9


@dataclass(frozen=True)
class SimRobotSettings:
    """Validated simulated-robot settings."""

    robot_model: str = SPECS_BY_NAME["robot_model"].default
    rate_hz: float = SPECS_BY_NAME["rate_hz"].default
    frame_id: str = SPECS_BY_NAME["frame_id"].default
    child_frame_id: str = SPECS_BY_NAME["child_frame_id"].default
    initial_x: float = SPECS_BY_NAME["initial_x"].default
    initial_y: float = SPECS_BY_NAME["initial_y"].default
    initial_yaw: float = SPECS_BY_NAME["initial_yaw"].default
    max_accel_mps2: float = SPECS_BY_NAME["max_accel_mps2"].default
    command_timeout_s: float = SPECS_BY_NAME["command_timeout_s"].default
    command_latency_s: float = SPECS_BY_NAME["command_latency_s"].default
    accel_noise_mps2: float = SPECS_BY_NAME["accel_noise_mps2"].default
    turn_noise_radps: float = SPECS_BY_NAME["turn_noise_radps"].default
    pose_std_m: float = SPECS_BY_NAME["pose_std_m"].default
    yaw_std_rad: float = SPECS_BY_NAME["yaw_std_rad"].default
    twist_std_mps: float = SPECS_BY_NAME["twist_std_mps"].default
    twist_std_radps: float = SPECS_BY_NAME["twist_std_radps"].default
    seed: int = SPECS_BY_NAME["seed"].default

    def __post_init__(self):
        validate_fields(self, SPECS_BY_NAME)
        for name in ("frame_id", "child_frame_id"):
            if not getattr(self, name):
                raise ValueError(f"{name}='' is not allowed: must name a frame")

    def with_changes(self, **changes):
        """Return a copy with `changes` applied; ValueError names the first invalid one."""
        for name in changes:
            if name not in SPECS_BY_NAME:
                raise ValueError(f"{name!r} is not a simulated-robot setting")
        return replace(self, **changes)

    def pose_covariance(self):
        """6×6 pose covariance (x, y, z, roll, pitch, yaw), row-major as in nav_msgs/Odometry."""
        return np.diag([self.pose_std_m**2, self.pose_std_m**2, PLANAR_FIXED_VARIANCE,
                        PLANAR_FIXED_VARIANCE, PLANAR_FIXED_VARIANCE, self.yaw_std_rad**2])

    def twist_covariance(self):
        """6×6 body-frame twist covariance (vx, vy, vz, ωx, ωy, ωz)."""
        return np.diag([self.twist_std_mps**2, self.twist_std_mps**2, PLANAR_FIXED_VARIANCE,
                        PLANAR_FIXED_VARIANCE, PLANAR_FIXED_VARIANCE, self.twist_std_radps**2])


def wrap_angle(angle):
    """Angle in [−π, π)."""
    return (angle + math.pi) % (2.0 * math.pi) - math.pi


class SimulatedRobot:
    """True state of a simulated robot, advanced by `step(command, dt)`."""

    def __init__(self, settings, speed_mps=0.0):
        """Start at the settings' initial pose, moving forward at `speed_mps` (body x axis)."""
        self.settings = settings
        self.model = make_robot_model(settings.robot_model)
        self._rng = np.random.default_rng(settings.seed)
        x, y, yaw = settings.initial_x, settings.initial_y, settings.initial_yaw
        if self.model.name == "unicycle":
            self.state = np.array([x, y, yaw, speed_mps])
        else:
            self.state = np.array([x, y, speed_mps * math.cos(yaw), speed_mps * math.sin(yaw)])
        self._yaw = yaw
        self.turn_rate = 0.0

    @property
    def yaw(self):
        return wrap_angle(self.state[2] if self.model.name == "unicycle" else self._yaw)

    @property
    def position(self):
        return self.state[0:2].copy()

    @property
    def body_velocity(self):
        """(v_x, v_y) in the body frame."""
        if self.model.name == "unicycle":
            return np.array([self.state[3], 0.0])
        c, s = math.cos(self._yaw), math.sin(self._yaw)
        vx, vy = self.state[2:4]
        return np.array([c * vx + s * vy, -s * vx + c * vy])

    def step(self, command, dt):
        """Advance by dt [s] obeying `command` (a VelocityCommand in the body frame; None: stop)."""
        if dt <= 0.0:
            return
        command = command or VelocityCommand(0.0, 0.0, 0.0)
        s = self.settings
        if self.model.name == "unicycle":
            accel = np.clip((command.linear_x - self.state[3]) / dt, -s.max_accel_mps2, s.max_accel_mps2)
            accel += s.accel_noise_mps2 * self._rng.standard_normal() if s.accel_noise_mps2 else 0.0
            self.turn_rate = command.angular_z + (
                s.turn_noise_radps * self._rng.standard_normal() if s.turn_noise_radps else 0.0)
            self.state = self.model.step(self.state, [accel, self.turn_rate], dt)
            self.state[2] = wrap_angle(self.state[2])
            return
        c, s_yaw = math.cos(self._yaw), math.sin(self._yaw)
        target = np.array([c * command.linear_x - s_yaw * command.linear_y,
                           s_yaw * command.linear_x + c * command.linear_y])
        accel = (target - self.state[2:4]) / dt
        norm = float(np.linalg.norm(accel))
        if norm > s.max_accel_mps2:
            accel *= s.max_accel_mps2 / norm
        if s.accel_noise_mps2:
            accel = accel + s.accel_noise_mps2 * self._rng.standard_normal(2)
        self.state = self.model.step(self.state, accel, dt)
        self.turn_rate = command.angular_z
        self._yaw = wrap_angle(self._yaw + command.angular_z * dt)


class CommandBuffer:
    """Commands on their way to the robot: obeyed `latency_s` after arrival, dropped when too old."""

    def __init__(self, latency_s, timeout_s):
        self.latency_s = latency_s
        self.timeout_s = timeout_s
        self._pending = deque()
        self._active = None  # (effective_s, command)

    def push(self, received_s, command):
        """A command arrived at received_s. Non-finite commands raise ValueError (the node warns)."""
        values = (command.linear_x, command.linear_y, command.angular_z)
        if not all(math.isfinite(v) for v in values):
            raise ValueError(f"cmd_vel is not finite: {values}")
        self._pending.append((received_s + self.latency_s, command))

    def command_at(self, now_s):
        """The command to obey at now_s, or None when none is fresh (the robot brakes to zero)."""
        while self._pending and self._pending[0][0] <= now_s:
            self._active = self._pending.popleft()
        if self._active is None or now_s - self._active[0] > self.timeout_s:
            return None
        return self._active[1]
