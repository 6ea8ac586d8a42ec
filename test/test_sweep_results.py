"""`riskbound sweep` without a cluster: the grid, the results store and its CSV export, the report's
confidence intervals (checked against SciPy's exact binomial interval and the closed form for zero
events) and the report itself, and bad options refused with exit status 2."""

import csv
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import binomtest

from riskbound.bench.crowd_loop import CellOutcome
from riskbound.cli import main
from riskbound.sweep.grid import build_grid
from riskbound.sweep.report import binomial_interval, write_report
from riskbound.sweep.store import RUN_COLUMNS, ResultStore

REPO = Path(__file__).resolve().parents[1]
SCENARIO = str(REPO / "config" / "crowd_courtyard_40.yaml")
PARAMS = str(REPO / "config" / "drone.yaml")
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize("events, runs", [(0, 10), (1, 10), (5, 10), (10, 10), (3, 47), (0, 1)])
def test_interval_matches_scipys_exact_binomial_interval(events, runs):
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="exact"), the same beta-quantile interval.
    reference = binomtest(events, runs).proportion_ci(confidence_level=0.95, method="exact")
    low, high = binomial_interval(events, runs)
    assert low == pytest.approx(reference.low, abs=1e-12)
    assert high == pytest.approx(reference.high, abs=1e-12)


def test_interval_for_no_events_has_its_closed_form():
    # With k = 0 the upper limit solves (1 − p)^n = γ/2: p = 1 − (γ/2)^(1/n) (textbook closed form of the
    # exact interval; for n = 10 at 95 %: 0.3085, value from memory).
    assert binomial_interval(0, 10)[1] == pytest.approx(1.0 - 0.025 ** 0.1, rel=1e-12)
    assert binomial_interval(0, 10)[1] == pytest.approx(0.3085, abs=1e-4)


@pytest.mark.parametrize("events, runs, words", [(3, 2, "events=3"), (-1, 5, "events=-1"), (0, 0, "runs=0")])
def test_interval_refuses_impossible_counts(events, runs, words):
    with pytest.raises(ValueError, match=words):
        binomial_interval(events, runs)


def _cells(**changes):
    arguments = dict(risk_levels=[0.01, 0.05, 0.1], allocations=["joint", "per_constraint"], scenarios=[SCENARIO],
                     seeds=[1, 2], params_files=[PARAMS], robot_models=["from_file"], reaction_strengths=[0.0, 2.1],
                     start_s=2.0, duration_s=10.0)
    arguments.update(changes)
    return build_grid(**arguments)


def test_grid_has_every_combination_once_with_stable_keys(tmp_path):
    cells = _cells()
    assert len(cells) == 3 * 2 * 2 * 2
    assert len({cell.key for cell in cells}) == len(cells)
    assert [cell.key for cell in cells] == [cell.key for cell in _cells()]
    assert len(_cells(seeds=[1, 2, 1])) == len(cells)  # a repeated value is no new cell
    # An edited scenario file is a different cell: old results are not taken for new ones.
    edited = tmp_path / "scenario.yaml"
    edited.write_text(Path(SCENARIO).read_text() + "\n# edited\n")
    assert _cells(scenarios=[str(edited)])[0].key != cells[0].key


@pytest.mark.parametrize("change, words", [
    ({"risk_levels": [0.7]}, "risk level 0.7"),
    ({"allocations": ["uniform"]}, "allocation 'uniform'"),
    ({"robot_models": ["hovercraft"]}, "robot model 'hovercraft'"),
    ({"reaction_strengths": [-1.0]}, "reaction strength -1.0"),
    ({"start_s": 0.5}, "start_s 0.5"),
    ({"scenarios": ["/nonexistent/scenario.yaml"]}, "scenario /nonexistent/scenario.yaml"),
    ({"seeds": []}, "seeds: at least one"),
])
def test_grid_refuses_bad_values_naming_them(change, words):
    with pytest.raises(ValueError, match=words):
        _cells(**change)


def _outcome(rng, risk_level):
    reached = bool(rng.uniform() < 0.5 + risk_level)
    return CellOutcome(reached_goal=reached, time_to_goal_s=float(rng.uniform(12, 20)) if reached else None,
                       walker_contacts=int(rng.uniform() < risk_level), contact_frames=0, static_contact_frames=0,
                       min_clearance_m=float(rng.normal(0.5 - risk_level, 0.2)), min_static_clearance_m=1.2,
                       time_outside_bounds_s=0.0,
                       near_misses=int(rng.integers(0, 3)), longest_stop_s=float(rng.choice([0.0, 1.5])), cycles=150,
                       least_violation_cycles=int(rng.integers(0, 10)), failed_cycles=0, solve_ms_median=2.0,
                       solve_ms_p95=5.0, solve_ms_max=9.0, cell_s=1.0)


@pytest.fixture
def filled_db(tmp_path):
    rng = np.random.default_rng(3)
    db = tmp_path / "results.sqlite"
    cells = _cells()
    with ResultStore(db) as store:
        for cell in cells:
            store.add_run(cell, _outcome(rng, cell.risk_level), "double_integrator", "test", "here:1")
        store.add_run(cells[0], _outcome(rng, 0.01), "double_integrator", "test", "here:1")  # a second write is ignored
    return db, cells


def test_store_keeps_one_row_per_cell_and_exports_csv(filled_db, tmp_path):
    db, cells = filled_db
    with ResultStore(db) as store:
        assert store.done_keys() == {cell.key for cell in cells}
        count = store.export_csv(tmp_path / "runs.csv")
    assert count == len(cells)
    with open(tmp_path / "runs.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == len(cells)
    assert list(rows[0]) == [name for name, _ in RUN_COLUMNS]
    assert {"static_contact_frames", "near_misses", "longest_stop_s", "code_version", "seed"} <= set(rows[0])


def test_report_shows_rates_per_alpha_and_recommends_none(filled_db, tmp_path):
    db, _ = filled_db
    paths = write_report(db, tmp_path / "report")
    text = (tmp_path / "report" / "report.md").read_text()
    assert "recommends no α" in text
    assert "exact binomial 95 % confidence interval" in text
    for alpha in ("| 0.01 |", "| 0.05 |", "| 0.1 |"):
        assert text.count(alpha) == 4  # one row per α in each of the four groups
    for path in paths[1:]:
        assert path.read_bytes()[:8] == PNG_MAGIC


def test_report_of_an_empty_database_is_refused(tmp_path, capsys):
    db = tmp_path / "empty.sqlite"
    ResultStore(db).close()
    assert main(["sweep", "report", "--db", str(db), "--out", str(tmp_path)]) == 2
    assert "no runs to report" in capsys.readouterr().err


@pytest.mark.parametrize("option, words", [
    (["--risk-levels", "0.7"], "risk level 0.7"),
    (["--set", "risk_level=0.1"], "--set risk_level: is a grid dimension"),
    (["--set", "horizon=3"], "--set horizon: not a planner setting"),
    (["--set", "horizon_steps=2"], "horizon_steps"),
    (["--workers", "0"], "workers=0"),
])
def test_bad_options_exit_2_naming_the_problem(option, words, tmp_path, capsys):
    assert main(["sweep", "run", "--db", str(tmp_path / "r.sqlite"), "--seeds", "1", *option]) == 2
    assert words in capsys.readouterr().err
