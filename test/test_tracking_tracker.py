"""The multi-target tracker on scripted walkers and on bad input."""

import logging

import numpy as np
import pytest

from riskbound.tracking.settings import TRACKER_SPECS, TrackerSettings
from riskbound.tracking.tracker import MultiTargetTracker


def _nearest_confirmed(tracker, truth):
    snapshot = tracker.snapshot()
    confirmed = snapshot.confirmed
    ids, positions = snapshot.track_ids[confirmed], snapshot.positions[confirmed]
    rows = [int(np.argmin(np.linalg.norm(positions - p, axis=1))) for p in truth]
    return ids[rows], positions[rows]


def _crossing_ids(model_name, angle_deg, seed, separation_m=0.4, noise_m=0.1, miss_rate=0.05):
    """Two people at 1.3 m/s whose paths cross at `angle_deg`, passing `separation_m` apart at
    t = 5 s; detections at 10 Hz with Gaussian noise, 5 % missed, rows in random order.
    Returns the id of the confirmed track nearest to each person at every scan after 1 s."""
    rng = np.random.default_rng(seed)
    tracker = MultiTargetTracker(TrackerSettings(motion_model=model_name, position_noise_m=noise_m))
    a = np.array([1.0, 0.0])
    b = np.array([np.cos(np.radians(angle_deg)), np.sin(np.radians(angle_deg))])
    offset = np.array([-(a - b)[1], (a - b)[0]]) / np.linalg.norm(a - b) * separation_m / 2
    ids = []
    for k in range(101):
        t = 0.1 * k
        truth = np.array([a * 1.3 * (t - 5.0) - offset, b * 1.3 * (t - 5.0) + offset])
        seen = [i for i in rng.permutation(2) if rng.random() > miss_rate]
        tracker.process(t, truth[seen] + rng.normal(0.0, noise_m, (len(seen), 2)))
        if k >= 10:
            assert tracker.confirmed_count == 2
            ids.append(_nearest_confirmed(tracker, truth)[0])
    return np.array(ids)


@pytest.mark.parametrize("model_name", ["constant_velocity", "unicycle"])
@pytest.mark.parametrize("angle_deg", [180, 90, 30])
def test_two_walkers_crossing_at_close_range_keep_their_ids(model_name, angle_deg):
    # Realistic noise: 0.1 m per axis for a person detector, 5 % missed detections (value from
    # memory); the people pass 0.4 m apart centre to centre (shoulders nearly touching).
    for seed in range(4):
        ids = _crossing_ids(model_name, angle_deg, seed)
        assert np.all(ids == ids[0]), f"seed {seed}: ids changed {ids}"
        assert ids[0, 0] != ids[0, 1]


def _turning_rmse(model_name, seed, radius_m=2.5, speed_mps=1.2):
    """Position RMSE of the track of one person walking a circle (10 Hz, 0.1 m noise), after 3 s."""
    rng = np.random.default_rng(seed)
    tracker = MultiTargetTracker(TrackerSettings(motion_model=model_name))
    rate = speed_mps / radius_m
    errors = []
    for k in range(151):
        t = 0.1 * k
        truth = radius_m * np.array([np.sin(rate * t), 1.0 - np.cos(rate * t)])
        tracker.process(t, (truth + rng.normal(0.0, 0.1, 2))[None])
        if t >= 3.0:
            _, position = _nearest_confirmed(tracker, truth[None])
            errors.append(np.sum((position[0] - truth) ** 2))
    return np.sqrt(np.mean(errors))


def test_turning_walker_is_tracked_better_by_the_unicycle_filter():
    # A person turning steadily (2.5 m radius at 1.2 m/s) follows the unicycle model exactly and
    # the constant-velocity model only through its process noise.
    cv = np.mean([_turning_rmse("constant_velocity", seed) for seed in range(4)])
    unicycle = np.mean([_turning_rmse("unicycle", seed) for seed in range(4)])
    assert unicycle < 0.9 * cv
    assert unicycle < 0.1  # better than a single detection (0.1 m per axis)


