"""Crowd scenarios: file validation, arrivals, branching, groups, speeds and determinism."""

import copy
from pathlib import Path

import numpy as np
import pytest
import yaml
from scipy import stats

from riskbound.crowd.scenario import load_scenario, parse_scenario
from riskbound.crowd.simulate import simulate

CONFIG = Path(__file__).resolve().parent.parent / "config"
SCENARIO_FILES = sorted(CONFIG.glob("crowd_*.yaml"))

# An open floor: arrivals at `gate`, a hub 4 m east, then branch A (north-east) or B (south-east).
MINIMAL = {
    "name": "test_floor",
    "duration_s": 5.0,
    "warmup_s": 0.0,
    "waypoints": {
        "gate": {"centre": [0.0, 0.0], "radius_m": 3.0},
        "hub": {"centre": [6.0, 0.0], "radius_m": 1.0},
        "a": {"centre": [9.0, 3.0], "radius_m": 1.0},
        "b": {"centre": [9.0, -3.0], "radius_m": 1.0},
    },
    "routes": {"split": {"links": {"gate": {"hub": 1.0}, "hub": {"a": 0.7, "b": 0.3}}}},
    "sources": [{"waypoint": "gate", "route": "split", "rate_per_s": 1.0}],
}


def scenario_with(**changes):
    document = copy.deepcopy(MINIMAL)
    document.update(changes)
    return parse_scenario(document)


def test_committed_scenarios_load_with_robot_hints():
    assert {p.name for p in SCENARIO_FILES} >= {"crowd_station_concourse.yaml", "crowd_warehouse_cross_aisle.yaml",
                                                "crowd_campus_plaza.yaml", "crowd_courtyard_40.yaml"}
    for path in SCENARIO_FILES:
        scenario = load_scenario(path)
        assert scenario.robot_start is not None and scenario.robot_goal is not None, path
        x_min, x_max, y_min, y_max = scenario.bounds()
        for hint in (scenario.robot_start, scenario.robot_goal):
            assert x_min <= hint[0] <= x_max and y_min <= hint[1] <= y_max, path


def test_robot_crossing_in_committed_scenarios_is_clear_of_fixed_obstacles_and_walls():
    # The planner avoids people, not furniture: the straight crossing from robot_start to
    # robot_goal must keep a 0.5 m robot clear of walls and obstacles (geometric check, no source).
    for path in SCENARIO_FILES:
        scenario = load_scenario(path)
        line = np.linspace(scenario.robot_start, scenario.robot_goal, 400)
        for centre, radius in zip(scenario.obstacle_centres, scenario.obstacle_radii):
            assert np.min(np.linalg.norm(line - centre, axis=1)) - radius > 0.5, path
        for a, b in scenario.walls:
            t = np.clip(((line - a) @ (b - a)) / ((b - a) @ (b - a)), 0.0, 1.0)
            assert np.min(np.linalg.norm(line - (a + t[:, None] * (b - a)), axis=1)) > 0.5, path


def _mutated(change):
    document = copy.deepcopy(MINIMAL)
    change(document)
    return document


