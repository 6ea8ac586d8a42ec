"""Gates, association and lifecycle of the tracker against tables, closed forms and exhaustive search."""

import itertools

import numpy as np
import pytest
from scipy.stats import chi2, norm

from riskbound.tracking.association import associate
from riskbound.tracking.gating import covariance_ellipses, gate_threshold, gated_pairs
from riskbound.tracking.lifecycle import TrackLifecycle


@pytest.mark.parametrize("probability, dof, printed", [
    # Reference: critical values of the chi-square distribution, NIST/SEMATECH e-Handbook of
    # Statistical Methods, §1.3.6.7.4 (values from memory; they are the usual printed table).
    (0.95, 2, 5.991), (0.99, 2, 9.210), (0.95, 1, 3.841), (0.99, 1, 6.635), (0.95, 3, 7.815),
    (0.99, 3, 11.345), (0.90, 2, 4.605),
])
def test_gate_threshold_matches_the_printed_chi_square_table(probability, dof, printed):
    assert gate_threshold(probability, dof) == pytest.approx(printed, abs=6e-4)
    assert gate_threshold(probability, dof) == pytest.approx(chi2.ppf(probability, dof), rel=1e-12)


@pytest.mark.parametrize("probability", [0.5, 0.9, 0.95, 0.99, 0.999, 0.99999])
def test_two_dof_gate_matches_the_closed_form(probability):
    # Reference: chi-square with 2 degrees of freedom is exponential with mean 2, so its quantile
    # is −2 ln(1 − p) (a property of the distribution, independent of scipy's implementation).
    assert gate_threshold(probability, 2) == pytest.approx(-2.0 * np.log1p(-probability), rel=1e-10)


@pytest.mark.parametrize("bad", [0.0, 1.0, -0.1, 1.5, float("nan")])
def test_gate_threshold_rejects_probabilities_outside_zero_one(bad):
    with pytest.raises(ValueError, match="probability"):
        gate_threshold(bad)


def _random_problem(rng, tracks, detections, spread=3.0):
    z_pred = rng.uniform(-spread, spread, (tracks, 2))
    A = rng.normal(scale=0.4, size=(tracks, 2, 2))
    S = A @ np.swapaxes(A, 1, 2) + 0.02 * np.eye(2)
    z = rng.uniform(-spread, spread, (detections, 2))
    return z_pred, S, z


def test_gated_pairs_equal_a_dense_numpy_computation():
    # Reference: d² = yᵀ S⁻¹ y for every pair with numpy.linalg.solve (direct computation).
    rng = np.random.default_rng(7)
    for _ in range(20):
        z_pred, S, z = _random_problem(rng, rng.integers(0, 15), rng.integers(0, 15))
        gate = gate_threshold(0.99)
        tracks, detections, d2 = gated_pairs(z_pred, S, z, gate)
        expected = {}
        for j in range(len(z_pred)):
            for d in range(len(z)):
                y = z[d] - z_pred[j]
                value = y @ np.linalg.solve(S[j], y)
                if value <= gate:
                    expected[(j, d)] = value
        got = {(int(j), int(d)): v for j, d, v in zip(tracks, detections, d2)}
        assert got.keys() == expected.keys()
        for key, value in expected.items():
            assert got[key] == pytest.approx(value, rel=1e-9)


def test_gate_holds_the_true_detection_with_the_gate_probability():
    # Reference: definition of the gate (P(d² ≤ γ) = P_G for Gaussian innovations); the hit count
    # must lie in its binomial 99.9 % interval.
    rng = np.random.default_rng(8)
    trials, probability = 20000, 0.95
    S = np.array([[0.04, 0.015], [0.015, 0.02]])
    y = rng.multivariate_normal(np.zeros(2), S, trials)
    z_pred = np.zeros((1, 2))
    _, detections, _ = gated_pairs(z_pred, S[None], y, gate_threshold(probability))
    sigma = np.sqrt(trials * probability * (1 - probability))
    assert abs(len(detections) - trials * probability) <= norm.ppf(0.9995) * sigma


