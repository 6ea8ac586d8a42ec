"""The collision risk charged to a plan: what the planner certifies before it returns a plan.

The ellipse constraints are the mechanism that keeps a plan away from people; the charge is the
bound that is reported and checked. For a planned position p̂ (robot), a forecast obstacle centre ô,
both Gaussian, the relative position d = p − o ~ N(d̂, Σ), Σ = Σ_robot + Σ_obstacle, and an obstacle
box grown by the robot radius with half-extents hᵢ along the face normals nᵢ (i = 1, 2):

    P(d inside the box) = P(−h₁ < u₁ < h₁, −h₂ < u₂ < h₂),   uᵢ = nᵢ·d

the probability of a rectangle under the bivariate normal of (u₁, u₂), from four values of its
CDF in closed form (`_standard_bivariate_cdf`). That value is never taken above the single-slab
bound min_i [Φ((hᵢ − μᵢ)/σᵢ) − Φ((−hᵢ − μᵢ)/σᵢ)], which holds because the
box is the intersection of the two slabs and each uᵢ is a scalar Gaussian (a linear form of a
Gaussian vector is Gaussian; common practice, no source). The robot disc touches the obstacle's
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
from scipy.special import ndtr, owens_t

from riskbound.risk.box import face_normals

# Below this standard deviation [m] a Gaussian is treated as a point (its probability is 0 or 1).
_SIGMA_FLOOR_M = 1e-9
# Pairs whose single-slab bound is below this keep it: far below any risk budget, not worth refining.
_REFINE_ABOVE = 1e-12


def box_risk(relative_mean, relative_covariance, heading, grown_half_extents):
    """P(d inside the grown box) for each pair (the rectangle probability, see the module docstring), shape (…).

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
    frame_cov = np.einsum("...ic,...cd,...jd->...ij", normals, cov, normals)  # Σ in the box frame
    sigma = np.sqrt(np.maximum(np.stack([frame_cov[..., 0, 0], frame_cov[..., 1, 1]], axis=-1), 0.0))
    point = sigma < _SIGMA_FLOOR_M
    safe_sigma = np.where(point, 1.0, sigma)
    slab = ndtr((half - mean) / safe_sigma) - ndtr((-half - mean) / safe_sigma)
    slab = np.where(point, (np.abs(mean) < half).astype(float), slab)
    bound = np.min(slab, axis=-1)
    # The closed form costs a few special-function calls: spend them where the bound is not
    # already negligible (and the covariance not degenerate).
    refine = (bound > _REFINE_ABOVE) & ~np.any(point, axis=-1)
    if np.any(refine):
        shape = bound.shape
        bound = np.array(bound, dtype=float)
        mean, half = np.broadcast_to(mean, shape + (2,)), np.broadcast_to(half, shape + (2,))
        frame_cov = np.broadcast_to(frame_cov, shape + (2, 2))
        bound[refine] = np.minimum(bound[refine], _rectangle_probability(
            mean[refine], frame_cov[refine], half[refine], np.broadcast_to(safe_sigma, shape + (2,))[refine]))
    return bound


def _rectangle_probability(mean, frame_cov, half, sigma):
    """P(|u₁| < h₁, |u₂| < h₂) for u ~ N(mean, frame_cov): four values of the bivariate normal CDF; shape (…)."""
    rho = np.clip(frame_cov[..., 0, 1] / (sigma[..., 0] * sigma[..., 1]), -1.0 + 1e-12, 1.0 - 1e-12)
    lower = (-half - mean) / sigma
    upper = (half - mean) / sigma
    corners = (_standard_bivariate_cdf(upper[..., 0], upper[..., 1], rho)
               - _standard_bivariate_cdf(lower[..., 0], upper[..., 1], rho)
               - _standard_bivariate_cdf(upper[..., 0], lower[..., 1], rho)
               + _standard_bivariate_cdf(lower[..., 0], lower[..., 1], rho))
    return np.clip(corners, 0.0, 1.0)


def _standard_bivariate_cdf(h, k, rho):
    """P(X < h, Y < k) for standard normals with correlation ρ, in closed form through the T-function
    T(h, a) = (1/2π) ∫₀ᵃ exp(−h²(1 + x²)/2)/(1 + x²) dx (scipy.special.owens_t):

        Φ₂(h, k; ρ) = ½Φ(h) + ½Φ(k) − T(h, a_h) − T(k, a_k) − β,
        a_h = (k − ρh)/(h√(1 − ρ²)),  a_k = (h − ρk)/(k√(1 − ρ²)),
        β = 0 if hk > 0 or (hk = 0 and h + k ≥ 0), else ½

    (a classical identity of the bivariate normal; value from memory, checked in the tests against
    scipy.stats.multivariate_normal)."""
    h = np.where(h == 0.0, 1e-300, h)
    k = np.where(k == 0.0, 1e-300, k)
    root = np.sqrt(1.0 - rho**2)
    a_h = (k - rho * h) / (h * root)
    a_k = (h - rho * k) / (k * root)
    beta = np.where(h * k > 0.0, 0.0, 0.5)
    return 0.5 * ndtr(h) + 0.5 * ndtr(k) - owens_t(h, a_h) - owens_t(k, a_k) - beta


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
