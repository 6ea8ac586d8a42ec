"""Chi-square gates, Mahalanobis distances and confidence ellipses of Gaussian position estimates.

A detection z is inside the gate of a track with predicted measurement ẑ and innovation
covariance S when its squared Mahalanobis distance
    d² = (z − ẑ)ᵀ S⁻¹ (z − ẑ)
is at most γ = F⁻¹_χ²(m)(P_G), the P_G quantile of the chi-square distribution with m degrees of
freedom (m = measurement dimension): the true detection falls inside with probability P_G.

Gating is done without forming all track × detection pairs: the gate ellipse lies inside the
circle of radius sqrt(γ λ_max(S)), so only detections within that distance in x (found by a
sorted sweep) are candidates; d² is computed for those alone.
"""

import numpy as np
from scipy.stats import chi2


def gate_threshold(probability, dof=2):
    """γ with P(χ²_dof ≤ γ) = probability."""
    p = float(probability)
    if not (0.0 < p < 1.0):
        raise ValueError(f"probability={probability!r} is outside the open interval (0, 1)")
    if int(dof) != dof or dof < 1:
        raise ValueError(f"dof={dof!r} must be a positive integer")
    return float(chi2.ppf(p, int(dof)))


def mahalanobis_squared(y, S):
    """d² = yᵀ S⁻¹ y for residuals y (…, 2) and 2×2 covariances S (…, 2, 2) (closed form)."""
    det = S[..., 0, 0] * S[..., 1, 1] - S[..., 0, 1] * S[..., 1, 0]
    return (S[..., 1, 1] * y[..., 0] ** 2 + S[..., 0, 0] * y[..., 1] ** 2
            - (S[..., 0, 1] + S[..., 1, 0]) * y[..., 0] * y[..., 1]) / det


def largest_eigenvalue(S):
    """λ_max of symmetric 2×2 matrices (…, 2, 2)."""
    half_trace = 0.5 * (S[..., 0, 0] + S[..., 1, 1])
    half_gap = 0.5 * (S[..., 0, 0] - S[..., 1, 1])
    return half_trace + np.sqrt(half_gap**2 + S[..., 0, 1] ** 2)


def gated_pairs(z_predicted, S, detections, gate):
    """All (track, detection) pairs inside the gate.

    z_predicted: (J, 2) predicted positions, S: (J, 2, 2) innovation covariances, detections:
    (D, 2). Returns (tracks (K,), detections (K,), d² (K,)) with d² ≤ gate.
    """
    if len(z_predicted) == 0 or len(detections) == 0:
        return np.zeros(0, dtype=np.intp), np.zeros(0, dtype=np.intp), np.zeros(0)
    radius = np.sqrt(gate * largest_eigenvalue(S))
    order = np.argsort(detections[:, 0], kind="stable")
    sorted_x = detections[order, 0]
    low = np.searchsorted(sorted_x, z_predicted[:, 0] - radius, side="left")
    high = np.searchsorted(sorted_x, z_predicted[:, 0] + radius, side="right")
    counts = high - low
    total = int(counts.sum())
    tracks = np.repeat(np.arange(len(z_predicted)), counts)
    # Position within each track's run of candidates, added to the run's start in `order`.
    starts = np.cumsum(counts) - counts
    columns = order[np.repeat(low - starts, counts) + np.arange(total)]
    d2 = mahalanobis_squared(detections[columns] - z_predicted[tracks], S[tracks])
    inside = d2 <= gate
    return tracks[inside], columns[inside], d2[inside]


def covariance_ellipses(covariances, probability):
    """Semi-axes and orientation of the `probability` confidence ellipses of 2×2 covariances.

    Returns (semi_major (…), semi_minor (…), angle (…) of the major axis from x [rad]);
    semi-axes are sqrt(γ λ) with λ the eigenvalues and γ the 2-dof chi-square quantile.
    """
    covariances = np.asarray(covariances, dtype=float)
    eigenvalues, eigenvectors = np.linalg.eigh(0.5 * (covariances + np.swapaxes(covariances, -1, -2)))
    scale = gate_threshold(probability, 2)
    eigenvalues = np.clip(eigenvalues, 0.0, None)
    major = eigenvectors[..., :, 1]
    return (np.sqrt(scale * eigenvalues[..., 1]), np.sqrt(scale * eigenvalues[..., 0]),
            np.arctan2(major[..., 1], major[..., 0]))
