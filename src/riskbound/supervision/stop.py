"""The command the watchdog sends instead of the planner's: zero velocity, or a deceleration ramp.

A ramp lowers the linear speed (the norm of the planar body velocity, direction kept) by at most
a_max·Δt and the turn rate by at most α_max·Δt per control period, so the base is never asked to
brake harder than it can; both reach exactly zero and stay there.
"""

import math

from riskbound.motion.robot_models import VelocityCommand
from riskbound.supervision.settings import STOP_MODES

ZERO_VELOCITY = VelocityCommand(0.0, 0.0, 0.0)


def is_stop(command):
    """True for the zero twist: the stop command (or the end of a ramp)."""
    return command.linear_x == 0.0 and command.linear_y == 0.0 and command.angular_z == 0.0


def _toward_zero(value, change):
    return math.copysign(max(abs(value) - change, 0.0), value)


def stop_command(mode, previous, period_s, max_decel_mps2, max_angular_decel_radps2):
    """The stop command for one control period.

    mode: "zero" or "ramp"; previous: the command published in the previous period (the robot's
    last order; a non-finite one ramps from zero since nothing sane can be continued).
    """
    if mode not in STOP_MODES:
        raise ValueError(f"stop_mode={mode!r} is not allowed: must be one of {STOP_MODES}")
    if mode == "zero" or previous is None:
        return ZERO_VELOCITY
    values = (previous.linear_x, previous.linear_y, previous.angular_z)
    if not all(math.isfinite(v) for v in values):
        return ZERO_VELOCITY
    speed = math.hypot(previous.linear_x, previous.linear_y)
    new_speed = max(speed - max_decel_mps2 * period_s, 0.0)
    scale = new_speed / speed if speed > 0.0 else 0.0
    return VelocityCommand(previous.linear_x * scale, previous.linear_y * scale,
                           _toward_zero(previous.angular_z, max_angular_decel_radps2 * period_s))
