"""`riskbound fleetreview`: every bag under a directory reviewed, one report each and a table, with
the single-bag review's honesty about missing input: a bag that could not be examined or read is
listed as such, with the reason and no counts, never as a bag without events."""

import csv

import pytest

from riskbound.cli import main
from riskbound.logs.fleet_review import EXAMINED, NOT_EXAMINED, UNREADABLE, find_bags, review_fleet
from riskbound.logs.review import synthetic


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    """robot_a: a close pass (a walker 0.2 m from the robot's disc, as test_review_cli's bag) and a
    quiet run; robot_b: a bag without odometry and a file that is no bag."""
    root = tmp_path_factory.mktemp("fleet")
    synthetic.write_review_bag(root / "robot_a" / "close_pass",
                               synthetic.straight_crossing((-5.0, 0.0), (1.0, 0.0), (0.0, -6.1571), (0.0, 1.0), 10.0))
    synthetic.write_review_bag(root / "robot_a" / "quiet",
                               synthetic.straight_crossing((0, 0), (1, 0), (5, 5), (0, 0), 3.0))
    synthetic.write_review_bag(root / "robot_b" / "no_odometry",
                               synthetic.straight_crossing((0, 0), (1, 0), (5, 5), (0, 0), 3.0),
                               topics=("crowd_truth", "crowd_truth_ids", "planner_status"))
    (root / "robot_b" / "notes.mcap").write_bytes(b"not a bag\n" * 10)
    return root


def test_finds_bag_directories_and_lone_bag_files(fleet):
    names = [bag.relative_to(fleet).as_posix() for bag in find_bags(fleet)]
    assert names == ["robot_a/close_pass", "robot_a/quiet", "robot_b/no_odometry", "robot_b/notes.mcap"]


def test_every_bag_gets_a_verdict_and_unknowns_stay_unknown(fleet, tmp_path):
    # On the sweep's engine with an embedded cluster of one worker process.
    verdicts = {v.bag: v for v in review_fleet(fleet, tmp_path / "out", workers=1)}
    close, quiet = verdicts["robot_a/close_pass"], verdicts["robot_a/quiet"]
    assert (close.state, close.events, close.collisions) == (EXAMINED, 1, 0)
    assert close.closest_approach_m == pytest.approx(0.2, abs=0.01)  # the crossing's geometry
    assert (quiet.state, quiet.events, quiet.collisions) == (EXAMINED, 0, 0)
    missing, junk = verdicts["robot_b/no_odometry"], verdicts["robot_b/notes.mcap"]
    assert missing.state == NOT_EXAMINED and "no robot path" in missing.reason
    assert junk.state == UNREADABLE and "notes.mcap" in junk.reason
    for verdict in (missing, junk):
        assert (verdict.events, verdict.collisions, verdict.closest_approach_m) == (None, None, None)
    assert (tmp_path / "out" / "bags" / "robot_a" / "close_pass" / "report.md").is_file()
    with open(tmp_path / "out" / "fleet.csv", newline="") as handle:
        rows = {row["bag"]: row for row in csv.DictReader(handle)}
    assert rows["robot_b/no_odometry"]["events"] == ""  # empty, not 0
    table = (tmp_path / "out" / "fleet.md").read_text()
    assert "| robot_b/no_odometry | not examined | — | — |" in table
    assert "| robot_b/notes.mcap | unreadable | — | — |" in table
    assert "4 bag(s): 2 examined, 1 not examined, 1 unreadable" in table


def test_command_exit_status_says_whether_every_bag_was_examined(fleet, tmp_path, capsys):
    assert main(["fleetreview", str(fleet / "robot_a"), "--out", str(tmp_path / "a"), "--serial"]) == 0
    assert main(["fleetreview", str(fleet), "--out", str(tmp_path / "all"), "--serial"]) == 3
    assert "robot_b/no_odometry: NOT EXAMINED: no robot path" in capsys.readouterr().out
    assert main(["fleetreview", str(tmp_path / "nowhere"), "--out", str(tmp_path / "x"), "--serial"]) == 2
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["fleetreview", str(empty), "--out", str(tmp_path / "y"), "--serial"]) == 2
    assert "no bag found" in capsys.readouterr().err
