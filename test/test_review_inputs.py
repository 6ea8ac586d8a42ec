"""`riskbound review` when it cannot look, or is given bad input: it says so, names what was
wrong, and never reports "no events" for a run it did not examine.

The bags are synthetic (riskbound.logs.review.synthetic): a robot along y = 0 and a walker
crossing 0.2 m from it (the planted close pass of test_review_events.py), with topics left out or
values damaged on purpose. Expected exit codes and messages are the documented ones
(riskbound.logs.review.cli's module docstring and --help; README, "Reviewing a recorded run").
"""

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest

from riskbound.logs.review import synthetic
from riskbound.logs.review.cli import EXIT_ERROR, EXIT_NOT_EXAMINED
from riskbound.logs.review.sanity import MAX_ABS_POSITION_M
from riskbound.logs.review.replan import _plan_summary, parse_overrides

B_PLANTED = 0.45 + np.sqrt(2.0) * (0.2 + 0.3) + 5.0   # see test_review_events.py: clearance 0.2 m


def crossing(**kwargs):
    return synthetic.straight_crossing((-5.0, 0.0), (1.0, 0.0), (0.0, -B_PLANTED), (0.0, 1.0), 12.0,
                                       others=[(3, (20.0, 20.0), (0.0, 0.0))], **kwargs)


def review(*args):
    # -W error: a numpy or matplotlib warning would be an unreported problem, so it fails the run.
    return subprocess.run([sys.executable, "-W", "error::RuntimeWarning", "-W", "error::UserWarning", "-m",
                           "riskbound.cli", "review", *map(str, args), "--quiet"],
                          capture_output=True, text=True, timeout=120)


def assert_not_examined(result, out, *words):
    assert result.returncode == EXIT_NOT_EXAMINED, (result.stdout, result.stderr)
    assert "NOT EXAMINED" in result.stdout and "event(s)" not in result.stdout
    report = (out / "report.md").read_text()
    assert "**Not examined:**" in report and "never dropped below" not in report
    for word in words:
        assert word in result.stdout and word in report, word
    document = json.loads((out / "events.json").read_text())
    assert document["examined"] is False and document["not_examined_reasons"]
    assert "Warning" not in result.stderr, result.stderr


def test_without_odometry_the_planted_contact_is_not_silently_lost(tmp_path):
    bag = tmp_path / "bag"
    topics = [t for t in synthetic.ALL_TOPICS if t != "odom"]
    synthetic.write_review_bag(bag, crossing(), topics=topics)
    assert_not_examined(review(bag, "--out", tmp_path / "out"), tmp_path / "out",
                        "no robot path: the bag has no odom topic")


def test_without_any_obstacle_source(tmp_path):
    bag = tmp_path / "bag"
    topics = [t for t in synthetic.ALL_TOPICS if t not in ("crowd_truth", "crowd_truth_ids", "detections",
                                                           "obstacle_forecast")]
    synthetic.write_review_bag(bag, crossing(), topics=topics)
    assert_not_examined(review(bag, "--out", tmp_path / "out"), tmp_path / "out",
                        "no obstacles: the bag has none of crowd_truth, obstacle_forecast, detections")


def test_namespace_that_matches_nothing_names_it_and_the_topics(tmp_path):
    bag = tmp_path / "bag"
    synthetic.write_review_bag(bag, crossing(), namespace="r1")
    result = review(bag, "--out", tmp_path / "out", "--namespace", "robot9")
    assert_not_examined(result, tmp_path / "out", "--namespace 'robot9' matches no topic", "/r1/odom")


def test_examined_run_reports_its_closest_approach(tmp_path):
    bag = tmp_path / "bag"
    synthetic.write_review_bag(bag, crossing())
    result = review(bag, "--out", tmp_path / "out")
    assert result.returncode == 0, result.stderr
    assert "1 event(s), 0 collision(s); closest approach 0.20" in result.stdout
    document = json.loads((tmp_path / "out" / "events.json").read_text())
    assert document["examined"] is True and document["not_examined_reasons"] == []
    # The run's closest approach and the event holding it are one computation (riskbound.clearance).
    assert document["closest_approach"]["clearance_m"] == pytest.approx(document["events"][0]["min_clearance_m"],
                                                                        abs=1e-9)


def test_replan_risk_out_of_range_names_the_option_given(tmp_path):
    with pytest.raises(ValueError) as raised:
        parse_overrides(2.0, [])
    assert str(raised.value) == "--replan-risk 2: out of range, must be in (0.0, 0.5)"
    bag = tmp_path / "bag"
    synthetic.write_review_bag(bag, crossing())
    result = review(bag, "--replan-risk", "2", "--out", tmp_path / "out")
    assert result.returncode == EXIT_ERROR
    assert "--replan-risk 2" in result.stderr and "--replan-param" not in result.stderr
    help_text = subprocess.run([sys.executable, "-m", "riskbound.cli", "review", "--help"], capture_output=True,
                               text=True, timeout=60).stdout
    assert "risk level A in (0.0, 0.5)" in " ".join(help_text.split())
    assert "3 the run could not be examined" in " ".join(help_text.split())


