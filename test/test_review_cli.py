"""`riskbound review` as a user runs it: a full review with a re-solve, and damaged bags.

The command runs as a subprocess (`python -m riskbound.cli review ...`), so an uncaught exception
would show as a traceback on stderr and a status other than the documented 2.
"""

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest

from riskbound.cli import main
from riskbound.logs.review import synthetic
from riskbound.logs.review.figures import FIGURES

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def run_review(*args, timeout=120):
    return subprocess.run([sys.executable, "-m", "riskbound.cli", "review", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def close_pass_bag(tmp_path_factory):
    # Robot along y = 0, a walker crossing 0.2 m away (clearance; see test_review_events), one stop.
    run = synthetic.straight_crossing((-5.0, 0.0), (1.0, 0.0), (0.0, -6.1571), (0.0, 1.0), 10.0,
                                      others=[(3, (20.0, 20.0), (0.0, 0.0))])
    run.failures = (45, 46)
    run.least_violations = (47, 48, 49)  # then three plans commanded inside the walker's ellipse
    run.stops = [(104.8, "planner_failure")]
    path = tmp_path_factory.mktemp("cli") / "close_pass"
    synthetic.write_review_bag(path, run)
    return path


def test_full_review_with_replanning(close_pass_bag, tmp_path):
    out = tmp_path / "review"
    result = run_review(close_pass_bag, "--out", out, "--replan-risk", "0.01", "--replan-param", "max_speed_mps=1.0")
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr
    assert "reading" in result.stderr and "100%" in result.stderr       # the progress bar
    assert "1 event(s), 0 collision(s)" in result.stdout

    report = (out / "report.md").read_text()
    for name in (*FIGURES, "event_01.png"):
        assert f"]({name})" in report, name
        assert (out / name).read_bytes()[:8] == PNG_MAGIC, name
    # Read top to bottom: summary, then the table, then the overview figures, then each event.
    order = [report.index(h) for h in ("## Summary", "## Events", "## Overview", "### Event 1")]
    assert order == sorted(order)
    assert "planner_failure" in report

    document = json.loads((out / "events.json").read_text())
    assert document["schema"] == "riskbound.review/2"
    (event,) = document["events"]
    for key in ("t_start", "t_end", "t_min", "min_clearance_m", "obstacle_id", "collision"):
        assert key in event
    assert event["obstacle_id"] == 7 and event["collision"] is False
    assert event["min_clearance_m"] == pytest.approx(0.2, abs=0.01)
    assert event["planner"]["failures"] == 2 and event["watchdog"]["stops"] == 1
    assert event["planner"]["least_violation"] == 3
    assert "3 least-violation plans" in report and "the risk bound did not hold" in report
    assert event["watchdog"]["stop_causes"] == ["planner_failure"]
    replan = event["replan"]
    assert replan["available"] and replan["goal_source"] == "goal topic"
    assert replan["as_recorded"]["risk_level"] == pytest.approx(0.05)   # from planner_status
    assert replan["replanned"]["risk_level"] == pytest.approx(0.01)     # the override
    assert replan["overrides"] == {"max_speed_mps": 1.0, "risk_level": 0.01}
    positions = np.asarray(replan["recorded_plan"]["positions"])
    assert positions.shape[1] == 2 and len(positions) >= 2
    for key in ("as_recorded", "replanned"):
        plan = replan[key]
        if plan["success"]:
            positions = np.asarray(plan["positions"])
            assert positions.shape[1] == 2 and len(positions) >= 2 and plan["clearance_vs_actual_m"] is not None
        else:   # no usable plan: nothing drawn or scored as if it were one
            assert plan["positions"] == [] and plan["clearance_vs_actual_m"] is None
            assert f"{plan['status']} in" in report and "no usable plan" in report
    if replan["as_recorded"]["success"] and replan["replanned"]["success"]:
        # Both re-solves start at the recorded state at onset.
        np.testing.assert_allclose(replan["as_recorded"]["positions"][0], replan["replanned"]["positions"][0])


def test_invalid_options_are_refused_before_reading(close_pass_bag, tmp_path, capsys):
    assert main(["review", str(close_pass_bag), "--out", str(tmp_path / "x"), "--replan-risk", "0.7"]) == 2
    assert "--replan-risk 0.7: out of range, must be in (0.0, 0.5)" in capsys.readouterr().err
    assert main(["review", str(close_pass_bag), "--replan-param", "horizon_steps=many"]) == 2
    assert "horizon_steps='many': expected an integer" in capsys.readouterr().err
    assert main(["review", str(close_pass_bag), "--clearance-m", "-1"]) == 2
    assert "--clearance-m -1.0: must be a finite number ≥ 0" in capsys.readouterr().err
    assert not (tmp_path / "x").exists()


def _damaged(source, target, how):
    shutil.copytree(source, target)
    storage = next(p for p in target.iterdir() if p.suffix in (".mcap", ".db3"))
    data = storage.read_bytes()
    storage.write_bytes(data[: len(data) // 2] if how == "truncated" else bytes(len(data)))
    return target


@pytest.mark.parametrize("case", ["truncated mcap", "truncated sqlite3", "not a bag"])
def test_damaged_bag_exits_2_without_traceback(close_pass_bag, tmp_path, case):
    if case == "truncated mcap":
        bag = _damaged(close_pass_bag, tmp_path / "bag", "truncated")
    elif case == "truncated sqlite3":
        good = tmp_path / "good"
        synthetic.write_review_bag(good, synthetic.straight_crossing((0, 0), (1, 0), (5, 5), (0, 0), 3.0),
                                   storage="sqlite3")
        bag = _damaged(good, tmp_path / "bag", "truncated")
    else:
        bag = tmp_path / "notes.mcap"
        bag.write_bytes(b"this is not an mcap file\n" * 20)
    result = run_review(bag, "--out", tmp_path / "out", "--quiet")
    assert result.returncode == 2, (result.stdout, result.stderr)
    assert "Traceback" not in result.stderr
    assert result.stderr.startswith("riskbound review: error: ")
    assert str(bag) in result.stderr
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("case", ["zeroed mcap", "missing"])
def test_unreadable_bag_in_process(close_pass_bag, tmp_path, capsys, case):
    bag = _damaged(close_pass_bag, tmp_path / "bag", "zeroed") if case == "zeroed mcap" else tmp_path / "nothing"
    assert main(["review", str(bag), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"riskbound review: error: {bag}")


def test_review_imports_no_rclpy():
    # Bags are reviewed offline: the review must not need a ROS context (project rule: only
    # riskbound.ros imports rclpy).
    code = ("import sys, riskbound.logs.review.cli, riskbound.logs.review.report, riskbound.logs.review.replan; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] == 'rclpy'))")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"
