"""Watchdog settings: one table of every parameter (type, default, range, meaning) validated in one place.

The watchdog node turns this table into ROS parameter descriptors; the core validates with it too,
so a value rejected on the robot is rejected for the same reason in a script. The deadline and the
command limits equal the planner's defaults (riskbound.planning.settings; test_supervision_settings
holds the two in step), so that a planner and a watchdog started without parameter files agree. The
watchdog checks the planner's output and does not import the planner.
"""

from dataclasses import dataclass, replace

from riskbound.settings_table import SettingSpec, validate_fields

STOP_MODES = ("zero", "ramp")

WATCHDOG_SPECS = (
    SettingSpec("control_rate_hz", 10.0, "cmd_vel publications per second", 1.0, 100.0, read_only=True),
    SettingSpec("check_rate_hz", 50.0, "fault checks per second between control cycles: a stop is sent as "
                "soon as a check finds a stopping fault (≥ control_rate_hz)", 1.0, 1000.0, read_only=True),
    SettingSpec("diagnostics_rate_hz", 1.0, "/diagnostics publications per second", 0.1, 10.0,
                read_only=True),
    SettingSpec("deadline_ms", 80.0,
                "solve-time deadline; a longer solve degrades health (planner: solver_time_fraction / "
                "control_rate_hz) [ms]", 0.0, 1e4, low_open=True),
    SettingSpec("deadline_misses_to_stop", 3, "consecutive solves over the deadline that stop the robot",
                1, 100),
    SettingSpec("status_timeout_s", 0.3, "planner_status older than this stops the robot [s]",
                0.0, 10.0, low_open=True),
    SettingSpec("command_timeout_s", 0.3, "cmd_vel_plan older than this stops the robot [s]",
                0.0, 10.0, low_open=True),
    SettingSpec("odom_timeout_s", 0.3, "odometry older than this (header stamp) stops the robot [s]",
                0.0, 10.0, low_open=True),
    SettingSpec("forecast_timeout_s", 0.5, "obstacle_forecast older than this (header stamp) stops the "
                "robot when require_forecast is true [s]", 0.0, 10.0, low_open=True),
    SettingSpec("require_forecast", True, "stop when the obstacle forecast is stale (false: robots "
                "without obstacle tracking)"),
    SettingSpec("recovery_cycles", 5, "consecutive fault-free control cycles needed to leave "
                "stopped or degraded (hysteresis)", 1, 1000),
    SettingSpec("resume_when_degraded", False, "false: only fault-free cycles count towards leaving "
                "stopped; true: recovery_cycles cycles in a row without a stopping fault resume the "
                "robot as degraded, so warned plans (a planner with infeasible_response "
                "least_violation) can drive it away after a stop"),
    SettingSpec("max_speed_mps", 1.2, "a planned command faster than this stops "
                "the robot [m/s]", 0.0, 20.0, low_open=True),
    SettingSpec("max_turn_rate_radps", 1.5, "a planned turn rate above this "
                "stops the robot [rad/s]", 0.0, 10.0, low_open=True),
    SettingSpec("stop_mode", "zero", "zero: publish zero velocity at once; ramp: decelerate from the "
                "last published command within max_decel_mps2 / max_angular_decel_radps2",
                choices=STOP_MODES),
    SettingSpec("max_decel_mps2", 1.5, "ramp stop: linear deceleration [m/s²]",
                0.0, 20.0, low_open=True),
    SettingSpec("max_angular_decel_radps2", 3.0, "ramp stop: turn-rate deceleration [rad/s²]",
                0.0, 100.0, low_open=True),
    SettingSpec("statistics_window", 600, "solve times kept for the statistics (600 = one minute at "
                "10 Hz)", 10, 100000, read_only=True),
)

SPECS_BY_NAME = {spec.name: spec for spec in WATCHDOG_SPECS}


@dataclass(frozen=True)
class WatchdogSettings:
    """Validated watchdog settings (SI units; names carry units where a reader could guess wrong)."""

    control_rate_hz: float = SPECS_BY_NAME["control_rate_hz"].default
    check_rate_hz: float = SPECS_BY_NAME["check_rate_hz"].default
    diagnostics_rate_hz: float = SPECS_BY_NAME["diagnostics_rate_hz"].default
    deadline_ms: float = SPECS_BY_NAME["deadline_ms"].default
    deadline_misses_to_stop: int = SPECS_BY_NAME["deadline_misses_to_stop"].default
    status_timeout_s: float = SPECS_BY_NAME["status_timeout_s"].default
    command_timeout_s: float = SPECS_BY_NAME["command_timeout_s"].default
    odom_timeout_s: float = SPECS_BY_NAME["odom_timeout_s"].default
    forecast_timeout_s: float = SPECS_BY_NAME["forecast_timeout_s"].default
    require_forecast: bool = SPECS_BY_NAME["require_forecast"].default
    recovery_cycles: int = SPECS_BY_NAME["recovery_cycles"].default
    resume_when_degraded: bool = SPECS_BY_NAME["resume_when_degraded"].default
    max_speed_mps: float = SPECS_BY_NAME["max_speed_mps"].default
    max_turn_rate_radps: float = SPECS_BY_NAME["max_turn_rate_radps"].default
    stop_mode: str = SPECS_BY_NAME["stop_mode"].default
    max_decel_mps2: float = SPECS_BY_NAME["max_decel_mps2"].default
    max_angular_decel_radps2: float = SPECS_BY_NAME["max_angular_decel_radps2"].default
    statistics_window: int = SPECS_BY_NAME["statistics_window"].default

    def __post_init__(self):
        validate_fields(self, SPECS_BY_NAME)
        if self.check_rate_hz < self.control_rate_hz:
            raise ValueError(f"check_rate_hz={self.check_rate_hz!r} is out of range: must be ≥ control_rate_hz "
                             f"({self.control_rate_hz!r})")

    def with_changes(self, **changes):
        """Return a copy with `changes` applied; ValueError names the first invalid one."""
        for name in changes:
            if name not in SPECS_BY_NAME:
                raise ValueError(f"{name!r} is not a watchdog setting")
        return replace(self, **changes)

    @property
    def control_period_s(self):
        return 1.0 / self.control_rate_hz

    @property
    def check_period_s(self):
        return 1.0 / self.check_rate_hz

    def stop_bound_s(self, timeout_s):
        """Required longest time from a fault to the first stop command: the fault's staleness limit
        plus one control period. By design the watchdog stops within the limit plus one check
        period (check_rate_hz ≥ control_rate_hz); the difference is the margin for timer lateness."""
        return timeout_s + self.control_period_s