def _confirmed_walker(settings=None, scans=10):
    tracker = MultiTargetTracker(settings or TrackerSettings())
    for k in range(scans):
        tracker.process(0.1 * k, [[0.12 * k, 0.0]])
    assert tracker.confirmed_count == 1
    return tracker


def test_late_scan_within_tolerance_updates_the_track_without_moving_time():
    tracker = _confirmed_walker()
    state_before = tracker._X.copy()
    covariance_before = tracker._P.copy()
    report = tracker.process(0.85, [[0.12 * 8.5 + 0.05, 0.0]])
    assert report.status == "late"
    assert report.detection_track_ids.tolist() == [1]
    assert tracker.time_s == pytest.approx(0.9)
    assert np.trace(tracker._P[0]) < np.trace(covariance_before[0])
    expected, _ = tracker.model.late_update(state_before, covariance_before, np.array([[1.07, 0.0]]), 0.05)
    np.testing.assert_allclose(tracker._X, expected, atol=1e-12)


def test_scan_later_than_the_tolerance_is_dropped_with_the_reason():
    tracker = _confirmed_walker(TrackerSettings(late_tolerance_s=0.2))
    state_before = tracker._X.copy()
    report = tracker.process(0.5, [[0.6, 0.0]])
    assert report.status == "dropped"
    assert "late_tolerance_s=0.2" in report.reason and "0.400 s older" in report.reason
    np.testing.assert_array_equal(tracker._X, state_before)


def test_time_going_backwards_resets_with_a_warning(caplog):
    tracker = _confirmed_walker()
    with caplog.at_level(logging.WARNING, logger="riskbound.tracking.tracker"):
        report = tracker.process(-5.0, [[3.0, 3.0]])
    assert report.status == "reset"
    assert "backward_jump_reset_s" in report.reason
    assert any("time went backwards" in record.message for record in caplog.records)
    assert tracker.track_count == 1 and tracker.confirmed_count == 0
    assert report.detection_track_ids[0] > 1  # ids are not reused after a reset
    assert tracker.time_s == -5.0


def test_nan_and_inf_rows_are_dropped_and_counted():
    tracker = _confirmed_walker()
    report = tracker.process(1.0, [[np.nan, 0.0], [1.2, 0.0], [np.inf, 1.0]])
    assert report.invalid_detections == 2
    assert report.detection_track_ids.tolist() == [-1, 1, -1]
    assert tracker.track_count == 1


def test_non_finite_stamp_is_dropped():
    tracker = _confirmed_walker()
    report = tracker.process(float("nan"), [[1.0, 0.0]])
    assert report.status == "dropped" and "not finite" in report.reason


def test_empty_scans_age_the_tracks_until_deletion():
    tracker = _confirmed_walker(TrackerSettings(delete_after_s=0.5))
    spread = [np.trace(tracker.forecast().covariances[0, 0])]
    for k in range(1, 6):
        report = tracker.process(0.9 + 0.1 * k, np.zeros((0, 2)))
        assert report.status == "updated" and tracker.confirmed_count == 1
        spread.append(np.trace(tracker.forecast().covariances[0, 0]))
    assert np.all(np.diff(spread) > 0)
    tracker.process(1.5, np.zeros((0, 2)))
    assert tracker.track_count == 0
    assert tracker.forecast().track_count == 0


def test_clutter_never_confirms():
    rng = np.random.default_rng(13)
    tracker = MultiTargetTracker()
    for k in range(50):
        tracker.process(0.1 * k, rng.uniform(-50, 50, (3, 2)))
        assert tracker.confirmed_count == 0
    assert tracker.track_count <= 3 * tracker.settings.confirm_window


def test_track_count_is_capped():
    tracker = MultiTargetTracker(TrackerSettings(max_tracks=4))
    report = tracker.process(0.0, np.column_stack([np.arange(6) * 5.0, np.zeros(6)]))
    assert report.started == 4 and report.refused_starts == 2
    assert report.detection_track_ids.tolist()[4:] == [-1, -1]


@pytest.mark.parametrize("positions, headings", [(np.zeros((3, 3)), None), (np.zeros(3), None),
                                                 (np.zeros((2, 2)), np.zeros(3))])
