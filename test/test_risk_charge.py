"""The risk charged to a plan (riskbound.risk.charge) against scipy's distributions and Monte Carlo."""

import math

import numpy as np
import pytest
from scipy.stats import chi2, multivariate_normal, norm

from riskbound.risk.charge import box_risk, distant_risk, halfplane_risk


def random_pair(rng):
    d = rng.normal(scale=1.0, size=2)
    root = rng.normal(scale=rng.uniform(0.05, 0.4), size=(2, 2))
    sigma = root @ root.T + 1e-4 * np.eye(2)
    heading = rng.uniform(-math.pi, math.pi)
    half = rng.uniform(0.2, 0.8, size=2)
    return d, sigma, heading, half


def test_box_risk_is_the_rectangle_probability_and_below_each_slab():
    # P(−h₁ < u₁ < h₁, −h₂ < u₂ < h₂) for the box-frame Gaussian u, against scipy.stats.multivariate_normal
    # (its CDF over the rectangle); and below P(−hᵢ < uᵢ < hᵢ) = Φ((hᵢ − μᵢ)/σᵢ) − Φ((−hᵢ − μᵢ)/σᵢ)
    # for each slab alone (a linear form of a Gaussian vector is Gaussian; common practice, no source).
    rng = np.random.default_rng(3)
    for _ in range(50):
        d, sigma, heading, half = random_pair(rng)
        normals = np.array([[math.cos(heading), math.sin(heading)], [-math.sin(heading), math.cos(heading)]])
        mean, frame = normals @ d, normals @ sigma @ normals.T
        expected = multivariate_normal(mean, frame).cdf(half, lower_limit=-half)
        got = box_risk(d, sigma, heading, half)
        assert got == pytest.approx(expected, rel=1e-5, abs=1e-9)
        for i in range(2):
            s = math.sqrt(frame[i, i])
            assert got <= norm.cdf((half[i] - mean[i]) / s) - norm.cdf((-half[i] - mean[i]) / s) + 1e-15


def test_box_risk_bounds_the_monte_carlo_frequency_of_being_inside_the_box():
    rng = np.random.default_rng(11)
    samples = 40_000
    for _ in range(20):
        d, sigma, heading, half = random_pair(rng)
        draws = rng.multivariate_normal(d, sigma, size=samples)
        along = draws @ np.array([math.cos(heading), math.sin(heading)])
        across = draws @ np.array([-math.sin(heading), math.cos(heading)])
        frequency = np.mean((np.abs(along) < half[0]) & (np.abs(across) < half[1]))
        bound = box_risk(d, sigma, heading, half)
        # Binomial 4-sigma allowance on the frequency (common practice, no source).
        assert frequency <= bound + 4.0 * math.sqrt(max(bound, 1e-6) * (1.0 - bound) / samples) + 1e-12


def test_distant_risk_is_the_two_degree_chi_square_tail():
    # P(χ²₂ ≥ x) = exp(−x/2) (chi-square survival function with two degrees of freedom, scipy.stats.chi2).
    rng = np.random.default_rng(5)
    for _ in range(20):
        d, sigma, _, half = random_pair(rng)
        d = d * 4.0
        radius = float(np.linalg.norm(half))
        gap = max(np.linalg.norm(d) - radius, 0.0)
        largest = np.linalg.eigvalsh(sigma).max()
        assert distant_risk(d, sigma, radius) == pytest.approx(chi2(2).sf(gap**2 / largest), rel=1e-10)
        # And it is an upper bound on the disc probability (Monte Carlo, 4-sigma allowance).
        draws = rng.multivariate_normal(d, sigma, size=20_000)
        frequency = np.mean(np.linalg.norm(draws, axis=1) < radius)
        bound = distant_risk(d, sigma, radius)
        assert frequency <= bound + 4.0 * math.sqrt(max(bound, 1e-6) / 20_000)


def test_halfplane_risk_is_exact_for_a_gaussian():
    # P(nᵀp < b) = Φ((b − nᵀp̂)/√(nᵀΣn)) for p ~ N(p̂, Σ) (linear form of a Gaussian, common practice,
    # no source), against scipy.stats.norm.
    rng = np.random.default_rng(8)
    for _ in range(20):
        p, sigma, heading, _ = random_pair(rng)
        n = np.array([math.cos(heading), math.sin(heading)])
        b = rng.normal()
        expected = norm.cdf((b - n @ p) / math.sqrt(n @ sigma @ n))
        assert halfplane_risk(p, sigma, n, b) == pytest.approx(expected, rel=1e-10, abs=1e-300)


def test_a_point_distribution_is_charged_zero_or_one():
    zero = np.zeros((2, 2))
    assert box_risk([0.1, 0.0], zero, 0.0, [0.5, 0.5]) == 1.0
    assert box_risk([0.9, 0.0], zero, 0.0, [0.5, 0.5]) == 0.0
    assert halfplane_risk([0.0, 0.0], zero, [1.0, 0.0], 0.5) == 1.0
