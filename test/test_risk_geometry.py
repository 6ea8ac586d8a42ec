"""Deterministic-equivalent box and its minimum-volume enclosing ellipse, against independent computations."""

import itertools
import math

import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.stats import norm

from riskbound.risk.box import inflated_half_extents
from riskbound.risk.ellipsoid import box_enclosing_semi_axes, ellipse_shape_matrix, ellipse_volume


def rotation(angle):
    c, s = math.cos(angle), math.sin(angle)
    return np.array([[c, -s], [s, c]])


def random_covariance(rng, scale=0.3):
    root = rng.normal(scale=scale, size=(2, 2))
    return root @ root.T + 1e-4 * np.eye(2)


# --- deterministic-equivalent box -----------------------------------------------------------------


def test_inflated_half_extent_matches_scipy_per_face():
    # Reference: hᵢ + r + Φ⁻¹(1 − a)·√(nᵢᵀΣnᵢ) with Φ⁻¹ from scipy.stats.norm.ppf and the face normals
    # built here from the heading (deterministic equivalent of a Gaussian half-plane constraint,
    # common practice, no source).
    rng = np.random.default_rng(7)
    for _ in range(200):
        half = rng.uniform(0.05, 1.5, size=2)
        heading = rng.uniform(-math.pi, math.pi)
        radius = rng.uniform(0.0, 0.6)
        sigma = random_covariance(rng)
        risk = rng.uniform(1e-5, 0.45)
        normals = [np.array([math.cos(heading), math.sin(heading)]),
                   np.array([-math.sin(heading), math.cos(heading)])]
        expected = [half[i] + radius + norm.ppf(1.0 - risk) * math.sqrt(n @ sigma @ n) for i, n in enumerate(normals)]
        got = inflated_half_extents(half, heading, radius, sigma, risk)
        np.testing.assert_allclose(got, expected, rtol=1e-10)


def test_inflated_half_extents_vectorised_over_obstacles_and_steps():
    rng = np.random.default_rng(3)
    J, N = 4, 6
    half = rng.uniform(0.1, 1.0, size=(J, 1, 2))
    heading = rng.uniform(-3, 3, size=(J, N))
    sigma = np.array([[random_covariance(rng) for _ in range(N)] for _ in range(J)])
    risk = 0.01
    got = inflated_half_extents(half, heading, 0.25, sigma, risk)
    assert got.shape == (J, N, 2)
    for j, k in itertools.product(range(J), range(N)):
        one = inflated_half_extents(half[j, 0], heading[j, k], 0.25, sigma[j, k], risk)
        np.testing.assert_allclose(got[j, k], one, rtol=1e-13)


def test_inflated_box_is_rotation_invariant():
    # Turning the obstacle and its covariance together by φ changes nothing in the obstacle's frame.
    rng = np.random.default_rng(11)
    for _ in range(50):
        half = rng.uniform(0.1, 1.0, size=2)
        heading = rng.uniform(-math.pi, math.pi)
        sigma = random_covariance(rng)
        phi = rng.uniform(-math.pi, math.pi)
        turned = rotation(phi) @ sigma @ rotation(phi).T
        np.testing.assert_allclose(inflated_half_extents(half, heading + phi, 0.3, turned, 0.05),
                                   inflated_half_extents(half, heading, 0.3, sigma, 0.05), rtol=1e-12)
        # Reversing the heading swaps the faces of each pair, which have the same half-extent.
        np.testing.assert_allclose(inflated_half_extents(half, heading + math.pi, 0.3, sigma, 0.05),
                                   inflated_half_extents(half, heading, 0.3, sigma, 0.05), rtol=1e-12)


def test_isotropic_covariance_inflates_every_face_by_the_same_amount():
    got = inflated_half_extents([1.0, 0.4], 0.7, 0.2, 0.09 * np.eye(2), 0.05)
    np.testing.assert_allclose(got - [1.2, 0.6], 0.3 * norm.ppf(0.95), rtol=1e-12)