def test_malformed_input_raises_naming_the_argument(positions, headings):
    with pytest.raises(ValueError, match="positions|headings"):
        MultiTargetTracker().process(0.0, positions, headings)


def test_measured_heading_is_kept_for_a_person_standing_still():
    tracker = MultiTargetTracker()
    for k in range(6):
        tracker.process(0.1 * k, [[1.0, 2.0]], [1.2])
    np.testing.assert_allclose(tracker.forecast().headings, 1.2)
    ignoring = MultiTargetTracker(TrackerSettings(use_heading=False))
    for k in range(6):
        ignoring.process(0.1 * k, [[1.0, 2.0]], [1.2])
    np.testing.assert_allclose(ignoring.forecast().headings, 0.0)


def test_unicycle_uses_measured_headings():
    rng = np.random.default_rng(14)
    positions = [np.array([np.cos(2.0), np.sin(2.0)]) * 0.1 * k + rng.normal(0, 0.1, 2) for k in range(30)]
    headings = 2.0 + rng.normal(0, 0.3, 30)
    trackers = {}
    for use_heading in (True, False):
        tracker = MultiTargetTracker(TrackerSettings(motion_model="unicycle", use_heading=use_heading))
        for k in range(30):
            tracker.process(0.1 * k, positions[k][None], [headings[k]])
            if k == 1 and use_heading:
                # The second detection hands over at once: its heading was measured.
                assert tracker._converted.tolist() == [True]
        trackers[use_heading] = tracker
    with_heading, without = trackers[True], trackers[False]
    sigma = np.sqrt(with_heading._P[0, 2, 2])
    assert sigma < np.sqrt(without._P[0, 2, 2])
    assert abs(with_heading.forecast().headings[0, 0] - 2.0) < 3.0 * sigma


def test_changing_the_motion_model_restarts_and_other_changes_keep_tracks():
    tracker = _confirmed_walker()
    tracker.configure(tracker.settings.with_changes(accel_noise_mps2=2.0, forecast_steps=10))
    assert tracker.confirmed_count == 1
    assert tracker.forecast().positions.shape == (1, 11, 2)
    tracker.configure(tracker.settings.with_changes(motion_model="unicycle"))
    assert tracker.track_count == 0 and tracker.time_s is None


def test_settings_reject_out_of_range_values_naming_parameter_and_range():
    with pytest.raises(ValueError, match=r"gate_probability=1.0 is out of range: must be in \[0.5, 1.0\)"):
        TrackerSettings(gate_probability=1.0)
    with pytest.raises(ValueError, match=r"confirm_hits=4 is out of range: must be in \[1, confirm_window=3\]"):
        TrackerSettings(confirm_hits=4, confirm_window=3)
    with pytest.raises(ValueError, match="late_tolerance_s=3.0 is out of range"):
        TrackerSettings(late_tolerance_s=3.0, backward_jump_reset_s=2.0)
    with pytest.raises(ValueError, match="motion_model='kalman' is not allowed"):
        TrackerSettings(motion_model="kalman")
    with pytest.raises(ValueError, match="not a tracker setting"):
        TrackerSettings().with_changes(horizon_steps=3)
    with pytest.raises(ValueError, match="wrong type"):
        TrackerSettings(confirm_hits=2.5)
    assert TrackerSettings().needs_reset(TrackerSettings(motion_model="unicycle"))
    assert not TrackerSettings().needs_reset(TrackerSettings(accel_noise_mps2=2.0))


def test_settings_table_and_dataclass_agree():
    defaults = TrackerSettings()
    assert [spec.name for spec in TRACKER_SPECS] == list(defaults.__dataclass_fields__)
    for spec in TRACKER_SPECS:
        assert getattr(defaults, spec.name) == spec.default
        assert spec.check(spec.default) is None
    # The forecast grid defaults equal the planner's (common practice: keep the two in step).
    from riskbound.planning.settings import PlannerSettings
    assert defaults.forecast_steps == PlannerSettings().horizon_steps
    assert defaults.forecast_step_s == PlannerSettings().step_s
