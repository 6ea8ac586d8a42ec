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

import numbers

ALLOCATION_MODES = ("joint", "per_constraint")


def _count(name, value, minimum):
    """`value` as an int: truncating a fractional count would hand out more risk than allowed."""
    if not isinstance(value, numbers.Integral) or isinstance(value, bool):
        raise ValueError(f"{name}={value!r} must be an integer")
    count = int(value)
    if count < minimum:
        raise ValueError(f"{name}={value!r} must be at least {minimum}")
    return count


def per_constraint_risk(total_risk, steps, obstacles, mode="joint"):
    """Return the risk each (obstacle, step) constraint may carry under `mode`."""
    if not 0.0 < total_risk < 0.5:
        raise ValueError(f"total_risk={total_risk!r} is outside the open interval (0, 0.5)")
    if mode not in ALLOCATION_MODES:
        raise ValueError(f"mode={mode!r} is not one of {ALLOCATION_MODES}")
    steps = _count("steps", steps, 1)
    obstacles = _count("obstacles", obstacles, 0)
    if mode == "per_constraint":
        return float(total_risk)
    return float(total_risk) / (steps * max(obstacles, 1))
