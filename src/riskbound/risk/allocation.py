"""Risk allocation: how a total collision bound α is split over the individual chance constraints.

Modes
-----
``joint``
    α bounds the probability of any collision over the whole horizon and all obstacles the robot
    could reach. By Boole's inequality, P(∪ Cᵢ) ≤ Σ P(Cᵢ): the charges of the individual
    (obstacle, step) pairs at the plan (riskbound.risk.charge) must add up to at most α. Every pair
    starts from the uniform share α / (steps × obstacles); iterative risk allocation
    (`reallocate`) then moves risk that slack pairs do not use to the pairs that bind.
``joint_uniform``
    The same bound with every pair kept at the uniform share: the cautious split, kept to measure
    what the reallocation gains.
``per_constraint``
    α bounds each (obstacle, step) constraint on its own; the joint risk over the horizon can then
    reach steps × obstacles × α. Cheaper in clearance, weaker as a guarantee.
"""

import numbers

import numpy as np
from scipy.special import ndtr, ndtri

ALLOCATION_MODES = ("joint", "joint_uniform", "per_constraint")
# Largest risk one pair's ellipse may be built with: the back-off Φ⁻¹(1 − a) stays positive
# (0.126 σ at 0.45), so the ellipse still encloses the grown box itself.
MAX_PAIR_RISK = 0.45
# Share of the joint bound that reallocation aims the charge at; the rest absorbs the change of the
# forecast from one cycle to the next, so the next cycle's plan seldom overspends (our choice).
REALLOCATION_TARGET = 0.8
# Back-off step per unit of quantile error. A plan on an ellipse sits between 1 and √2 face
# back-offs out (the enclosing ellipse's stretch); the full step (1) may overshoot by that factor,
# which the charge check of every plan catches and the next step corrects (our choice, measured
# faster than the never-overshooting 1/√2).
REALLOCATION_GAIN = 1.0


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


def reallocate(risks, charges, binding, budget, floor):
    """One step of iterative risk allocation, in quantile (back-off) units.

    risks: (…) risk each pair's ellipse was built with
    charges: (…) risk charged to the plan for each pair (riskbound.risk.charge)
    binding: (…) bool, the plan lies on that pair's ellipse
    budget: risk the binding pairs may carry together (the target share of α minus the charge of
        every other pair); ≤ 0 sends them back to `floor`
    floor: (…) or scalar, the uniform share, the smallest risk a pair is ever given

    Binding pairs move their back-off z = Φ⁻¹(1 − a) by REALLOCATION_GAIN × (z_charged − z_target),
    where each would be charged budget / (number binding). Slack pairs give back half of what
    they hold above their charge, a ← max(floor, (a + charge)/2): their charge, not their ellipse,
    is what the bound counts, but a pair that binds again later must not start from a risk it
    earned in another geometry. Returns the new risks, within [floor, MAX_PAIR_RISK].
    """
    risks = np.asarray(risks, dtype=float)
    floor = np.broadcast_to(np.asarray(floor, dtype=float), risks.shape)
    binding = np.asarray(binding, dtype=bool)
    updated = risks.copy()
    slack = ~binding
    updated[slack] = np.maximum(floor[slack], np.minimum(risks[slack],
                                                         0.5 * (risks[slack] + np.asarray(charges, dtype=float)[slack])))
    count = int(np.count_nonzero(binding))
    if count == 0:
        return updated
    if budget <= 0.0:
        updated[binding] = floor[binding]
        return updated
    target = min(budget / count, MAX_PAIR_RISK)
    charged = np.clip(np.asarray(charges, dtype=float)[binding], 1e-300, MAX_PAIR_RISK)
    z = -ndtri(np.clip(risks[binding], 1e-300, MAX_PAIR_RISK))
    z_new = z - REALLOCATION_GAIN * (-ndtri(charged) + ndtri(target))
    updated[binding] = np.clip(ndtr(-z_new), floor[binding], MAX_PAIR_RISK)
    return updated