def test_zero_covariance_gives_the_grown_footprint():
    np.testing.assert_allclose(inflated_half_extents([0.3, 0.2], 1.1, 0.25, np.zeros((2, 2)), 0.01), [0.55, 0.45])


@pytest.mark.parametrize("risk", [0.001, 0.01, 0.05, 0.2])
def test_nominal_on_inflated_face_has_exactly_the_allowed_violation_probability(risk):
    # One-dimensional check with scipy.stats.norm.cdf: the nominal sits on the inflated face, so
    # n·d ~ N(H, nᵀΣn) and P(n·d < h + r) must equal the face's risk a (common practice, no source).
    rng = np.random.default_rng(5)
    half, heading, radius = np.array([0.6, 0.3]), 0.4, 0.3
    sigma = random_covariance(rng)
    inflated = inflated_half_extents(half, heading, radius, sigma, risk)
    for i, n in enumerate([np.array([math.cos(heading), math.sin(heading)]),
                           np.array([-math.sin(heading), math.cos(heading)])]):
        probability = norm.cdf(half[i] + radius, loc=inflated[i], scale=math.sqrt(n @ sigma @ n))
        assert probability == pytest.approx(risk, rel=1e-9)


@pytest.mark.parametrize("kwargs, fragment", [
    ({"half_extents": [-0.1, 0.2]}, "half_extents"),
    ({"robot_radius": -0.1}, "robot_radius"),
    ({"risk": 0.5}, "risk"),
    ({"risk": 0.0}, "risk"),
    ({"covariance": np.array([[-1.0, 0.0], [0.0, 0.1]])}, "semi-definite"),
])
def test_invalid_box_inputs_are_rejected(kwargs, fragment):
    args = {"half_extents": [0.3, 0.2], "heading": 0.0, "robot_radius": 0.3, "covariance": 0.01 * np.eye(2),
            "risk": 0.05}
    args.update(kwargs)
    with pytest.raises(ValueError, match=fragment):
        inflated_half_extents(**args)


# --- enclosing ellipse: closed form ---------------------------------------------------------------


def box_corners(half_extents, heading=0.0):
    h = np.asarray(half_extents, dtype=float)
    signs = np.array(list(itertools.product([-1.0, 1.0], repeat=len(h))))
    corners = signs * h
    if len(h) == 2:
        corners = corners @ rotation(heading).T
    return corners


def test_box_corners_lie_on_the_ellipse_boundary():
    rng = np.random.default_rng(2)
    for _ in range(100):
        half = rng.uniform(0.05, 3.0, size=2)
        heading = rng.uniform(-math.pi, math.pi)
        A = ellipse_shape_matrix(box_enclosing_semi_axes(half), heading)
        corners = box_corners(half, heading)
        np.testing.assert_allclose(np.einsum("ci,ij,cj->c", corners, A, corners), 1.0, rtol=1e-12)


def test_shape_matrix_matches_rotated_diagonal_form():
    # A = R diag(1/a₁², 1/a₂²) Rᵀ (quadratic form of a rotated ellipse; common practice, no source).
    rng = np.random.default_rng(4)
    axes = rng.uniform(0.1, 2.0, size=(30, 2))
    headings = rng.uniform(-math.pi, math.pi, size=30)
    A = ellipse_shape_matrix(axes, headings)
    for a, psi, got in zip(axes, headings, A):
        R = rotation(psi)
        np.testing.assert_allclose(got, R @ np.diag(1.0 / a**2) @ R.T, rtol=1e-12, atol=1e-14)


def test_ellipse_contains_the_whole_box():
    rng = np.random.default_rng(8)
    half, heading = np.array([0.9, 0.35]), 0.6
    A = ellipse_shape_matrix(box_enclosing_semi_axes(half), heading)
    inside = rng.uniform(-1.0, 1.0, size=(5000, 2)) * half @ rotation(heading).T
    assert np.all(np.einsum("ci,ij,cj->c", inside, A, inside) <= 1.0 + 1e-12)


def test_ellipse_volume_formula():
    # Area πab and volume 4/3·πabc (common practice, no source).
    assert ellipse_volume([2.0, 0.5]) == pytest.approx(math.pi)
    assert ellipse_volume([1.0, 2.0, 3.0]) == pytest.approx(8.0 * math.pi)


