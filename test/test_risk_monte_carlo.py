"""Monte Carlo check of the whole risk chain: a nominal position on the ellipse keeps the collision risk ≤ α.

Collision means the relative position d = p − o falls inside the TRUE obstacle box grown by the
robot radius. d ~ N(d̂, Σ) is sampled with a fixed seed; the empirical collision frequency must not
exceed α by more than a binomial 3-sigma tolerance, 3·√(α(1 − α)/n) (common practice, no source).
"""

import math

import numpy as np
import pytest

from riskbound.risk.box import inflated_half_extents
from riskbound.risk.ellipsoid import box_enclosing_semi_axes, ellipse_shape_matrix

SAMPLES = 20_000
CASES_PER_RISK = 25
# Angles (in the ellipse's own parametrisation) of the nominal positions tried on the boundary:
# the axis ends, the box corners (π/4 and its mirror images) and directions between them.
BOUNDARY_ANGLES = math.pi * np.array([0.0, 0.25, 0.5, 0.9, 1.25, 1.6, 1.85])


def random_case(rng):
    half = rng.uniform(0.1, 0.9, size=2)
    heading = rng.uniform(-math.pi, math.pi)
    radius = rng.uniform(0.0, 0.5)
    root_robot = rng.normal(scale=rng.uniform(0.02, 0.3), size=(2, 2))
    root_obstacle = rng.normal(scale=rng.uniform(0.02, 0.4), size=(2, 2))
    sigma = root_robot @ root_robot.T + root_obstacle @ root_obstacle.T + 1e-6 * np.eye(2)
    return half, heading, radius, sigma


def inside_true_box(d, half, heading, radius):
    along = d @ np.array([math.cos(heading), math.sin(heading)])
    across = d @ np.array([-math.sin(heading), math.cos(heading)])
    return (np.abs(along) < half[0] + radius) & (np.abs(across) < half[1] + radius)


def tolerance(risk, n):
    return 3.0 * math.sqrt(risk * (1.0 - risk) / n)


@pytest.mark.parametrize("risk", [0.01, 0.05, 0.1])
def test_collision_frequency_on_the_ellipse_boundary_is_at_most_the_risk(risk):
    rng = np.random.default_rng(20240 + int(risk * 1000))
    worst = 0.0
    for _ in range(CASES_PER_RISK):
        half, heading, radius, sigma = random_case(rng)
        semi_axes = box_enclosing_semi_axes(inflated_half_extents(half, heading, radius, sigma, risk))
        A = ellipse_shape_matrix(semi_axes, heading)
        c, s = math.cos(heading), math.sin(heading)
        frame = np.array([[c, -s], [s, c]])
        root = np.linalg.cholesky(sigma)
        noise = rng.standard_normal((SAMPLES, 2)) @ root.T
        for angle in BOUNDARY_ANGLES:
            nominal = frame @ (semi_axes * [math.cos(angle), math.sin(angle)])
            assert nominal @ A @ nominal == pytest.approx(1.0, rel=1e-12)
            frequency = np.mean(inside_true_box(nominal + noise, half, heading, radius))
            worst = max(worst, frequency)
            assert frequency <= risk + tolerance(risk, SAMPLES), (half, heading, radius, sigma, angle)
    # Guard against a sampler that never hits anything: the worst boundary point must see collisions
    # at a rate of the right order (the corners are far less risky than a single face).
    assert worst > 0.0


@pytest.mark.parametrize("risk", [0.01, 0.05, 0.1])
def test_sampler_resolves_the_one_face_risk(risk):
    # Sensitivity check of the same sampling: with the nominal on one face of the INFLATED box, the
    # probability of crossing that face's true position is exactly the face risk a. The crossings
    # pooled over all cases are Binomial(cases·n, a), so their frequency must sit within 3 sigma of
    # a on both sides.
    rng = np.random.default_rng(777 + int(risk * 1000))
    crossings = 0
    for _ in range(CASES_PER_RISK):
        half, heading, radius, sigma = random_case(rng)
        inflated = inflated_half_extents(half, heading, radius, sigma, risk)
        normal = np.array([math.cos(heading), math.sin(heading)])
        nominal = inflated[0] * normal
        d = nominal + rng.standard_normal((SAMPLES, 2)) @ np.linalg.cholesky(sigma).T
        crossings += np.count_nonzero(d @ normal < half[0] + radius)
    pooled = CASES_PER_RISK * SAMPLES
    assert abs(crossings / pooled - risk) <= tolerance(risk, pooled)


def test_without_the_backoff_the_check_would_fail():
    # The test above can fail: a nominal on the TRUE grown face (no back-off) collides about half the
    # time, far above any α in (0, 0.5) we allow.
    rng = np.random.default_rng(99)
    half, heading, radius, sigma = np.array([0.4, 0.3]), 0.2, 0.3, np.diag([0.04, 0.01])
    normal = np.array([math.cos(heading), math.sin(heading)])
    nominal = (half[0] + radius) * normal
    d = nominal + rng.standard_normal((SAMPLES, 2)) @ np.linalg.cholesky(sigma).T
    assert np.mean(inside_true_box(d, half, heading, radius)) > 0.1 + tolerance(0.1, SAMPLES)
