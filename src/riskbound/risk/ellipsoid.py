"""Minimum-volume enclosing ellipsoid of a box, and its quadratic form.

For a box centred at the origin with half-extents h₁…hₙ along its own axes, the minimum-volume
enclosing (Löwner–John) ellipsoid is centred on the box with the same axes and semi-axes √n·hᵢ: by
symmetry the optimal ellipsoid is axis-aligned and centred, and maximising Π aᵢ subject to the corner
condition Σ hᵢ²/aᵢ² = 1 gives hᵢ²/aᵢ² = 1/n for every i.

"Outside the ellipsoid" is the single smooth constraint (p − o)ᵀ A (p − o) ≥ 1 with
A = R diag(1/aᵢ²) Rᵀ, R the rotation of the box axes into the world frame.
"""

import numpy as np


def box_enclosing_semi_axes(half_extents):
    """Return the semi-axes √n·hᵢ (…, n) of the minimum-volume ellipsoid enclosing the box."""
    h = np.asarray(half_extents, dtype=float)
    return np.sqrt(h.shape[-1]) * h


def ellipse_shape_matrix(semi_axes, heading):
    """Return A (…, 2, 2) such that the planar ellipse is {d : dᵀ A d ≤ 1}.

    semi_axes: (…, 2) semi-axis along the heading, then across it [m]
    heading: (…) orientation of the first axis [rad]
    """
    semi_axes = np.asarray(semi_axes, dtype=float)
    if np.any(semi_axes <= 0.0):
        raise ValueError("semi_axes must be positive")
    c, s = np.cos(heading), np.sin(heading)
    inv_sq = 1.0 / semi_axes**2
    a_along, a_across = inv_sq[..., 0], inv_sq[..., 1]
    a11 = a_along * c * c + a_across * s * s
    a22 = a_along * s * s + a_across * c * c
    a12 = (a_along - a_across) * c * s
    return np.stack([np.stack([a11, a12], axis=-1), np.stack([a12, a22], axis=-1)], axis=-2)


def ellipse_volume(semi_axes):
    """Return the area (n = 2) or volume (n = 3) of an ellipsoid with the given semi-axes."""
    a = np.asarray(semi_axes, dtype=float)
    n = a.shape[-1]
    unit_ball = {1: 2.0, 2: np.pi, 3: 4.0 * np.pi / 3.0}[n]
    return unit_ball * np.prod(a, axis=-1)