# --- enclosing ellipse: independent numerical minimum ---------------------------------------------


def minimum_volume_ellipsoid_by_coordinate_ascent(points, tolerance=1e-8, max_iterations=20_000):
    """Classic barycentric coordinate-ascent iteration for the minimum-volume enclosing ellipsoid.

    The points are lifted to qᵢ = (xᵢ, 1) and carry weights u (Σu = 1). With X = Q diag(u) Qᵀ and
    Mᵢ = qᵢᵀ X⁻¹ qᵢ, each step moves weight towards the point of largest Mᵢ, or away from the
    weighted point of smallest Mᵢ when that gains more (so interior points lose their weight in
    finitely many steps). Optimality: max Mᵢ = d + 1. The ellipsoid of u is
    {x : (x − c)ᵀ A (x − c) ≤ 1} with c = P u, A = (P diag(u) Pᵀ − c cᵀ)⁻¹ / d; stopping at
    max Mᵢ ≤ (d + 1)(1 + tolerance) brackets the minimum volume within a factor (1 + tolerance)^(d/2).
    Returns the centre, A and the enclosing factor max Mᵢ / (d + 1).
    """
    P = np.asarray(points, dtype=float).T
    d, count = P.shape
    Q = np.vstack([P, np.ones(count)])
    u = np.full(count, 1.0 / count)
    for _ in range(max_iterations):
        X = (Q * u) @ Q.T
        M = np.einsum("ij,ij->j", Q, np.linalg.solve(X, Q))
        up = int(np.argmax(M))
        if M[up] <= (d + 1.0) * (1.0 + tolerance):
            break
        weighted = np.flatnonzero(u > 0.0)
        down = weighted[np.argmin(M[weighted])]
        if M[up] - (d + 1.0) >= (d + 1.0) - M[down]:
            j, step = up, (M[up] - d - 1.0) / ((d + 1.0) * (M[up] - 1.0))
        else:
            j = down
            step = max((M[down] - d - 1.0) / ((d + 1.0) * (M[down] - 1.0)), -u[down] / (1.0 - u[down]))
        u = (1.0 - step) * u
        u[j] += step
        u[u < 1e-15] = 0.0
    else:
        raise RuntimeError("coordinate ascent did not converge")
    centre = P @ u
    A = np.linalg.inv((P * u) @ P.T - np.outer(centre, centre)) / d
    return centre, A, M[up] / (d + 1.0)


def minimum_volume_ellipsoid_by_log_det(points):
    """Minimise −log det L over lower-triangular L and centre c with ‖L(xᵢ − c)‖ ≤ 1 (scipy SLSQP).

    The ellipsoid {x : ‖L(x − c)‖ ≤ 1} has volume (unit ball) / det L, so this is the minimum volume.
    """
    points = np.asarray(points, dtype=float)
    d = points.shape[1]
    rows, cols = np.tril_indices(d)
    diagonal = rows == cols

    def unpack(z):
        L = np.zeros((d, d))
        L[rows, cols] = z[: len(rows)]
        return L, z[len(rows):]

    def objective(z):
        return -np.sum(np.log(z[: len(rows)][diagonal]))

    def inside(z):
        L, c = unpack(z)
        return 1.0 - np.sum(((points - c) @ L.T) ** 2, axis=1)

    scale = 1.0 / np.max(np.abs(points))
    start = np.concatenate([np.where(diagonal, 0.5 * scale, 0.0), points.mean(axis=0) + 0.01])
    bounds = [(1e-9, None) if on_diagonal else (None, None) for on_diagonal in diagonal] + [(None, None)] * d
    solution = minimize(objective, start, method="SLSQP", bounds=bounds,
                        constraints=[{"type": "ineq", "fun": inside}], options={"ftol": 1e-14, "maxiter": 2000})
    assert solution.success, solution.message
    L, centre = unpack(solution.x)
    return centre, L.T @ L


