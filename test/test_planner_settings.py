"""Planner settings: the spec table and the frozen settings agree, and every bad value is rejected with a reason."""

import dataclasses
import math
import re

import numpy as np
import pytest

from riskbound.motion.robot_models import ROBOT_MODELS
from riskbound.planning.settings import PLANNER_SPECS, SPECS_BY_NAME, PlannerSettings
from riskbound.risk.allocation import ALLOCATION_MODES

NUMERIC_SPECS = [spec for spec in PLANNER_SPECS if spec.choices is None]
CHOICE_SPECS = [spec for spec in PLANNER_SPECS if spec.choices is not None]


def test_settings_fields_match_the_spec_table_in_order():
    assert [f.name for f in dataclasses.fields(PlannerSettings)] == [spec.name for spec in PLANNER_SPECS]


def test_settings_defaults_equal_spec_defaults_field_by_field():
    defaults = PlannerSettings()
    for spec in PLANNER_SPECS:
        value = getattr(defaults, spec.name)
        assert value == spec.default, spec.name
        assert type(value) is type(spec.default), spec.name
        assert spec.check(spec.default) is None, spec.name


def test_every_spec_has_a_description_and_a_range_or_choices():
    for spec in PLANNER_SPECS:
        assert spec.description.strip(), spec.name
        assert spec.choices is not None or (spec.low is not None and spec.high is not None), spec.name


def test_choices_come_from_the_core():
    assert SPECS_BY_NAME["robot_model"].choices == ROBOT_MODELS
    assert SPECS_BY_NAME["risk_allocation"].choices == ALLOCATION_MODES


def out_of_range_values(spec):
    """Values just outside and far outside each bound, including an open bound itself."""
    step = 1 if isinstance(spec.default, int) else 1e-3 * max(1.0, abs(spec.high - spec.low))
    values = [spec.low - step, spec.high + step, spec.low - 1000 * step, spec.high + 1000 * step]
    if spec.low_open:
        values.append(spec.low)
    if spec.high_open:
        values.append(spec.high)
    return [type(spec.default)(v) for v in values]


@pytest.mark.parametrize("spec", NUMERIC_SPECS, ids=lambda spec: spec.name)
def test_out_of_range_values_are_rejected_naming_setting_and_range(spec):
    for value in out_of_range_values(spec):
        reason = spec.check(value)
        assert reason is not None, (spec.name, value)
        assert reason.startswith(f"{spec.name}=")
        assert spec.allowed() in reason
        with pytest.raises(ValueError) as caught:
            PlannerSettings(**{spec.name: value})
        assert str(caught.value) == reason
        with pytest.raises(ValueError, match=spec.name):
            PlannerSettings().with_changes(**{spec.name: value})


@pytest.mark.parametrize("spec", NUMERIC_SPECS, ids=lambda spec: spec.name)
def test_closed_bounds_are_accepted(spec):
    for bound, is_open in ((spec.low, spec.low_open), (spec.high, spec.high_open)):
        if not is_open:
            value = type(spec.default)(bound)
            assert spec.check(value) is None
            assert getattr(PlannerSettings(**{spec.name: value}), spec.name) == value


@pytest.mark.parametrize("spec", [s for s in NUMERIC_SPECS if isinstance(s.default, float)], ids=lambda spec: spec.name)
def test_nan_is_rejected(spec):
    with pytest.raises(ValueError, match=f"{spec.name}=nan .*" + re.escape(spec.allowed())):
        PlannerSettings(**{spec.name: math.nan})


def test_range_text_reads_like_interval_notation():
    # Written out by hand: open bounds in round brackets, closed bounds in square ones.
    assert SPECS_BY_NAME["risk_level"].allowed() == "(0.0, 0.5)"
    assert SPECS_BY_NAME["horizon_steps"].allowed() == "[5, 60]"
    assert SPECS_BY_NAME["max_speed_mps"].allowed() == "(0.0, 20.0]"
    assert SPECS_BY_NAME["min_speed_mps"].allowed() == "[-5.0, 0.0]"


@pytest.mark.parametrize("risk", [0.0, 0.5, 0, 0.7, -0.01, math.inf])
def test_risk_level_open_bounds_are_rejected(risk):
    with pytest.raises(ValueError, match=r"risk_level=.* \(0\.0, 0\.5\)"):
        PlannerSettings(risk_level=risk)


