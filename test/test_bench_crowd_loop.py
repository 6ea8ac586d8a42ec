"""`riskbound bench crowdloop`, the offline closed loop: it must run on the very crowd the committed
bag holds (so tuning offline and the ROS closed loop see the same walkers), report what it ran,
and refuse bad options with exit status 2."""

import json
from pathlib import Path

import numpy as np
import pytest

from riskbound.bench.crowd_loop import DEFAULT_SCENARIO, crowd_frames
from riskbound.cli import main
from riskbound.logs.bag_io import read_crowd_bag
REPO = Path(__file__).resolve().parents[1]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def test_seed_7_is_the_crowd_of_the_committed_bag():
    scenario, frames, detections = crowd_frames(REPO / DEFAULT_SCENARIO, 7, 60.0)
    bag = read_crowd_bag(REPO / "test" / "data" / "crowd_courtyard_40")
    assert len(frames) == len(bag.truth) == 601
    for k in (0, 300, 600):
        order = np.argsort(frames[k].ids)
        stored = np.argsort(bag.truth_ids[k])
        np.testing.assert_allclose(frames[k].positions[order], bag.truth.positions[k][stored], atol=1e-9)
        np.testing.assert_allclose(detections[k][0], bag.detections.positions[k], atol=1e-9)


def test_short_run_reports_every_crossing(tmp_path):
    code = main(["bench", "crowdloop", "--seeds", "7", "--start-s", "2", "5", "--duration-s", "8",
                 "--out", str(tmp_path)])
    assert code == 0
    report = json.loads((tmp_path / "crowdloop.json").read_text())
    assert [c["start_s"] for c in report["crossings"]] == [2.0, 5.0]
    for crossing in report["crossings"]:
        assert crossing["cycles"] > 0 and np.isfinite(crossing["min_clearance_m"])
        assert sum(crossing["statuses"].values()) == crossing["cycles"]
    assert report["planner"]["infeasible_response"] == "least_violation"  # config/drone.yaml
    assert (tmp_path / "crowdloop_clearance.png").read_bytes()[:8] == PNG_MAGIC


@pytest.mark.parametrize("option, words", [
    (["--set", "horizon=3"], "--set horizon: not a planner setting"),
    (["--set", "risk_level=0.7"], "risk_level=0.7 is out of range"),
    (["--start-s", "0.5"], "--start-s 0.5"),
])
def test_bad_options_exit_2_naming_the_problem(option, words, tmp_path, capsys):
    assert main(["bench", "crowdloop", "--duration-s", "4", "--out", str(tmp_path), *option]) == 2
    assert words in capsys.readouterr().err
