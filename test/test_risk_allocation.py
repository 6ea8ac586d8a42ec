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
    assert ALLOCATION_MODES == ("joint", "joint_uniform", "per_constraint")


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


def test_reallocation_moves_binding_pairs_to_the_target_quantile():
    # Binding pairs change their back-off z = Φ⁻¹(1 − a) by z_charged − z_target (gain 1), with
    # quantiles from scipy.stats.norm; the budget is shared equally among them.
    from scipy.stats import norm

    from riskbound.risk.allocation import MAX_PAIR_RISK, reallocate
    risks = np.array([1e-3, 1e-3, 2e-3, 5e-4])
    charges = np.array([1e-5, 3e-2, 1e-9, 1e-4])
    binding = np.array([True, True, False, False])
    budget = 0.02
    updated = reallocate(risks, charges, binding, budget, floor=1e-4)
    target = budget / 2
    for i in (0, 1):
        z = norm.isf(risks[i]) - (norm.isf(charges[i]) - norm.isf(target))
        assert updated[i] == pytest.approx(min(max(norm.sf(z), 1e-4), MAX_PAIR_RISK), rel=1e-9)
    assert updated[0] > risks[0]  # charged below its share: its ellipse shrinks
    assert updated[1] < risks[1]  # charged above: its ellipse grows
    # Slack pairs give back half of what they hold above their charge, not below the floor.
    assert updated[2] == pytest.approx(0.5 * (2e-3 + 1e-9))
    assert updated[3] == pytest.approx(max(1e-4, 0.5 * (5e-4 + 1e-4)))


def test_reallocation_with_no_budget_returns_binding_pairs_to_the_floor():
    from riskbound.risk.allocation import reallocate
    updated = reallocate(np.array([0.2, 0.01]), np.array([0.3, 0.02]), np.array([True, True]), -0.01, floor=1e-4)
    np.testing.assert_array_equal(updated, [1e-4, 1e-4])
