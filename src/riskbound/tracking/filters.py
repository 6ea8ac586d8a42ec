"""Motion models of tracked people and their Kalman filters.

Each model is defined once and used two ways: as a filterpy filter for a single track (the
reference implementation, used by tests and scripts) and as batched numpy operations over all
tracks at once (the tracker's hot path: one call per scan instead of one per track). Tests check
that both give the same numbers.

Every track starts in the constant-velocity filter with a prior on its unknown velocity
(`birth`); unicycle tracks switch to the unicycle state once their direction of travel is
reliable or their heading was measured (`ready`, `from_position_velocity`).

The models, one module each: `constant_velocity.py`, `unicycle.py`; what they share, with the
notation and the Kalman equations: `motion_model.py`. This module names them and builds the one
the settings ask for.
"""

from riskbound.tracking.constant_velocity import ConstantVelocityModel
from riskbound.tracking.motion_model import MotionModel, wrap_angle
from riskbound.tracking.unicycle import UnicycleModel

__all__ = ["MOTION_MODELS", "ConstantVelocityModel", "MotionModel", "UnicycleModel", "make_motion_model",
           "wrap_angle"]

MOTION_MODELS = ("constant_velocity", "unicycle")


def make_motion_model(settings):
    """The motion model named by `settings.motion_model`, with its noise levels."""
    arguments = dict(accel_noise_mps2=settings.accel_noise_mps2,
                     position_noise_m=settings.position_noise_m,
                     heading_noise_rad=settings.heading_noise_rad,
                     initial_speed_sigma_mps=settings.initial_speed_sigma_mps,
                     turn_noise_radps2=settings.turn_noise_radps2,
                     initial_turn_rate_sigma_radps=settings.initial_turn_rate_sigma_radps)
    if settings.motion_model == "constant_velocity":
        return ConstantVelocityModel(**arguments)
    if settings.motion_model == "unicycle":
        return UnicycleModel(**arguments)
    raise ValueError(f"motion_model={settings.motion_model!r} is not one of {MOTION_MODELS}")

