"""Rolling solve-time statistics against numpy.percentile.

Reference: numpy.percentile with method="linear" (numpy's default), which is definition 7 of
"Sample Quantiles in Statistical Packages", The American Statistician 50(4), 1996. Our class
implements that definition itself; numpy is the independent computation.
"""

import numpy as np
import pytest

from riskbound.supervision.statistics import SolveTimeStatistics


def test_percentiles_match_numpy_linear_over_a_rolling_window():
    rng = np.random.default_rng(4)
    solve_ms = rng.lognormal(mean=np.log(30.0), sigma=0.6, size=400)
    window = 50
    stats = SolveTimeStatistics(window, deadline_ms=80.0)
    for i, value in enumerate(solve_ms):
        stats.add(float(value))
        kept = solve_ms[max(0, i + 1 - window): i + 1]
        summary = stats.summary()
        for percent, ours in ((50.0, summary.median_ms), (95.0, summary.p95_ms), (99.0, summary.p99_ms)):
            assert ours == pytest.approx(np.percentile(kept, percent, method="linear"), rel=1e-12, abs=1e-12)
        assert summary.max_ms == kept.max()
        assert summary.samples == len(kept)
        assert summary.deadline_misses == int(np.count_nonzero(kept > 80.0))
    assert stats.samples_total == 400
    assert stats.deadline_misses_total == int(np.count_nonzero(solve_ms > 80.0))
    assert stats.deadline_misses_total > stats.deadline_misses > 0


def test_arbitrary_percentiles_and_ties_match_numpy():
    values = [5.0, 1.0, 3.0, 3.0, 9.0, 1.0, 7.0]
    stats = SolveTimeStatistics(100, deadline_ms=4.0)
    for v in values:
        stats.add(v)
    for percent in np.linspace(0.0, 100.0, 41):
        assert stats.percentile(percent) == pytest.approx(np.percentile(values, percent, method="linear"))


def test_small_worked_example():
    # Linear interpolation between order statistics: median of 1..4 is 2.5, p95 is 3 + 0.85·1
    # (h = 3·0.95 = 2.85). Common practice, no source.
    stats = SolveTimeStatistics(10, deadline_ms=3.5)
    for v in (4.0, 1.0, 3.0, 2.0):
        stats.add(v)
    assert stats.percentile(50.0) == pytest.approx(2.5)
    assert stats.percentile(95.0) == pytest.approx(3.85)
    assert stats.summary().max_ms == 4.0
    assert stats.deadline_misses == 1


def test_empty_window_reports_nan_and_no_misses():
    summary = SolveTimeStatistics(10, deadline_ms=80.0).summary()
    assert summary.samples == 0 and summary.deadline_misses == 0
    assert np.isnan(summary.median_ms) and np.isnan(summary.p99_ms) and np.isnan(summary.max_ms)


def test_new_deadline_recounts_the_window():
    stats = SolveTimeStatistics(5, deadline_ms=80.0)
    for v in (10.0, 50.0, 90.0, 120.0, 60.0):
        stats.add(v)
    assert stats.deadline_misses == 2
    stats.set_deadline(55.0)
    assert stats.deadline_misses == 3
    stats.add(1.0)  # pushes out 10.0, not a miss
    assert stats.deadline_misses == 3


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -1.0, "12"])
def test_bad_solve_times_are_rejected_with_the_argument_name(bad):
    with pytest.raises(ValueError, match="solve_ms"):
        SolveTimeStatistics(10, deadline_ms=80.0).add(bad)


@pytest.mark.parametrize("window, deadline, name", [(0, 80.0, "window"), (10, 0.0, "deadline_ms"),
                                                    (10, float("nan"), "deadline_ms")])
def test_bad_construction_is_rejected(window, deadline, name):
    with pytest.raises(ValueError, match=name):
        SolveTimeStatistics(window, deadline)