@pytest.mark.parametrize("spec", CHOICE_SPECS, ids=lambda spec: spec.name)
def test_unknown_choice_is_rejected_listing_the_choices(spec):
    with pytest.raises(ValueError) as caught:
        PlannerSettings(**{spec.name: "no_such_choice"})
    message = str(caught.value)
    assert message.startswith(f"{spec.name}='no_such_choice'")
    for choice in spec.choices:
        assert repr(choice) in message


@pytest.mark.parametrize("name, value", [("horizon_steps", 20.5), ("horizon_steps", "20"), ("weight_goal", True),
                                         ("max_obstacles", 4.0), ("risk_level", "0.05"), ("step_s", None)])
def test_wrong_types_are_rejected(name, value):
    with pytest.raises(ValueError, match=rf"^{name}=.*wrong type"):
        PlannerSettings(**{name: value})


def test_integers_for_float_settings_become_floats():
    settings = PlannerSettings(weight_goal=2, control_rate_hz=20)
    assert settings.weight_goal == 2.0 and type(settings.weight_goal) is float
    assert type(settings.control_rate_hz) is float


def test_unknown_setting_is_rejected_by_name():
    with pytest.raises(ValueError, match="'risk' is not a planner setting"):
        PlannerSettings().with_changes(risk=0.1)


def test_settings_are_frozen():
    with pytest.raises(dataclasses.FrozenInstanceError):
        PlannerSettings().risk_level = 0.1


def test_with_changes_returns_a_new_validated_copy():
    base = PlannerSettings()
    changed = base.with_changes(risk_level=0.01, robot_model="unicycle")
    assert (changed.risk_level, changed.robot_model) == (0.01, "unicycle")
    assert base.risk_level == 0.05


def test_only_structural_settings_need_a_rebuild():
    base = PlannerSettings()
    alternatives = {
        "risk_level": 0.1, "risk_allocation": "per_constraint", "horizon_steps": 30, "step_s": 0.2,
        "control_rate_hz": 20.0, "robot_model": "unicycle", "robot_radius_m": 0.5, "max_speed_mps": 2.0,
        "min_speed_mps": -0.5, "max_accel_mps2": 2.5, "max_turn_rate_radps": 2.0, "weight_goal": 2.0,
        "weight_terminal": 5.0, "weight_speed": 0.2, "weight_accel": 0.3, "weight_turn": 0.4,
        "goal_reach_m": 5.0, "max_obstacles": 4, "robot_accel_noise": 0.3, "robot_turn_noise": 0.2,
        "solver_max_iter": 50, "solver_time_fraction": 0.5, "solver_tolerance": 1e-6,
        "infeasible_response": "least_violation", "solver": "ipopt", "qp_solver": "qpoases", "qp_iterations": 3,
        "allocation_passes": 1, "static_planes": 2,
    }
    assert sorted(alternatives) == sorted(spec.name for spec in PLANNER_SPECS)
    for spec in PLANNER_SPECS:
        changed = base.with_changes(**{spec.name: alternatives[spec.name]})
        assert getattr(changed, spec.name) != getattr(base, spec.name), spec.name
        assert base.needs_rebuild(changed) is spec.rebuild, spec.name
        assert changed.needs_rebuild(changed) is False
    # The risk level must be tunable on the robot without rebuilding the problem.
    assert not SPECS_BY_NAME["risk_level"].rebuild and not SPECS_BY_NAME["risk_allocation"].rebuild


def test_deadline_is_the_time_fraction_of_the_control_period():
    assert PlannerSettings().deadline_s == pytest.approx(0.8 / 10.0)
    assert PlannerSettings(solver_time_fraction=1.0, control_rate_hz=1.0).deadline_s == pytest.approx(1.0)


def test_numpy_scalars_are_taken_as_the_numbers_they_hold():
    settings = PlannerSettings(horizon_steps=np.int64(12), risk_level=np.float32(0.1), max_obstacles=np.int32(4))
    assert (settings.horizon_steps, settings.max_obstacles) == (12, 4)
    assert type(settings.horizon_steps) is int and type(settings.risk_level) is float
    assert settings.risk_level == pytest.approx(0.1)
    with pytest.raises(ValueError, match="horizon_steps=61 is out of range"):
        PlannerSettings(horizon_steps=np.int64(61))
    with pytest.raises(ValueError, match="wrong type"):
        PlannerSettings(horizon_steps=np.float64(12.0))
