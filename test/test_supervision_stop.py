"""Stop command: zero velocity, or a ramp that never brakes harder than the limit.

Reference for the ramp: constant-deceleration kinematics v(t) = max(v₀ − a t, 0), common practice,
no source.
"""

import math

import numpy as np
import pytest

from riskbound.motion.robot_models import VelocityCommand
from riskbound.supervision.stop import ZERO_VELOCITY, is_stop, stop_command


def test_zero_mode_stops_at_once():
    previous = VelocityCommand(1.0, -0.5, 0.8)
    assert stop_command("zero", previous, 0.1, 1.5, 3.0) == ZERO_VELOCITY
    assert is_stop(ZERO_VELOCITY) and not is_stop(previous)


def test_ramp_follows_constant_deceleration_and_keeps_direction():
    v0 = np.array([0.9, 0.6])  # body velocity, speed ≈ 1.0817 m/s
    omega0 = -1.2
    a_max, alpha_max, dt = 1.5, 3.0, 0.1
    command = VelocityCommand(v0[0], v0[1], omega0)
    speeds, turns = [], []
    for k in range(1, 20):
        previous = command
        command = stop_command("ramp", previous, dt, a_max, alpha_max)
        speed = math.hypot(command.linear_x, command.linear_y)
        speeds.append(speed)
        turns.append(command.angular_z)
        assert speed == pytest.approx(max(np.linalg.norm(v0) - a_max * k * dt, 0.0), abs=1e-12)
        assert command.angular_z == pytest.approx(min(omega0 + alpha_max * k * dt, 0.0), abs=1e-12)
        if speed > 0.0:
            # Direction is kept: the velocity stays parallel to the initial one.
            assert command.linear_x * v0[1] - command.linear_y * v0[0] == pytest.approx(0.0, abs=1e-12)
        # Never brakes harder than the limits.
        assert math.hypot(previous.linear_x, previous.linear_y) - speed <= a_max * dt + 1e-12
        assert abs(previous.angular_z - command.angular_z) <= alpha_max * dt + 1e-12
    assert is_stop(command)
    # Reaches zero after ⌈v₀ / (a Δt)⌉ periods and stays there.
    first_zero = speeds.index(0.0) + 1
    assert first_zero == math.ceil(np.linalg.norm(v0) / (a_max * dt))


def test_ramp_from_nothing_or_a_non_finite_command_is_zero():
    assert stop_command("ramp", None, 0.1, 1.5, 3.0) == ZERO_VELOCITY
    assert stop_command("ramp", VelocityCommand(float("nan"), 0.0, 0.0), 0.1, 1.5, 3.0) == ZERO_VELOCITY


def test_unknown_mode_is_rejected():
    with pytest.raises(ValueError, match="stop_mode"):
        stop_command("coast", ZERO_VELOCITY, 0.1, 1.5, 3.0)
