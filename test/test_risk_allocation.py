"""Risk allocation over the horizon and the obstacles: joint (Boole's inequality) and per-constraint."""

import math

import numpy as np
import pytest

from riskbound.risk.allocation import ALLOCATION_MODES, per_constraint_risk


@pytest.mark.parametrize("total", [0.001, 0.05, 0.2, 0.49])
@pytest.mark.parametrize("steps, obstacles", [(1, 1), (20, 1), (20, 8), (60, 64), (7, 3)])
def test_joint_mode_splits_uniformly_and_meets_the_boole_bound(total, steps, obstacles):
    risk = per_constraint_risk(total, steps, obstacles, "joint")
    assert risk == pytest.approx(total / (steps * obstacles), rel=1e-15)
    # Boole's inequality, P(∪ Cᵢ) ≤ Σ P(Cᵢ): the individual risks must add up to no more than α.
    individual = np.full(steps * obstacles, risk)
    assert math.fsum(individual) == pytest.approx(total, rel=1e-12)
    assert math.fsum(individual) <= total * (1.0 + 1e-12)


def test_joint_mode_keeps_the_union_below_total_for_independent_constraints():
    # For independent events the union has probability 1 − Π(1 − aᵢ), which Boole's bound must
    # dominate (elementary probability, common practice, no source).
    for steps, obstacles in [(20, 8), (60, 64)]:
        risk = per_constraint_risk(0.05, steps, obstacles)
        union = 1.0 - (1.0 - risk) ** (steps * obstacles)
        assert union <= 0.05
        assert union > 0.05 * 0.97  # the bound is nearly tight for small individual risks


def test_default_mode_is_joint():
    assert per_constraint_risk(0.05, 20, 4) == per_constraint_risk(0.05, 20, 4, "joint")


@pytest.mark.parametrize("steps, obstacles", [(1, 1), (20, 8), (60, 64)])
def test_per_constraint_mode_gives_every_constraint_alpha(steps, obstacles):
    assert per_constraint_risk(0.05, steps, obstacles, "per_constraint") == 0.05


def test_joint_risk_shrinks_as_obstacles_are_added():
    risks = [per_constraint_risk(0.05, 20, m) for m in range(1, 65)]
    assert np.all(np.diff(risks) < 0.0)


def test_numpy_integer_counts_are_accepted():
    assert per_constraint_risk(0.05, np.int64(20), np.int32(4)) == pytest.approx(0.05 / 80)


def test_modes_are_the_documented_ones():
    assert ALLOCATION_MODES == ("joint", "per_constraint")


@pytest.mark.parametrize("total", [0.0, 0.5, 0.7, -0.01, math.nan, math.inf])
def test_invalid_total_risk_is_rejected(total):
    with pytest.raises(ValueError, match=r"total_risk=.*\(0, 0\.5\)"):
        per_constraint_risk(total, 20, 4)


@pytest.mark.parametrize("kwargs, name", [
    ({"steps": 0}, "steps"),
    ({"steps": -3}, "steps"),
    ({"steps": 2.5}, "steps"),
    ({"steps": math.nan}, "steps"),
    ({"steps": "20"}, "steps"),
    ({"obstacles": -1}, "obstacles"),
    ({"obstacles": 1.5}, "obstacles"),
    ({"obstacles": True}, "obstacles"),
    ({"mode": "uniform"}, "mode"),
])
def test_invalid_counts_and_modes_are_rejected_naming_the_argument(kwargs, name):
    # A fractional count silently truncated would hand each constraint more than its share.
    args = {"total_risk": 0.05, "steps": 20, "obstacles": 4, "mode": "joint"}
    args.update(kwargs)
    with pytest.raises(ValueError, match=rf"^{name}="):
        per_constraint_risk(**args)