def ellipsoid_volume_of_shape(A):
    d = A.shape[0]
    unit_ball = {2: math.pi, 3: 4.0 * math.pi / 3.0}[d]
    return unit_ball / math.sqrt(np.linalg.det(A))


def points_of_box(half_extents, heading, rng, interior=40):
    """Corners plus points strictly inside, so the numerical methods must find the corners themselves."""
    half = np.asarray(half_extents, dtype=float)
    corners = box_corners(half)
    extra = rng.uniform(-0.95, 0.95, size=(interior, len(half))) * half
    points = np.vstack([extra, corners])
    if len(half) == 2:
        points = points @ rotation(heading).T
    return points


@pytest.mark.parametrize("half, heading", [([1.0, 1.0], 0.0), ([0.8, 0.3], 0.5), ([2.5, 0.2], -2.0),
                                           ([0.45, 0.6], 1.2)])
def test_closed_form_area_is_the_minimum_found_by_coordinate_ascent(half, heading):
    rng = np.random.default_rng(12)
    centre, A, factor = minimum_volume_ellipsoid_by_coordinate_ascent(points_of_box(half, heading, rng))
    closed_form = ellipse_volume(box_enclosing_semi_axes(half))
    assert closed_form == pytest.approx(ellipsoid_volume_of_shape(A), rel=1e-3)
    # The iterate's ellipse, grown by the factor that makes it enclose every point, brackets the minimum.
    lower, upper = ellipsoid_volume_of_shape(A), ellipsoid_volume_of_shape(A / factor)
    assert lower * (1 - 1e-12) <= closed_form <= upper * (1 + 1e-12)
    np.testing.assert_allclose(centre, 0.0, atol=1e-4)
    np.testing.assert_allclose(A, ellipse_shape_matrix(box_enclosing_semi_axes(half), heading),
                               rtol=1e-3, atol=1e-3 * np.max(A))


@pytest.mark.parametrize("half, heading", [([0.8, 0.3], 0.5), ([1.2, 1.1], 2.9)])
def test_closed_form_area_is_the_minimum_found_by_log_det_optimisation(half, heading):
    rng = np.random.default_rng(13)
    centre, A = minimum_volume_ellipsoid_by_log_det(points_of_box(half, heading, rng, interior=10))
    closed_form = ellipse_volume(box_enclosing_semi_axes(half))
    assert closed_form == pytest.approx(ellipsoid_volume_of_shape(A), rel=1e-3)
    np.testing.assert_allclose(centre, 0.0, atol=1e-3)


def test_closed_form_generalises_to_three_dimensions():
    # Semi-axes √3·hᵢ: every corner satisfies Σ hᵢ²/(3hᵢ²) = 1, and the volume is the minimum found
    # by both numerical methods.
    half = np.array([0.9, 0.4, 0.25])
    semi_axes = box_enclosing_semi_axes(half)
    np.testing.assert_allclose(semi_axes, math.sqrt(3.0) * half)
    corners = box_corners(half)
    np.testing.assert_allclose(np.sum((corners / semi_axes) ** 2, axis=1), 1.0, rtol=1e-12)
    closed_form = ellipse_volume(semi_axes)
    rng = np.random.default_rng(14)
    points = points_of_box(half, None, rng, interior=30)
    _, A_ascent, _ = minimum_volume_ellipsoid_by_coordinate_ascent(points)
    _, A_log_det = minimum_volume_ellipsoid_by_log_det(points)
    assert closed_form == pytest.approx(ellipsoid_volume_of_shape(A_ascent), rel=1e-3)
    assert closed_form == pytest.approx(ellipsoid_volume_of_shape(A_log_det), rel=1e-3)


def test_a_smaller_ellipse_misses_a_corner():
    # The closed form is tight: shrinking it by 1 % leaves corners outside.
    half, heading = np.array([0.7, 0.2]), 0.3
    A = ellipse_shape_matrix(0.99 * box_enclosing_semi_axes(half), heading)
    corners = box_corners(half, heading)
    assert np.all(np.einsum("ci,ij,cj->c", corners, A, corners) > 1.0)
