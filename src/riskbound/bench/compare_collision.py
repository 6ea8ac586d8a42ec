"""Empirical collision probability of a plan: the figure both suites of `riskbound bench compare`
report.

Empirical collision probability of a plan: Monte Carlo over the forecast (each obstacle and step
drawn from its Gaussian) and the robot's position covariance propagated along the plan, counting
a sample as a collision when the relative position lies in the obstacle box grown by the robot
radius at ANY step (the event whose probability the joint risk level α bounds). Steps are drawn
independently, which makes the union no smaller than for the positively correlated errors of real
motion; Boole's inequality bounds it either way.
"""

import numpy as np

from riskbound.motion.covariance import propagate_along_trajectory
from riskbound.motion.forecast import ObstacleForecast


def _sqrt_psd(covariance):
    """Symmetric square roots (…, 2, 2) of PSD 2×2 matrices (Cholesky fails on singular ones)."""
    values, vectors = np.linalg.eigh(covariance)
    return np.einsum("...ij,...j,...kj->...ik", vectors, np.sqrt(np.clip(values, 0.0, None)), vectors)


def plan_collision_probability(states, inputs, P0, forecast, settings, model, rng, samples):
    """Empirical P(any step of the plan is inside any grown obstacle box), see the module docstring."""
    N = settings.horizon_steps
    if forecast.track_count == 0:
        return 0.0
    robot_cov = propagate_along_trajectory(model, states, inputs, settings.step_s, P0,
                                           settings.robot_accel_noise, settings.robot_turn_noise)[1:, 0:2, 0:2]
    planned = states[1:, 0:2]  # (N, 2)
    grown = forecast.half_extents + settings.robot_radius_m  # (J, 2)
    spread = np.sqrt(np.trace(forecast.covariances, axis1=-2, axis2=-1).max(axis=1)
                     + np.trace(robot_cov, axis1=-2, axis2=-1).max())
    distance = np.linalg.norm(forecast.positions - planned[None], axis=-1).min(axis=1)
    # Farther than 8 standard deviations beyond the box corner: probability below 1e-14, skip.
    near = np.flatnonzero(distance < np.linalg.norm(grown, axis=-1) + 8.0 * spread)
    if len(near) == 0:
        return 0.0
    covariance = forecast.covariances[near] + robot_cov[None]  # relative position covariance
    root = _sqrt_psd(covariance)  # (J, N, 2, 2)
    z = rng.standard_normal((samples, len(near), N, 2))
    relative = (planned[None, None] - forecast.positions[near][None]) + np.einsum("jkab,sjkb->sjka", root, z)
    c, s = np.cos(forecast.headings[near]), np.sin(forecast.headings[near])
    along = relative[..., 0] * c + relative[..., 1] * s
    across = -relative[..., 0] * s + relative[..., 1] * c
    inside = (np.abs(along) < grown[near, None, 0]) & (np.abs(across) < grown[near, None, 1])
    return float(np.mean(inside.any(axis=(1, 2))))


def significantly_above(probabilities, samples, alpha):
    """How many plans' collision frequencies (each from `samples` draws) are significantly above α:
    the one-sided 95 % Clopper–Pearson lower bound (riskbound.bench.risk.lower_confidence) above it.
    Point estimates of plans planned close to α exceed it by sampling noise alone."""
    from riskbound.bench.risk import lower_confidence
    return int(sum(lower_confidence(int(round(p * samples)), samples) > alpha for p in probabilities))


def considered_only(forecast, constraints):
    """The part of `forecast` a planner constrained this cycle (its obstacle slots in use)."""
    ids = set(int(i) for i in constraints.track_ids[: constraints.considered])
    keep = np.array([int(i) in ids for i in forecast.track_ids], dtype=bool)
    return ObstacleForecast(forecast.track_ids[keep], forecast.times, forecast.positions[keep],
                            forecast.headings[keep], forecast.covariances[keep], forecast.half_extents[keep])