INVALID = [
    (lambda d: d.update(crowd_size=3), "unknown field 'crowd_size'"),
    (lambda d: d.pop("waypoints"), "missing field 'waypoints'"),
    (lambda d: d.update(desired_speed={"distribution": "gauss"}),
     "desired_speed.distribution='gauss': allowed values are constant, normal, uniform"),
    (lambda d: d["routes"]["split"]["links"]["hub"].update(a=0.5), "routes.split.links.hub: probabilities add up to 0.8"),
    (lambda d: d["sources"][0].update(waypoint="platform_9"), "sources[0].waypoint='platform_9': unknown waypoint"),
    (lambda d: d["sources"][0].update(rate_per_s=-1), "sources[0].rate_per_s=-1: out of range"),
    (lambda d: d["sources"][0].update(route="nowhere"), "sources[0].route='nowhere': unknown route, allowed values are split"),
    (lambda d: d["sources"][0].update(waypoint="a"), "sources[0].waypoint='a': route 'split' links it to no next waypoint"),
    (lambda d: d["sources"][0].update(group_sizes={1: 0.5, 2: 0.6}), "sources[0].group_sizes: probabilities add up to 1.1"),
    (lambda d: d["waypoints"]["hub"].update(radius_m="big"), "waypoints.hub.radius_m='big': must be a finite number"),
    (lambda d: d["waypoints"]["hub"].pop("centre"), "waypoints.hub.centre is missing"),
    (lambda d: d.update(walls=[[[3.0, -5.0], [3.0, 5.0]]]), "routes.split.links.gate.hub: the straight leg"),
    (lambda d: d.update(walls=[[[1.0, 1.0]]]), "walls[0]="),
    (lambda d: d.update(duration_s=0), "duration_s=0: out of range"),
    (lambda d: d.update(sources=[]), "sources and initial are both empty"),
    (lambda d: d["routes"]["split"].update(exits=["gone"]), "routes.split.exits[0]='gone': unknown waypoint"),
    (lambda d: d.update(initial=[{"count": 3, "route": "split", "region": {"x_min": 1, "x_max": 0, "y_min": 0, "y_max": 1}}]),
     "initial[0].region="),
]


@pytest.mark.parametrize("change, expected", INVALID)
def test_invalid_scenarios_name_the_field(tmp_path, change, expected):
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(_mutated(change)))
    with pytest.raises(ValueError) as error:
        load_scenario(path)
    assert expected in str(error.value)
    assert str(path) in str(error.value)


def test_unreadable_scenario_files_are_value_errors(tmp_path):
    broken = tmp_path / "broken.yaml"
    broken.write_text("name: [unclosed\n")
    with pytest.raises(ValueError, match="not valid YAML"):
        load_scenario(broken)
    with pytest.raises(ValueError, match="cannot read scenario file"):
        load_scenario(tmp_path / "missing.yaml")


def test_arrivals_are_poisson_with_the_configured_rate():
    # A Poisson process of rate λ gives N(T) with mean λT and variance λT; the count over a long
    # run must lie within 4 standard deviations (Poisson process facts, common practice).
    rate, seconds = 1.0, 240.0
    scenario = scenario_with(duration_s=seconds)
    run = simulate(scenario, 5, rate_hz=20.0)
    arrivals = run.spawned + run.turned_away
    assert abs(arrivals - rate * seconds) < 4.0 * np.sqrt(rate * seconds)
    assert run.turned_away == 0
    # Gaps between arrivals are exponential with mean 1/λ: KS test against scipy's exponential.
    # Frames are one integration step (0.05 s) apart, well below the KS test's resolution here.
    first_seen = {}
    for frame in run.frames:
        for walker in frame.ids.tolist():
            first_seen.setdefault(walker, frame.time_s)
    gaps = np.diff(sorted(first_seen.values()))
    assert stats.kstest(gaps, stats.expon(scale=1.0 / rate).cdf).pvalue > 1e-3


def test_branching_follows_the_route_probabilities():
    # Walkers split 0.7 / 0.3 at the hub; chi-square test of the observed split (scipy.stats.chisquare).
    run = simulate(scenario_with(duration_s=240.0), 8, rate_hz=2.0)
    last_position = {}
    for frame in run.frames:
        for walker, position in zip(frame.ids.tolist(), frame.positions):
            last_position[walker] = position
    ends = np.array([p for p in last_position.values() if p[0] > 7.0])  # walkers that went past the hub
    to_a = int(np.sum(ends[:, 1] > 0.0))
    to_b = len(ends) - to_a
    assert len(ends) > 150
    assert stats.chisquare([to_a, to_b], [0.7 * len(ends), 0.3 * len(ends)]).pvalue > 1e-3


