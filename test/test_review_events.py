"""Near-miss events found in bags built here, with the closest approach known in closed form.

Geometry (common practice, no source): the robot drives along y = 0 at 1 m/s from (−5, 0); a
walker crosses along x = 0 at 1 m/s from (0, y₀), heading +y, so its box (half-length 0.25 along
y, half-width 0.2 along x) spans |x| ≤ 0.2, |y − y_w| ≤ 0.25. Relative to the walker the robot
moves on the line x + y = a + b with a = −5, b = −y₀, direction (1, −1)/√2. When the line misses
the box, the nearest box point is the corner (0.2, 0.25), at distance (a + b − 0.45)/√2 from the
line, reached when (a + t − 0.2) − (b − t − 0.25) = 0, i.e. t* = (b − a − 0.05)/2. Clearance is
that distance minus the robot radius 0.3 m. When the line goes through the box centre
(a + b = 0), the robot centre passes the walker centre at t = −a, where the signed distance to
the box is −0.2 (the depth to the nearer face), so the clearance is −0.5 m.
"""

import json

import numpy as np
import pytest

from riskbound.logs.review import events as event_search
from riskbound.logs.review import obstacle_rows
from riskbound.logs.review import synthetic
from riskbound.logs.review.cli import Progress, add_arguments, review
from riskbound.logs.review.forecast_check import check_event
from riskbound.logs.review.load import load_review_data

T0 = 100.0
RADIUS = 0.3
A = -5.0
PLANTED_CLEARANCE = 0.2
B_PLANTED = 0.45 + np.sqrt(2.0) * (PLANTED_CLEARANCE + RADIUS) - A   # a + b = 0.45 + √2 (c + r)
T_PLANTED = (B_PLANTED - A - 0.05) / 2.0


def crossing(b, duration_s=12.0, **kwargs):
    far_walker = (3, (20.0, 20.0), (0.0, 0.0))  # never near the robot
    return synthetic.straight_crossing((A, 0.0), (1.0, 0.0), (0.0, -b), (0.0, 1.0), duration_s, t0_s=T0,
                                       others=[far_walker], **kwargs)


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    path = tmp_path_factory.mktemp("planted") / "bag"
    synthetic.write_review_bag(path, crossing(B_PLANTED))
    return path


def test_planted_close_pass_found_at_the_right_time_and_clearance(planted):
    data = load_review_data(planted)
    assert data.obstacles.source == "crowd_truth"
    found, _ = event_search.find_events(data, clearance_m=0.5)
    assert len(found) == 1
    event = found[0]
    assert event.obstacle_id == 7 and not event.collision
    assert abs(event.t_min - (T0 + T_PLANTED)) <= 0.1          # ± one sample at 10 Hz
    assert event.min_clearance_m == pytest.approx(PLANTED_CLEARANCE, abs=0.01)
    # Onset and end bracket the minimum; clearance crosses 0.5 m symmetrically for a straight pass.
    assert event.t_start < event.t_min < event.t_end
    assert (event.t_min - event.t_start) == pytest.approx(event.t_end - event.t_min, abs=0.05)
    # Relative velocity (1, −1): speed √2 (closed form).
    assert event.relative_speed_mps == pytest.approx(np.sqrt(2.0), abs=1e-6)


def test_sqlite3_bag_gives_the_same_event(tmp_path):
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, crossing(B_PLANTED), storage="sqlite3")
    found, _ = event_search.find_events(load_review_data(path), clearance_m=0.5)
    assert len(found) == 1
    assert found[0].min_clearance_m == pytest.approx(PLANTED_CLEARANCE, abs=0.01)


def test_bag_without_a_close_pass_has_no_events(tmp_path):
    path = tmp_path / "bag"
    b = 5.0 - A  # a + b = 5: smallest clearance (5 − 0.45)/√2 − 0.3 = 2.917 m
    synthetic.write_review_bag(path, crossing(b, duration_s=16.0))
    data = load_review_data(path)
    found, series = event_search.find_events(data, clearance_m=0.5)
    assert found == []
    assert np.nanmin(series.min_clearance_m) == pytest.approx((5.0 - 0.45) / np.sqrt(2.0) - RADIUS, abs=0.01)


