"""The collision risk charged to a plan: what the planner certifies before it returns a plan.

The ellipse constraints are the mechanism that keeps a plan away from people; the charge is the
bound that is reported and checked. For a planned position p̂ (robot), a forecast obstacle centre ô,
both Gaussian, the relative position d = p − o ~ N(d̂, Σ), Σ = Σ_robot + Σ_obstacle, and an obstacle
box grown by the robot radius with half-extents hᵢ along the face normals nᵢ (i = 1, 2):

    P(d inside the box) ≤ min_i P(−hᵢ < nᵢ·d < hᵢ)
                        = min_i [Φ((hᵢ − nᵢ·d̂)/σᵢ) − Φ((−hᵢ − nᵢ·d̂)/σᵢ)],   σᵢ = √(nᵢᵀ Σ nᵢ)

since the box is the intersection of the two slabs and nᵢ·d is a scalar Gaussian (the linear-form
identity of the multivariate normal; e.g. Anderson, An Introduction to Multivariate Statistical
Analysis, 3rd ed., 2003, Theorem 2.4.4, value from memory). The robot disc touches the obstacle's
footprint only if d lies in the box grown by the radius, so this bounds a collision.

Over a plan, Boole's inequality adds the charges of every (obstacle, step) pair. Obstacles that
cannot come near the plan are charged with an isotropic bound instead of being left out: with
λ the largest eigenvalue of Σ and g the distance from d̂ to the disc enclosing the grown box,

    P(d inside the box) ≤ P(‖d − d̂‖ ≥ g) ≤ P(χ²₂ ≥ g²/λ) = exp(−g²/(2λ))

(the chi-square survival function with 2 degrees of freedom is exp(−x/2)).

A half-plane nᵀp ≥ b (a wall kept off by the static constraints) with p Gaussian is charged exactly:
P(nᵀp < b) = Φ((b − nᵀp̂)/√(nᵀ Σ_robot n)).
"""

import numpy as np
from scipy.special import ndtr

from riskbound.risk.box import face_normals

# Below this standard deviation [m] a Gaussian is treated as a point (its probability is 0 or 1).
_SIGMA_FLOOR_M = 1e-9


def box_risk(relative_mean, relative_covariance, heading, grown_half_extents):
    """Upper bound on P(d inside the grown box) for each pair, shape (…).

    relative_mean: (…, 2) d̂ = p̂ − ô [m]
    relative_covariance: (…, 2, 2) Σ = Σ_robot + Σ_obstacle [m²]
    heading: (…) box heading [rad]
    grown_half_extents: (…, 2) obstacle half-extents plus the robot radius [m]
    """
    d = np.asarray(relative_mean, dtype=float)
    cov = np.asarray(relative_covariance, dtype=float)
    half = np.asarray(grown_half_extents, dtype=float)
    normals = face_normals(np.asarray(heading, dtype=float))  # (…, 2, 2): rows n₁, n₂
    mean = np.einsum("...ic,...c->...i", normals, d)
    variance = np.einsum("...ic,...cd,...id->...i", normals, cov, normals)
    sigma = np.sqrt(np.maximum(variance, 0.0))
    point = sigma < _SIGMA_FLOOR_M
    sigma = np.where(point, 1.0, sigma)
    slab = ndtr((half - mean) / sigma) - ndtr((-half - mean) / sigma)
    slab = np.where(point, (np.abs(mean) < half).astype(float), slab)
    return np.min(slab, axis=-1)


def distant_risk(relative_mean, relative_covariance, enclosing_radius):
    """Isotropic chi-square bound exp(−g²/(2λ)) on P(d inside a disc of `enclosing_radius`), shape (…).

    g = max(‖d̂‖ − enclosing_radius, 0); the bound is 1 when d̂ is inside the disc.
    """
    d = np.asarray(relative_mean, dtype=float)
    cov = np.asarray(relative_covariance, dtype=float)
    gap = np.maximum(np.linalg.norm(d, axis=-1) - np.asarray(enclosing_radius, dtype=float), 0.0)
    a, b, c = cov[..., 0, 0], cov[..., 0, 1], cov[..., 1, 1]
    largest = 0.5 * (a + c) + np.sqrt(0.25 * (a - c) ** 2 + b * b)
    largest = np.maximum(largest, _SIGMA_FLOOR_M**2)
    return np.exp(-(gap**2) / (2.0 * largest))


def halfplane_risk(positions, covariances, normals, offsets):
    """P(nᵀp < b) for p ~ N(p̂, Σ), exact; shape (…).

    positions: (…, 2) p̂ [m]; covariances: (…, 2, 2) Σ [m²]; normals: (…, 2) unit n; offsets: (…) b [m]
    """
    p = np.asarray(positions, dtype=float)
    n = np.asarray(normals, dtype=float)
    margin = np.einsum("...c,...c->...", n, p) - np.asarray(offsets, dtype=float)
    sigma = np.sqrt(np.maximum(np.einsum("...c,...cd,...d->...", n, np.asarray(covariances, dtype=float), n), 0.0))
    point = sigma < _SIGMA_FLOOR_M
    return np.where(point, (margin < 0.0).astype(float), ndtr(-margin / np.where(point, 1.0, sigma)))
