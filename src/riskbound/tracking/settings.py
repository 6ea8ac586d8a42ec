"""Tracker settings: one table of every parameter (type, default, range, meaning) validated in one place.

The tracker node turns this table into ROS parameter descriptors; the core validates with it too,
so a value rejected on the robot is rejected for the same reason in a script.

`rebuild` marks settings whose change restarts every track (the state layout changes with the
motion model). Every other setting applies from the next scan to the tracks already held.

Forecast grid defaults equal the planner's (horizon_steps=20, step_s=0.1): the configuration
files keep the two in step.
"""

from dataclasses import dataclass, replace

from riskbound.settings_table import SettingSpec, validate_fields
from riskbound.tracking.filters import MOTION_MODELS

TRACKER_SPECS = (
    SettingSpec("motion_model", "constant_velocity",
                "constant_velocity: linear Kalman filter on [x, y, vx, vy]; unicycle: extended Kalman "
                "filter on [x, y, heading, speed, turn rate]; a change restarts every track",
                choices=MOTION_MODELS, rebuild=True),
    SettingSpec("accel_noise_mps2", 1.0,
                "process noise: std of the white acceleration of a tracked person (unicycle: along "
                "its heading) [m/s²]", 0.0, 20.0, low_open=True),
    SettingSpec("turn_noise_radps2", 1.0,
                "unicycle only: process noise, std of the white turn-rate change [rad/s²]",
                0.0, 50.0, low_open=True),
    SettingSpec("position_noise_m", 0.1, "measurement noise: std of a detection's x and y [m]",
                0.0, 10.0, low_open=True),
    SettingSpec("heading_noise_rad", 0.3,
                "measurement noise: std of a detection's heading, when its orientation is valid [rad]",
                0.0, 3.15, low_open=True),
    SettingSpec("use_heading", True,
                "use a detection's orientation as a heading measurement when the quaternion is "
                "non-zero and finite (set false for detectors that leave the identity quaternion)"),
    SettingSpec("initial_speed_sigma_mps", 1.0,
                "prior std of a new track's velocity, per axis: sizes its gate and weighs its first "
                "velocity estimate [m/s]", 0.0, 20.0, low_open=True),
    SettingSpec("initial_turn_rate_sigma_radps", 0.5,
                "unicycle only: std of the turn rate when a track starts [rad/s]", 0.0, 10.0,
                low_open=True),
    SettingSpec("gate_probability", 0.999,
                "probability that the true detection of a track falls inside its chi-square gate "
                "(0.999: with 100 people at 10 Hz about one true detection a second falls outside)",
                0.5, 1.0, high_open=True),
    SettingSpec("confirm_hits", 3, "M: hits needed within the first confirm_window scans to confirm a track",
                1, 30),
    SettingSpec("confirm_window", 5, "N: scans a tentative track has to collect confirm_hits hits", 1, 30),
    SettingSpec("delete_after_s", 1.0, "a track without a detection for this long is deleted [s]",
                0.0, 60.0, low_open=True),
    SettingSpec("late_tolerance_s", 0.3,
                "a scan older than the newest one by at most this much still updates the tracks [s]",
                0.0, 10.0),
    SettingSpec("backward_jump_reset_s", 2.0,
                "a scan older than the newest one by more than this means time went backwards "
                "(bag loop, clock reset): the tracker restarts [s]", 0.0, 3600.0, low_open=True),
    SettingSpec("max_tracks", 256, "tracks held at most; further detections start no track", 1, 5000),
    SettingSpec("forecast_steps", 20, "forecast steps after the scan stamp (keep equal to the planner's "
                "horizon_steps)", 1, 200),
    SettingSpec("forecast_step_s", 0.1, "duration of one forecast step (keep equal to the planner's "
                "step_s) [s]", 0.01, 2.0),
    SettingSpec("footprint_half_length_m", 0.25,
                "half the footprint of a tracked person along its heading [m]", 0.0, 5.0),
    SettingSpec("footprint_half_width_m", 0.2,
                "half the footprint of a tracked person across its heading [m]", 0.0, 5.0),
)

SPECS_BY_NAME = {spec.name: spec for spec in TRACKER_SPECS}


@dataclass(frozen=True)
class TrackerSettings:
    """Validated tracker settings (SI units; names carry units where a reader could guess wrong).

    Footprint default: a walking adult, about 0.5 m front to back with the stride and 0.4 m across
    the shoulders (value from memory). Velocity prior: people walk at about 1.3 m/s in any
    direction, about 1 m/s per axis; turning, starting and stopping take accelerations of about
    1 m/s² (values from memory).
    """

    motion_model: str = "constant_velocity"
    accel_noise_mps2: float = 1.0
    turn_noise_radps2: float = 1.0
    position_noise_m: float = 0.1
    heading_noise_rad: float = 0.3
    use_heading: bool = True
    initial_speed_sigma_mps: float = 1.0
    initial_turn_rate_sigma_radps: float = 0.5
    gate_probability: float = 0.999
    confirm_hits: int = 3
    confirm_window: int = 5
    delete_after_s: float = 1.0
    late_tolerance_s: float = 0.3
    backward_jump_reset_s: float = 2.0
    max_tracks: int = 256
    forecast_steps: int = 20
    forecast_step_s: float = 0.1
    footprint_half_length_m: float = 0.25
    footprint_half_width_m: float = 0.2

    def __post_init__(self):
        validate_fields(self, SPECS_BY_NAME)
        if self.confirm_hits > self.confirm_window:
            raise ValueError(f"confirm_hits={self.confirm_hits} is out of range: must be in "
                             f"[1, confirm_window={self.confirm_window}]")
        if self.late_tolerance_s > self.backward_jump_reset_s:
            raise ValueError(f"late_tolerance_s={self.late_tolerance_s} is out of range: must be in "
                             f"[0.0, backward_jump_reset_s={self.backward_jump_reset_s}]")

    def with_changes(self, **changes):
        """Return a copy with `changes` applied; ValueError names the first invalid one."""
        for name in changes:
            if name not in SPECS_BY_NAME:
                raise ValueError(f"{name!r} is not a tracker setting")
        return replace(self, **changes)

    def needs_reset(self, other):
        """True when going from self to `other` restarts every track."""
        return any(getattr(self, s.name) != getattr(other, s.name) for s in TRACKER_SPECS if s.rebuild)
