"""Risk allocation: how a total collision bound α is split over the individual chance constraints.

Modes
-----
``joint``
    α bounds the probability of any collision over the whole horizon and all obstacles considered.
    By Boole's inequality, P(∪ Cᵢ) ≤ Σ P(Cᵢ), so giving each of the steps × obstacles constraints
    the risk α / (steps × obstacles) keeps the union below α (uniform allocation).
``per_constraint``
    α bounds each (obstacle, step) constraint on its own; the joint risk over the horizon can then
    reach steps × obstacles × α. Cheaper in clearance, weaker as a guarantee.
"""

ALLOCATION_MODES = ("joint", "per_constraint")


def per_constraint_risk(total_risk, steps, obstacles, mode="joint"):
    """Return the risk each (obstacle, step) constraint may carry under `mode`."""
    if not 0.0 < total_risk < 0.5:
        raise ValueError(f"total_risk={total_risk!r} is outside the open interval (0, 0.5)")
    if mode not in ALLOCATION_MODES:
        raise ValueError(f"mode={mode!r} is not one of {ALLOCATION_MODES}")
    if int(steps) < 1:
        raise ValueError(f"steps={steps!r} must be at least 1")
    if int(obstacles) < 0:
        raise ValueError(f"obstacles={obstacles!r} must not be negative")
    if mode == "per_constraint":
        return float(total_risk)
    return float(total_risk) / (int(steps) * max(int(obstacles), 1))
