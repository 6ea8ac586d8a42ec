"""Watchdog settings: defaults agree with the planner's; invalid values are rejected with a reason."""

import pytest

from riskbound.planning.settings import PlannerSettings
from riskbound.supervision.settings import WATCHDOG_SPECS, WatchdogSettings


def test_defaults_match_the_planner_defaults():
    planner, watchdog = PlannerSettings(), WatchdogSettings()
    # Deadline = solver_time_fraction / control_rate_hz = 0.8 / 10 Hz = 80 ms.
    assert watchdog.deadline_ms == pytest.approx(1e3 * planner.deadline_s) == pytest.approx(80.0)
    assert watchdog.control_rate_hz == planner.control_rate_hz
    assert watchdog.max_speed_mps == planner.max_speed_mps
    assert watchdog.max_turn_rate_radps == planner.max_turn_rate_radps
    assert watchdog.max_decel_mps2 == planner.max_accel_mps2
    assert watchdog.stop_bound_s(watchdog.status_timeout_s) == pytest.approx(0.4)


def test_every_spec_default_is_accepted_and_is_the_dataclass_default():
    settings = WatchdogSettings()
    for spec in WATCHDOG_SPECS:
        assert spec.check(spec.default) is None
        assert getattr(settings, spec.name) == spec.default


@pytest.mark.parametrize("name, value, fragment", [
    ("control_rate_hz", 0.5, "[1.0, 100.0]"),
    ("status_timeout_s", 0.0, "(0.0, 10.0]"),
    ("odom_timeout_s", float("nan"), "odom_timeout_s=nan"),
    ("recovery_cycles", 0, "[1, 1000]"),
    ("recovery_cycles", 2.5, "wrong type"),
    ("stop_mode", "coast", "'zero', 'ramp'"),
    ("require_forecast", 1, "wrong type"),
    ("deadline_ms", -5.0, "deadline_ms"),
])
def test_invalid_values_are_rejected_naming_the_parameter_and_range(name, value, fragment):
    with pytest.raises(ValueError) as error:
        WatchdogSettings().with_changes(**{name: value})
    assert name in str(error.value) and fragment in str(error.value)


def test_check_rate_below_the_control_rate_is_rejected():
    with pytest.raises(ValueError, match="check_rate_hz=5.0 .*control_rate_hz"):
        WatchdogSettings(check_rate_hz=5.0, control_rate_hz=10.0)


def test_unknown_setting_is_rejected():
    with pytest.raises(ValueError, match="not a watchdog setting"):
        WatchdogSettings().with_changes(speed=1.0)


def test_integers_are_accepted_for_float_settings():
    assert WatchdogSettings(deadline_ms=50).deadline_ms == 50.0