def test_collision_is_flagged(tmp_path):
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, crossing(-A))  # a + b = 0: through the walker's centre at t = 5 s
    found, _ = event_search.find_events(load_review_data(path), clearance_m=0.5)
    assert len(found) == 1
    assert found[0].collision
    assert found[0].min_clearance_m == pytest.approx(-0.5, abs=0.01)
    assert abs(found[0].t_min - (T0 + 5.0)) <= 0.1


def test_head_on_time_to_collision_at_onset(tmp_path):
    # A standing walker (heading 0: box length along x) at the origin; the robot arrives along x at
    # 1 m/s. Clearance = |x| − 0.25 − 0.3 reaches 0.5 m at x = −1.05 and 0 at x = −0.55: the time
    # to collision at onset is 0.5 s, the relative speed 1 m/s (closed form).
    run = synthetic.straight_crossing((A, 0.0), (1.0, 0.0), (0.0, 0.0), (0.0, 0.0), 8.0, t0_s=T0)
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, run)
    found, _ = event_search.find_events(load_review_data(path), clearance_m=0.5)
    assert len(found) == 1
    assert found[0].t_start == pytest.approx(T0 + 3.95, abs=1e-6)
    assert found[0].time_to_collision_s == pytest.approx(0.5, abs=1e-6)
    assert found[0].relative_speed_mps == pytest.approx(1.0, abs=1e-6)


def test_forecast_versus_actual_by_hand(tmp_path):
    # The tracker is off by a constant b = (0.3, −0.4) m (|b| = 0.5 m); its covariance is
    # (σ₀² + (σ_v t_k)²) I with σ₀ = 0.05 m, σ_v = 0.3 m/s (the synthetic tracker's) at steps
    # t_k = 0.1 k, k = 0…20, linearly interpolated between steps. The forecast
    # used for lead L is the newest frame at or before t_min − L, evaluated τ = t_min − stamp ahead:
    # error = |b|, Mahalanobis d = |b| / sqrt(var(τ)), inside iff d² ≤ −2 ln 0.05 (2-dof chi-square).
    run = crossing(B_PLANTED)
    run.forecast_bias_m = (0.3, -0.4)
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, run)
    data = load_review_data(path)
    (event,), _ = event_search.find_events(data, clearance_m=0.5)
    checks = {c["lead_s"]: c for c in check_event(event, data)}
    outcomes = set()
    for lead in (0.5, 1.0, 2.0):
        check = checks[lead]
        assert check["available"], check
        stamp = T0 + np.floor((event.t_min - lead - T0) * 10.0 + 1e-9) / 10.0
        tau = event.t_min - stamp
        # Beyond the 20-step (2 s) horizon the covariance keeps its last rate of growth
        # (ObstacleForecast.resampled): extrapolate the line through steps 19 and 20.
        k = min(int(np.floor(tau / 0.1 + 1e-9)), 19)
        steps = 0.1 * np.array([k, k + 1])
        step_variance = 0.05**2 + (0.3 * steps) ** 2
        variance = step_variance[0] + (step_variance[1] - step_variance[0]) * (tau - steps[0]) / 0.1
        assert check["extrapolated"] == (tau > 2.0)
        expected_d = 0.5 / np.sqrt(variance)
        assert check["forecast_stamp"] == pytest.approx(stamp, abs=1e-6)
        assert check["track_id"] == 1007
        assert check["position_error_m"] == pytest.approx(0.5, abs=1e-5)
        assert check["mahalanobis"] == pytest.approx(expected_d, rel=1e-4)
        assert check["inside_risk_ellipse"] == (expected_d**2 <= -2.0 * np.log(0.05))
        assert check["risk_level"] == pytest.approx(0.05)
        outcomes.add(check["inside_risk_ellipse"])
    assert outcomes == {True, False}  # 0.5 s before: outside (d² ≈ 8.3); 1 s before: inside (d² ≈ 2.4)


def _review(path, out, *extra):
    import argparse

    parser = argparse.ArgumentParser()
    add_arguments(parser)
    return review(parser.parse_args([str(path), "--out", str(out), "--quiet", *extra]), Progress(enabled=False))


