"""Deterministic equivalent of the chance constraints of an oriented box obstacle.

An obstacle is a box with half-extents (half_length, half_width) along and across its heading ψ.
Growing it by the robot radius r (enclosing the Minkowski sum of box and robot disc by a box) gives
half-extents hᵢ = hᵢ⁰ + r. Face i has outward unit normal ±nᵢ with n₁ = (cos ψ, sin ψ),
n₂ = (−sin ψ, cos ψ). With the relative position d = p − o Gaussian, d ~ N(d̂, Σ), Σ = Σ_robot + Σ_obstacle,
the chance constraint of one face

    P(nᵢ·d < hᵢ) ≤ a   ⇔   nᵢ·d̂ ≥ hᵢ + Φ⁻¹(1 − a) √(nᵢᵀ Σ nᵢ)

so every face moves out by Φ⁻¹(1 − a) standard deviations of d along its normal: the inflated box.
Being outside the inflated box means at least one face constraint holds, so the probability of
being inside the true box is at most a.
"""

import numpy as np

from riskbound.risk.quantile import chance_constraint_backoff


def face_normals(heading):
    """Return the unit normals (…, 2, 2) of the two face pairs: row 0 along the heading, row 1 across."""
    c, s = np.cos(heading), np.sin(heading)
    return np.stack([np.stack([c, s], axis=-1), np.stack([-s, c], axis=-1)], axis=-2)


def inflated_half_extents(half_extents, heading, robot_radius, covariance, risk):
    """Return the half-extents (…, 2) of the deterministic-equivalent box.

    half_extents: (…, 2) obstacle half-length and half-width [m]
    heading: (…) obstacle heading ψ [rad]
    robot_radius: robot disc radius r [m], added to both half-extents
    covariance: (…, 2, 2) relative position covariance Σ = Σ_robot + Σ_obstacle [m²]
    risk: (…) or scalar, the risk a of each face constraint, 0 < a < 0.5
    """
    half_extents = np.asarray(half_extents, dtype=float)
    covariance = np.asarray(covariance, dtype=float)
    if np.any(half_extents < 0.0):
        raise ValueError("half_extents must not be negative")
    if robot_radius < 0.0:
        raise ValueError(f"robot_radius={robot_radius!r} must not be negative")
    c, s = np.cos(heading), np.sin(heading)
    sxx, sxy, syy = covariance[..., 0, 0], covariance[..., 0, 1], covariance[..., 1, 1]
    # nᵀ Σ n for n₁ = (c, s) and n₂ = (−s, c), written out: einsum over (…, 2, 2) is far slower.
    variance_along_normal = np.stack([c * c * sxx + 2.0 * c * s * sxy + s * s * syy,
                                      s * s * sxx - 2.0 * c * s * sxy + c * c * syy], axis=-1)
    if np.any(variance_along_normal < -1e-12):
        raise ValueError("covariance is not positive semi-definite")
    sigma = np.sqrt(np.clip(variance_along_normal, 0.0, None))
    backoff = chance_constraint_backoff(risk)
    return half_extents + robot_radius + np.asarray(backoff)[..., None] * sigma