def test_groups_walk_together():
    # Groups of three arrive together and keep together on their way (common practice, no source):
    # every member stays within 2.5 m of its group's centre while all three are present.
    scenario = scenario_with(duration_s=40.0, sources=[{"waypoint": "gate", "route": "split", "rate_per_s": 0.1,
                                                        "group_sizes": {3: 1.0}}])
    run = simulate(scenario, 2, rate_hz=5.0)
    assert run.group_sizes and set(run.group_sizes) == {3}
    checked = 0
    for frame in run.frames:
        groups = (frame.ids.astype(int) - 1) // 3  # ids are handed out group by group
        for group in np.unique(groups):
            members = frame.positions[groups == group]
            if len(members) == 3:
                assert np.max(np.linalg.norm(members - members.mean(axis=0), axis=1)) < 2.5
                checked += 1
    assert checked > 50


def test_desired_speeds_follow_the_configured_normal():
    # Desired speeds ~ N(1.34, 0.26) m/s, Phys. Rev. E 51, 4282 (1995) (value from memory);
    # with clipping far out in the tails the draws pass a KS test against scipy's normal.
    scenario = scenario_with(desired_speed={"distribution": "normal", "mean_m_s": 1.34, "sd_m_s": 0.26,
                                            "min_m_s": 0.01, "max_m_s": 5.0})
    speeds = scenario.desired_speed.sample(np.random.default_rng(3), 20000)
    assert stats.kstest(speeds, stats.norm(1.34, 0.26).cdf).pvalue > 1e-3
    clipped = scenario_with(desired_speed={"distribution": "uniform", "low_m_s": 0.5, "high_m_s": 3.0,
                                           "min_m_s": 0.8, "max_m_s": 2.0}).desired_speed
    draws = clipped.sample(np.random.default_rng(3), 5000)
    assert draws.min() == 0.8 and draws.max() == 2.0


def test_walkers_leave_at_exits_and_never_come_back():
    run = simulate(scenario_with(duration_s=60.0), 1, rate_hz=2.0)
    assert run.exited > 30
    seen_last = {}
    for k, frame in enumerate(run.frames):
        for walker in frame.ids.tolist():
            assert seen_last.get(walker, k - 1) == k - 1, "a walker vanished and came back"
            seen_last[walker] = k


def test_same_seed_same_crowd_other_seed_other_crowd():
    scenario = load_scenario(CONFIG / "crowd_campus_plaza.yaml")
    first = simulate(scenario, 21, duration_s=3.0)
    second = simulate(scenario, 21, duration_s=3.0)
    other = simulate(scenario, 22, duration_s=3.0)
    for a, b in zip(first.frames, second.frames):
        assert a.time_s == b.time_s
        np.testing.assert_array_equal(a.ids, b.ids)
        np.testing.assert_array_equal(a.positions, b.positions)
        np.testing.assert_array_equal(a.headings, b.headings)
    assert not np.array_equal(first.frames[-1].positions[:5], other.frames[-1].positions[:5])


def test_simulation_arguments_are_checked():
    scenario = scenario_with()
    with pytest.raises(ValueError, match="rate_hz=7"):
        simulate(scenario, 0, rate_hz=7.0)
    with pytest.raises(ValueError, match="duration_s=-1"):
        simulate(scenario, 0, duration_s=-1.0)


def test_walkers_appear_and_stay_on_the_walkable_side_of_walls():
    # The library waypoint touches the north facade: arrivals drawn in its disc must not appear
    # behind the wall, and nobody ends up outside the three facades (geometric fact, no source).
    scenario = load_scenario(CONFIG / "crowd_campus_plaza.yaml")
    run = simulate(scenario, 3, duration_s=5.0)
    for frame in run.frames:
        assert np.all(frame.positions[:, 0] > 0.0) and np.all(frame.positions[:, 0] < 36.0)
        assert np.all(frame.positions[:, 1] < 28.0)
