"""`riskbound review` on the bag recorded by the closed-loop integration test (test_closed_loop.py).

That test records into <pytest basetemp>/closed_loop<N>/recorded. When it has run earlier in the
same session (it sorts before this file), its bag is reviewed as it is; run alone, this file runs
the closed loop itself with the same settings. The review must read the real recording without
error, find the walkers from the ground truth, and list every figure in the report: the overview
map, the clearance over time, the solve-time histogram and timeline, and one snapshot per event.
A 1.5 m threshold makes sure the courtyard crossing yields events to draw. The closed loop's own
summary and the review it wrote of the same recording must agree on the closest approach to 1 mm
(one clearance definition, riskbound.clearance).
"""

import json
import os
from pathlib import Path

import pytest
import yaml
from test_closed_loop import REPLAY_SPEED, TIME_LIMIT_S  # the recording test's own settings

from riskbound.cli import main
from riskbound.closed_loop import DEFAULT_PARAMS, run_closed_loop
from riskbound.logs.review.figures import FIGURES

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def recorded_bag(tmp_path_factory):
    assert os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] == "LOCALHOST"
    done = sorted(tmp_path_factory.getbasetemp().glob("closed_loop*/recorded/metadata.yaml"))
    if done:
        return done[0].parent
    out = tmp_path_factory.mktemp("closed_loop")
    run_closed_loop(out, params_file=None, speed=REPLAY_SPEED, time_limit_s=TIME_LIMIT_S)
    return out / "recorded"


def test_review_of_the_closed_loop_bag(recorded_bag, tmp_path):
    params = yaml.safe_load((REPO / DEFAULT_PARAMS).read_text())["planner"]["ros__parameters"]
    out = tmp_path / "review"
    code = main(["review", str(recorded_bag), "--out", str(out), "--quiet", "--clearance-m", "1.5",
                 "--robot-radius-m", str(params.get("robot_radius_m", 0.3)), "--max-figures", "3",
                 "--replan-risk", "0.01"])
    assert code == 0
    document = json.loads((out / "events.json").read_text())
    assert document["obstacle_source"] == "crowd_truth"
    missing = {m["name"] for m in document["missing_topics"]}
    assert not missing & {"odom", "crowd_truth", "obstacle_forecast", "plan", "planner_status", "diagnostics",
                          "cmd_vel", "cmd_vel_plan", "goal"}, missing
    assert document["planner"]["cycles"] > 0
    events = document["events"]
    assert events, "a 1.5 m threshold should catch some pass in the 40-walker courtyard"
    report = (out / "report.md").read_text()
    figures = [*FIGURES, *(e["figure"] for e in events if e["figure"])]
    assert len(figures) == len(FIGURES) + min(3, len(events))
    for name in figures:
        assert f"]({name})" in report, name
        assert (out / name).read_bytes()[:8] == PNG_MAGIC, name
    for event in events:
        assert event["obstacle_id"] is not None
        assert event["min_clearance_m"] < 1.5 and event["t_start"] <= event["t_min"] <= event["t_end"]
        assert event["replan"]["available"], event["replan"]


def test_summary_and_review_of_one_run_agree_on_the_closest_approach(recorded_bag, tmp_path):
    # The review as `riskbound closedloop` runs it: with the summary's footprints.
    summary = json.loads((recorded_bag.parent / "summary.json").read_text())
    out = tmp_path / "review"
    code = main(["review", str(recorded_bag), "--out", str(out), "--quiet", "--robot-radius-m",
                 str(summary["robot_radius_m"]), "--obstacle-half-extents-m",
                 *map(str, summary["walker_half_extents_m"])])
    assert code == 0
    closest = json.loads((out / "events.json").read_text())["closest_approach"]
    assert abs(summary["min_clearance_m"] - closest["clearance_m"]) <= 1e-3, (summary["min_clearance_m"], closest)
    assert summary["min_clearance_walker_id"] == closest["obstacle_id"]