def test_covariance_ellipse_points_sit_on_the_gate():
    # Reference: the probability-p confidence ellipse is {y : yᵀ Σ⁻¹ y = χ²₂(p)} (definition).
    rng = np.random.default_rng(9)
    A = rng.normal(size=(5, 2, 2))
    cov = A @ np.swapaxes(A, 1, 2) + 0.01 * np.eye(2)
    major, minor, angle = covariance_ellipses(cov, 0.95)
    for j in range(5):
        phi = np.linspace(0, 2 * np.pi, 17)
        local = np.stack([major[j] * np.cos(phi), minor[j] * np.sin(phi)], axis=1)
        c, s = np.cos(angle[j]), np.sin(angle[j])
        points = local @ np.array([[c, s], [-s, c]])
        d2 = np.einsum("pi,ik,pk->p", points, np.linalg.inv(cov[j]), points)
        np.testing.assert_allclose(d2, chi2.ppf(0.95, 2), rtol=1e-9)
        assert major[j] >= minor[j]


def _exhaustive(cost, allowed):
    """Best partial one-to-one assignment by enumeration: most pairs, then least cost."""
    J, D = cost.shape
    best = (0, 0.0, ())
    for k in range(1, min(J, D) + 1):
        for rows in itertools.combinations(range(J), k):
            for cols in itertools.permutations(range(D), k):
                if all(allowed[r, c] for r, c in zip(rows, cols)):
                    total = sum(cost[r, c] for r, c in zip(rows, cols))
                    if (k, -total) > (best[0], -best[1]):
                        best = (k, total, tuple(zip(rows, cols)))
    return best


def test_association_equals_exhaustive_search():
    # Reference: enumeration of every partial assignment (common practice, no source).
    rng = np.random.default_rng(10)
    for _ in range(60):
        J, D = rng.integers(1, 6), rng.integers(1, 6)
        cost = rng.uniform(-2.0, 10.0, (J, D))
        allowed = rng.random((J, D)) < 0.5
        tracks, detections = np.nonzero(allowed)
        got_t, got_d = associate(tracks, detections, cost[tracks, detections], J, D)
        count, total, _ = _exhaustive(cost, allowed)
        assert len(got_t) == count
        assert len(set(got_t)) == len(got_t) and len(set(got_d)) == len(got_d)
        assert np.all(allowed[got_t, got_d])
        assert cost[got_t, got_d].sum() == pytest.approx(total, abs=1e-9)


def test_association_of_nothing_is_empty():
    tracks, detections = associate([], [], [], 3, 0)
    assert len(tracks) == len(detections) == 0


def test_confirmation_after_m_hits_in_n_scans():
    # M = 3 of N = 5, worked by hand: birth (hit), miss, hit, miss, hit → confirmed on scan 5.
    life = TrackLifecycle(3, 5, delete_after_s=10.0)
    life.add(1, 0.0)
    for k, hit in enumerate([False, True, False], start=1):
        life.record_scan([hit], 0.1 * k)
        assert not life.confirmed[0] and not life.failed()[0]
    life.record_scan([True], 0.4)
    assert life.confirmed[0]


def test_tentative_track_fails_when_the_window_ends_short_of_m_hits():
    life = TrackLifecycle(3, 5, delete_after_s=10.0)
    life.add(1, 0.0)
    for k, hit in enumerate([True, False, False], start=1):
        life.record_scan([hit], 0.1 * k)
        assert not life.failed()[0]
    life.record_scan([False], 0.4)
    assert life.failed()[0] and not life.confirmed[0]


def test_confirmed_track_is_stale_only_after_the_deletion_time():
    life = TrackLifecycle(1, 1, delete_after_s=0.5)
    life.add(1, 0.0)
    assert life.confirmed[0]
    for k in range(1, 11):
        life.record_scan([False], 0.1 * k)
        assert life.stale(0.1 * k)[0] == (0.1 * k > 0.5 + 1e-9)
        assert not life.failed()[0]


def test_late_hits_count_without_a_new_scan():
    life = TrackLifecycle(2, 3, delete_after_s=1.0)
    life.add(1, 1.0)
    life.record_scan([False], 1.1)
    life.record_late_hits([True], 1.05)
    assert life.confirmed[0]
    assert life.scans_seen[0] == 2
    assert life.last_hit_s[0] == pytest.approx(1.05)


def test_lifecycle_rejects_m_above_n():
    with pytest.raises(ValueError, match="confirm_hits"):
        TrackLifecycle(4, 3, 1.0)