def test_directory_without_metadata_names_it_and_suggests_the_storage_file(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    result = review(empty, "--out", tmp_path / "out1")
    assert result.returncode == EXIT_ERROR
    assert f"{empty / 'metadata.yaml'}: missing" in result.stderr and "no .mcap or .db3" in result.stderr

    bag = tmp_path / "bag"
    synthetic.write_review_bag(bag, crossing(), storage="sqlite3")
    (bag / "metadata.yaml").unlink()
    storage = next(bag.glob("*.db3"))
    result = review(bag, "--out", tmp_path / "out2")
    assert result.returncode == EXIT_ERROR
    assert f"{bag / 'metadata.yaml'}: missing" in result.stderr
    assert f"pass the storage file itself (riskbound review {storage})" in result.stderr
    assert review(storage, "--out", tmp_path / "out3").returncode == 0   # the suggestion works


def test_out_naming_an_existing_file_names_the_option(tmp_path):
    bag = tmp_path / "bag"
    synthetic.write_review_bag(bag, crossing())
    existing = tmp_path / "report.txt"
    existing.write_text("keep me\n")
    result = review(bag, "--out", existing)
    assert result.returncode == EXIT_ERROR
    assert result.stderr.strip() == (f"riskbound review: error: --out {existing}: exists and is not a directory; "
                                     "name a directory (new or existing)")
    assert existing.read_text() == "keep me\n"


@pytest.mark.parametrize("storage", ["mcap", "sqlite3"])
def test_absurd_positions_are_rejected_counted_and_reported(tmp_path, storage):
    run = crossing()
    # Four frames in which the far walker jumps to 1e229 m: damage, as found in a corrupted copy.
    damaged_frames = [10, 11, 12, 13]
    run.walker_positions[damaged_frames, 1] = 1e229
    bag = tmp_path / "bag"
    with np.errstate(over="ignore", invalid="ignore"):
        synthetic.write_review_bag(bag, run, storage=storage)
    result = review(bag, "--out", tmp_path / "out")
    assert result.returncode == 0, result.stderr    # no warning escaped (-W error)
    assert "rejected: 4 crowd_truth message(s) with implausible values" in result.stdout
    assert "1 event(s), 0 collision(s)" in result.stdout   # the planted close pass is still found
    report = (tmp_path / "out" / "report.md").read_text()
    assert "**Rejected messages:** 4 on `/crowd_truth`" in report and f"{MAX_ABS_POSITION_M:g} m" in report
    document = json.loads((tmp_path / "out" / "events.json").read_text())
    assert document["rejected_messages"]["crowd_truth"] == 4


def test_one_least_violation_plan_is_singular(tmp_path):
    run = crossing()
    run.least_violations = (47,)
    bag = tmp_path / "bag"
    synthetic.write_review_bag(bag, run)
    assert review(bag, "--out", tmp_path / "out").returncode == 0
    report = (tmp_path / "out" / "report.md").read_text()
    assert "1 least-violation plan (commanded" in report


class _Unusable:
    """A solve result shaped like riskbound.planning.mpc's, that came back infeasible."""

    success, status, solver_status = False, "infeasible", "Infeasible_Problem_Detected"
    solve_ms, iterations, min_margin_m = 12.0, 30, float("nan")
    states = np.array([[0.0, 0.0, 1.0, 0.0], [0.1, 0.0, 1.0, 0.0]])
    times = np.array([0.0, 0.1])


def test_an_infeasible_resolve_is_not_scored_as_a_plan():
    summary = _plan_summary(_Unusable(), 100.0, data=None, event=None)
    assert summary["success"] is False and summary["clearance_vs_actual_m"] is None and summary["positions"] == []


def test_damaged_copies_never_crash(tmp_path):
    # Truncations at several places of one MCAP bag: each exits 0 (readable part) or 2 (named), never
    # with a traceback.
    good = tmp_path / "good"
    synthetic.write_review_bag(good, crossing())
    storage = next(good.glob("*.mcap"))
    data = storage.read_bytes()
    for fraction in (0.3, 0.6, 0.9):
        copy = tmp_path / f"cut_{fraction}"
        shutil.copytree(good, copy)
        (copy / storage.name).write_bytes(data[: int(len(data) * fraction)])
        result = review(copy, "--out", tmp_path / f"out_{fraction}")
        assert result.returncode in (0, EXIT_ERROR, EXIT_NOT_EXAMINED), result.stderr
        assert "Traceback" not in result.stderr


def test_closed_loop_summary_and_review_agree_on_the_closest_approach(tmp_path):
    # One bag serves as both the recording and the crowd bag. The walker passes the robot at
    # clearance 0.2 m between two truth frames (closed form in test_review_events.py), so the
    # agreement covers the refinement between frames, not only the sampled frames.
    from riskbound.logs.run_summary import summarise_run

    run = crossing()
    bag = tmp_path / "bag"
    synthetic.write_review_bag(bag, run, with_clock=True)
    summary, _ = summarise_run(bag, bag, run.goal, 0.3, 10.0, walker_half_extents_m=(0.25, 0.2))
    result = review(bag, "--out", tmp_path / "out", "--robot-radius-m", "0.3", "--obstacle-half-extents-m",
                    "0.25", "0.2")
    assert result.returncode == 0, result.stderr
    closest = json.loads((tmp_path / "out" / "events.json").read_text())["closest_approach"]
    assert abs(summary.min_clearance_m - closest["clearance_m"]) <= 1e-3      # the done-when: 1 mm
    assert summary.min_clearance_walker_id == closest["obstacle_id"] == 7
    assert summary.min_clearance_m == pytest.approx(0.2, abs=2e-3)          # closed form
