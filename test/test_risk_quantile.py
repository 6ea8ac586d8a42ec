"""Standard normal quantile Φ⁻¹ and the chance-constraint back-off Φ⁻¹(1 − a)."""

import math

import numpy as np
import pytest
from scipy.stats import norm

from riskbound.risk.quantile import chance_constraint_backoff, standard_normal_quantile

# Percentage points of the standard normal distribution to four decimals, as printed in standard
# normal tables. Source: standard normal table, values from memory (the same figures appear in the
# normal-probability tables of Handbook of Mathematical Functions (1964), ch. 26; table number not
# checked against the page).
PRINTED_TABLE = [
    (0.50, 0.0000),
    (0.75, 0.6745),
    (0.90, 1.2816),
    (0.95, 1.6449),
    (0.975, 1.9600),
    (0.99, 2.3263),
    (0.995, 2.5758),
    (0.999, 3.0902),
    (0.9995, 3.2905),
]


@pytest.mark.parametrize("probability, printed", PRINTED_TABLE)
def test_quantile_matches_printed_table(probability, printed):
    # Printed to four decimals, so the table itself is only good to half a unit in the last place.
    assert standard_normal_quantile(probability) == pytest.approx(printed, abs=1e-4)


@pytest.mark.parametrize("probability, printed", PRINTED_TABLE)
def test_lower_tail_is_the_mirror_image(probability, printed):
    # Φ⁻¹(1 − p) = −Φ⁻¹(p): symmetry of the normal density (common practice, no source).
    assert standard_normal_quantile(1.0 - probability) == pytest.approx(-printed, abs=1e-4)


def test_quantile_matches_scipy_on_a_grid():
    # Reference: scipy.stats.norm.ppf, an independent implementation path.
    grid = np.concatenate([np.logspace(-12, -1, 40), np.linspace(0.01, 0.99, 197), 1.0 - np.logspace(-1, -9, 30)])
    ours = standard_normal_quantile(grid)
    reference = norm.ppf(grid)
    assert ours.shape == grid.shape
    np.testing.assert_allclose(ours, reference, rtol=1e-12, atol=1e-12)


def test_quantile_inverts_the_cdf():
    # Φ(Φ⁻¹(p)) = p with Φ from scipy.stats.norm.cdf (definition of the quantile function).
    grid = np.linspace(1e-4, 1.0 - 1e-4, 501)
    np.testing.assert_allclose(norm.cdf(standard_normal_quantile(grid)), grid, rtol=1e-12, atol=1e-14)


def test_quantile_keeps_the_shape_of_its_argument():
    grid = np.linspace(0.1, 0.9, 12).reshape(3, 4)
    assert standard_normal_quantile(grid).shape == (3, 4)
    assert np.ndim(standard_normal_quantile(0.3)) == 0


@pytest.mark.parametrize("probability, shown", [(0.0, "0.0"), (1.0, "1.0"), (math.nan, "nan"), (1.5, "1.5"),
                                                (-0.2, "-0.2")])
def test_invalid_probability_is_rejected_with_its_value(probability, shown):
    with pytest.raises(ValueError) as caught:
        standard_normal_quantile(probability)
    message = str(caught.value)
    assert "probability" in message
    assert f"={shown} " in message


def test_one_bad_element_in_an_array_is_named():
    with pytest.raises(ValueError, match=r"probability=1\.5 "):
        standard_normal_quantile([0.2, 0.5, 1.5, 0.7])


@pytest.mark.parametrize("risk", [1e-10, 1e-6, 4e-5, 1e-4, 0.001, 0.01, 0.05, 0.1, 0.2, 0.49])
def test_backoff_is_the_upper_quantile(risk):
    # Reference: scipy.stats.norm.isf(a) = Φ⁻¹(1 − a), computed by scipy without forming 1 − a.
    assert chance_constraint_backoff(risk) == pytest.approx(norm.isf(risk), rel=1e-12)


def test_backoff_table_values():
    # Same printed table as above: a = 0.05 → 1.6449, a = 0.01 → 2.3263, a = 0.001 → 3.0902.
    np.testing.assert_allclose(chance_constraint_backoff([0.05, 0.01, 0.001]), [1.6449, 2.3263, 3.0902], atol=1e-4)


def test_backoff_grows_as_risk_shrinks():
    risks = np.logspace(-8, np.log10(0.49), 60)
    backoff = chance_constraint_backoff(risks)
    assert np.all(backoff > 0.0)
    assert np.all(np.diff(backoff) < 0.0)


@pytest.mark.parametrize("risk, shown", [(0.0, "0.0"), (0.5, "0.5"), (0.7, "0.7"), (math.nan, "nan"),
                                         (-0.01, "-0.01")])
def test_backoff_rejects_risk_outside_open_interval(risk, shown):
    # A risk of 0.5 or more would let the nominal position sit on or inside the box.
    with pytest.raises(ValueError, match=rf"risk={shown} .*\(0, 0\.5\)"):
        chance_constraint_backoff(risk)