def test_without_crowd_truth_the_review_uses_forecasts_and_says_so(tmp_path):
    path = tmp_path / "bag"
    topics = [t for t in synthetic.ALL_TOPICS if t not in ("crowd_truth", "crowd_truth_ids")]
    synthetic.write_review_bag(path, crossing(B_PLANTED), topics=topics)
    data, found, files, _ = _review(path, tmp_path / "out")
    assert data.obstacles.source == "obstacle_forecast"
    assert len(found) == 1 and found[0].obstacle_id == 1007       # the tracker's id
    assert found[0].min_clearance_m == pytest.approx(PLANTED_CLEARANCE, abs=0.01)
    report = (tmp_path / "out" / "report.md").read_text()
    assert "**fallback:** no `crowd_truth`" in report
    assert "`crowd_truth` (geometry_msgs/msg/PoseArray)" in report   # listed under missing topics
    document = json.loads((tmp_path / "out" / "events.json").read_text())
    assert document["obstacle_source"] == "obstacle_forecast"
    assert "crowd_truth" in [m["name"] for m in document["missing_topics"]]


def test_with_detections_only_events_are_anonymous(tmp_path):
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, crossing(B_PLANTED), topics=["odom", "detections"])
    data, found, _, _ = _review(path, tmp_path / "out")
    assert data.obstacles.source == "detections"
    assert len(found) == 1 and found[0].obstacle_id is None
    assert found[0].min_clearance_m == pytest.approx(PLANTED_CLEARANCE, abs=0.03)   # sampled, not refined
    report = (tmp_path / "out" / "report.md").read_text()
    assert "raw `detections` without identities" in report
    for name in ("plan", "planner_status", "diagnostics", "cmd_vel", "obstacle_forecast"):
        assert f"`{name}` (" in report


def test_namespaced_topics_and_the_recorded_radius(tmp_path):
    # A bag of robot "r1" (topics /r1/odom, /r1/plan ...) whose planner status carries its radius.
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, crossing(B_PLANTED), namespace="r1", robot_radius_m=0.4)
    data = load_review_data(path, namespace="r1")
    assert data.used["odom"] == "/r1/odom" and data.used["planner_status"] == "/r1/planner_status"
    assert data.robot_radius_m == pytest.approx(0.4)
    assert data.robot_radius_source == "planner_status robot_radius_m"
    (event,), _ = event_search.find_events(data, clearance_m=0.5)
    assert event.min_clearance_m == pytest.approx(PLANTED_CLEARANCE - 0.1, abs=0.01)  # 0.1 m larger disc
    assert load_review_data(path, namespace="r2").missing[0][0] == "odom"


def test_ids_received_apart_from_their_poses_are_paired(tmp_path):
    # As recorded from a live graph: each frame's ids arrive a few ms after, or before, its poses.
    run = crossing(B_PLANTED)
    run.ids_log_offsets_ns = (3_000_000, -2_000_000, 7_000_000, 0)
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, run)
    data = load_review_data(path)
    assert not data.obstacles.anonymous and data.notes == []
    assert set(np.unique(data.obstacles.ids)) == {3, 7}
    (event,), _ = event_search.find_events(data, clearance_m=0.5)
    assert event.obstacle_id == 7
    assert event.min_clearance_m == pytest.approx(PLANTED_CLEARANCE, abs=0.01)


def test_forecast_rows_read_from_bytes_match_the_codec(tmp_path, monkeypatch):
    # Obstacles taken from the forecasts' first step are read straight from the cloud bytes; the
    # reference is the package's codec (riskbound.ros.forecast_codec.cloud_to_forecast) on each cloud.
    run = crossing(B_PLANTED, duration_s=3.0)
    path = tmp_path / "bag"
    synthetic.write_review_bag(path, run, topics=["odom", "obstacle_forecast"])
    data = load_review_data(path)
    rows = []
    for i in range(len(data.forecasts)):
        forecast = data.forecasts.get(i)
        for j, track in enumerate(forecast.track_ids):
            rows.append((track, data.forecasts.stamps_s[i] + forecast.times[0], *forecast.positions[j, 0],
                         forecast.headings[j, 0], *forecast.half_extents[j]))
    rows.sort()
    obs = data.obstacles
    got = np.column_stack([obs.ids, obs.times_s, obs.positions, obs.headings, obs.half_extents])
    np.testing.assert_array_equal(got, np.array(rows))
    assert len(rows) == 2 * len(run.frame_times_s)
    # Clouds of another layout go through the codec: the same rows.
    monkeypatch.setattr(obstacle_rows, "_first_step", lambda raw: None)
    obs = load_review_data(path).obstacles
    np.testing.assert_array_equal(np.column_stack([obs.ids, obs.times_s, obs.positions, obs.headings,
                                                   obs.half_extents]), np.array(rows))
