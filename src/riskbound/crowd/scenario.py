"""Crowd scenario files: YAML in, a validated `Scenario` out.

Invalid files raise ValueError naming the field (as a path such as `sources[1].rate_per_s`), the
value found and what is allowed, so a scenario author can fix the file without reading code.

File layout (all lengths in metres, times in seconds, the planning frame's x-y plane):

    name: campus_plaza                # free text
    description: ...                  # free text
    duration_s: 60                    # recorded time after the warm-up
    warmup_s: 20                      # simulated before recording starts, so the scene is populated
    sim_step_s: 0.05                  # integration step
    walker_radius_m: 0.25             # body radius (disc) of every walker
    max_walkers: 120                  # arrivals beyond this many present walkers are turned away
    desired_speed:                    # v⁰ distribution, clipped to [min_m_s, max_m_s]
      distribution: normal            # normal | uniform | constant
      mean_m_s: 1.34                  # published mean and sd: Phys. Rev. E 51, 4282 (1995) (value
      sd_m_s: 0.26                    #   from memory); these are also the defaults
      min_m_s: 0.6                    # our shipped files' clip (no source); default 0.3
      max_m_s: 2.0                    # our shipped files' clip (no source); default 2.5
    robot_start: [x, y]               # hints for demos: where a robot starts and where it goes
    robot_goal: [x, y]
    walls: [[[x1, y1], [x2, y2]], ...]            # line segments
    obstacles: [{centre: [x, y], radius_m: r}]    # fixed discs (pillars, bins, planters)
    waypoints:                                    # named discs walkers aim for
      gate_west: {centre: [x, y], radius_m: 1.5}
    routes:
      commuters:
        links:                                    # branching: waypoint → {next waypoint: probability}
          gate_west: {hall: 1.0}
          hall: {platform_1: 0.6, platform_2: 0.4}
        exits: [platform_1, platform_2]           # optional; waypoints without links are exits too
    sources:                                      # Poisson arrivals at a waypoint
      - {waypoint: gate_west, route: commuters, rate_per_s: 0.5, group_sizes: {1: 0.7, 2: 0.3}}
    initial:                                      # walkers already present at t = 0
      - {count: 40, region: {x_min: .., x_max: .., y_min: .., y_max: ..}, route: strollers,
         group_sizes: {1: 1.0}}

A walker starting in a region picks its first waypoint among the route's linked waypoints; a
walker reaching a waypoint leaves the scene if it is one of the route's exits (or has no links),
and otherwise picks the next waypoint by the route's probabilities. A source may sit on an exit:
its walkers only leave there when they come back to it.
"""

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import yaml

from riskbound.crowd.social_force import crossed_walls

DISTRIBUTIONS = ("constant", "normal", "uniform")

_TOP_LEVEL = ("name", "description", "duration_s", "warmup_s", "sim_step_s", "walker_radius_m",
              "max_walkers", "desired_speed", "robot_start", "robot_goal", "walls", "obstacles",
              "waypoints", "routes", "sources", "initial")
_REQUIRED = ("name", "duration_s", "waypoints", "routes")

# Probabilities of one branching or group-size table must add up to one within this.
_PROBABILITY_TOLERANCE = 1e-6


@dataclass(frozen=True)
class SpeedDistribution:
    distribution: str
    mean_m_s: float
    sd_m_s: float
    low_m_s: float
    high_m_s: float
    min_m_s: float
    max_m_s: float

    def sample(self, rng, count):
        """Draw `count` desired speeds [m/s]."""
        if self.distribution == "constant":
            speeds = np.full(count, self.mean_m_s)
        elif self.distribution == "normal":
            speeds = rng.normal(self.mean_m_s, self.sd_m_s, count)
        else:
            speeds = rng.uniform(self.low_m_s, self.high_m_s, count)
        return np.clip(speeds, self.min_m_s, self.max_m_s)


@dataclass(frozen=True)
class Waypoint:
    name: str
    centre: np.ndarray
    radius_m: float


@dataclass(frozen=True)
class Route:
    links: dict       # waypoint → {next waypoint: probability}
    exits: frozenset  # waypoints where walkers leave the scene

    def is_exit(self, waypoint):
        return waypoint in self.exits or waypoint not in self.links


@dataclass(frozen=True)
class Source:
    waypoint: str
    route: str
    rate_per_s: float
    group_sizes: dict  # size → probability


@dataclass(frozen=True)
class InitialCrowd:
    count: int
    region: tuple  # (x_min, x_max, y_min, y_max)
    route: str
    group_sizes: dict


@dataclass(frozen=True)
class Scenario:
    name: str
    description: str
    duration_s: float
    warmup_s: float
    sim_step_s: float
    walker_radius_m: float
    max_walkers: int
    desired_speed: SpeedDistribution
    robot_start: np.ndarray  # (2,) or None
    robot_goal: np.ndarray   # (2,) or None
    walls: np.ndarray        # (M, 2, 2)
    obstacle_centres: np.ndarray  # (K, 2)
    obstacle_radii: np.ndarray    # (K,)
    waypoints: dict          # name → Waypoint
    routes: dict             # route → Route
    sources: tuple
    initial: tuple

    def bounds(self):
        """(x_min, x_max, y_min, y_max) of everything the file places, for clutter and plots."""
        points = [w.centre for w in self.waypoints.values()]
        points += list(self.walls.reshape(-1, 2))
        for crowd in self.initial:
            x_min, x_max, y_min, y_max = crowd.region
            points += [np.array([x_min, y_min]), np.array([x_max, y_max])]
        for hint in (self.robot_start, self.robot_goal):
            if hint is not None:
                points.append(hint)
        xy = np.array(points, dtype=float)
        return float(xy[:, 0].min()), float(xy[:, 0].max()), float(xy[:, 1].min()), float(xy[:, 1].max())


def load_scenario(path):
    """Read and validate a scenario file. Raises ValueError naming the file and the field."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as error:
        raise ValueError(f"{path}: cannot read scenario file: {error.strerror or error}") from None
    try:
        document = yaml.safe_load(text)
    except yaml.YAMLError as error:
        raise ValueError(f"{path}: not valid YAML: {error}") from None
    try:
        return parse_scenario(document)
    except ValueError as error:
        raise ValueError(f"{path}: {error}") from None


def parse_scenario(document):
    """Validate a scenario already loaded into Python objects (see the module docstring)."""
    if not isinstance(document, dict):
        raise ValueError(f"scenario must be a mapping of fields, got {type(document).__name__}")
    unknown = sorted(set(map(str, document)) - set(_TOP_LEVEL))
    if unknown:
        raise ValueError(f"unknown field {unknown[0]!r}: allowed fields are {', '.join(_TOP_LEVEL)}")
    for name in _REQUIRED:
        if name not in document:
            raise ValueError(f"missing field {name!r} (required: {', '.join(_REQUIRED)})")

    waypoints = _waypoints(document["waypoints"])
    routes = _routes(document["routes"], waypoints)
    walls = _walls(document.get("walls", []))
    centres, radii = _obstacles(document.get("obstacles", []))
    sources = tuple(_source(item, f"sources[{i}]", waypoints, routes)
                    for i, item in enumerate(_list(document.get("sources", []), "sources")))
    initial = tuple(_initial(item, f"initial[{i}]", routes)
                    for i, item in enumerate(_list(document.get("initial", []), "initial")))
    if not sources and not initial:
        raise ValueError("sources and initial are both empty: the scenario would have no walkers")

    scenario = Scenario(
        name=_text(document["name"], "name"),
        description=_text(document.get("description", ""), "description"),
        duration_s=_number(document["duration_s"], "duration_s", low=0.0, low_open=True),
        warmup_s=_number(document.get("warmup_s", 10.0), "warmup_s", low=0.0),
        sim_step_s=_number(document.get("sim_step_s", 0.05), "sim_step_s", low=0.001, high=0.2),
        walker_radius_m=_number(document.get("walker_radius_m", 0.25), "walker_radius_m", low=0.1, high=1.0),
        max_walkers=_integer(document.get("max_walkers", 200), "max_walkers", low=1, high=5000),
        desired_speed=_speed(document.get("desired_speed", {}), "desired_speed"),
        robot_start=_optional_point(document.get("robot_start"), "robot_start"),
        robot_goal=_optional_point(document.get("robot_goal"), "robot_goal"),
        walls=walls,
        obstacle_centres=centres,
        obstacle_radii=radii,
        waypoints=waypoints,
        routes=routes,
        sources=sources,
        initial=initial,
    )
    initial_count = sum(crowd.count for crowd in initial)
    if initial_count > scenario.max_walkers:
        raise ValueError(f"initial: {initial_count} walkers exceed max_walkers={scenario.max_walkers}")
    _check_route_legs(scenario)
    return scenario


def _waypoints(value):
    mapping = _mapping(value, "waypoints")
    if not mapping:
        raise ValueError("waypoints is empty: name at least one waypoint")
    result = {}
    for name, item in mapping.items():
        field = f"waypoints.{name}"
        item = _mapping(item, field, allowed=("centre", "radius_m"), required=("centre", "radius_m"))
        result[str(name)] = Waypoint(str(name), _point(item["centre"], f"{field}.centre"),
                                     _number(item["radius_m"], f"{field}.radius_m", low=0.05, high=50.0))
    return result


def _routes(value, waypoints):
    mapping = _mapping(value, "routes")
    if not mapping:
        raise ValueError("routes is empty: define at least one route")
    result = {}
    for route_name, route in mapping.items():
        field = f"routes.{route_name}"
        route = _mapping(route, field, allowed=("links", "exits"), required=("links",))
        links = _mapping(route["links"], f"{field}.links")
        if not links:
            raise ValueError(f"{field}.links is empty: give each waypoint its next waypoints and probabilities")
        table = {}
        for here, choices in links.items():
            _known_waypoint(here, f"{field}.links.{here}", waypoints)
            choices = _mapping(choices, f"{field}.links.{here}")
            for there in choices:
                _known_waypoint(there, f"{field}.links.{here}.{there}", waypoints)
                if str(there) == str(here):
                    raise ValueError(f"{field}.links.{here}.{there}: a waypoint cannot lead to itself")
            table[str(here)] = _probabilities(choices, f"{field}.links.{here}", key=str)
        exits = _list(route.get("exits", []), f"{field}.exits")
        for i, name in enumerate(exits):
            _known_waypoint(name, f"{field}.exits[{i}]", waypoints)
        result[str(route_name)] = Route(table, frozenset(map(str, exits)))
    return result


def _walls(value):
    walls = []
    for i, item in enumerate(_list(value, "walls")):
        field = f"walls[{i}]"
        if not isinstance(item, (list, tuple)) or len(item) != 2:
            raise ValueError(f"{field}={item!r}: must be a segment [[x1, y1], [x2, y2]]")
        start, end = _point(item[0], f"{field}[0]"), _point(item[1], f"{field}[1]")
        if np.linalg.norm(end - start) < 1e-6:
            raise ValueError(f"{field}={item!r}: the two ends coincide")
        walls.append([start, end])
    return np.array(walls, dtype=float).reshape(-1, 2, 2)


def _obstacles(value):
    centres, radii = [], []
    for i, item in enumerate(_list(value, "obstacles")):
        field = f"obstacles[{i}]"
        item = _mapping(item, field, allowed=("centre", "radius_m"), required=("centre", "radius_m"))
        centres.append(_point(item["centre"], f"{field}.centre"))
        radii.append(_number(item["radius_m"], f"{field}.radius_m", low=0.0, low_open=True, high=50.0))
    return np.array(centres, dtype=float).reshape(-1, 2), np.array(radii, dtype=float)


def _source(item, field, waypoints, routes):
    item = _mapping(item, field, allowed=("waypoint", "route", "rate_per_s", "group_sizes"),
                    required=("waypoint", "route", "rate_per_s"))
    waypoint = _known_waypoint(item["waypoint"], f"{field}.waypoint", waypoints)
    route = _known_route(item["route"], f"{field}.route", routes)
    if waypoint not in routes[route].links:
        raise ValueError(f"{field}.waypoint={waypoint!r}: route {route!r} links it to no next waypoint, "
                         f"allowed values are {', '.join(sorted(routes[route].links))}")
    return Source(waypoint, route,
                  _number(item["rate_per_s"], f"{field}.rate_per_s", low=0.0, low_open=True, high=100.0),
                  _group_sizes(item.get("group_sizes", {1: 1.0}), f"{field}.group_sizes"))


def _initial(item, field, routes):
    item = _mapping(item, field, allowed=("count", "region", "route", "group_sizes"),
                    required=("count", "region", "route"))
    region = _mapping(item["region"], f"{field}.region", allowed=("x_min", "x_max", "y_min", "y_max"),
                      required=("x_min", "x_max", "y_min", "y_max"))
    bounds = tuple(_number(region[key], f"{field}.region.{key}") for key in ("x_min", "x_max", "y_min", "y_max"))
    if bounds[1] <= bounds[0] or bounds[3] <= bounds[2]:
        raise ValueError(f"{field}.region={region!r}: needs x_min < x_max and y_min < y_max")
    return InitialCrowd(_integer(item["count"], f"{field}.count", low=1, high=5000), bounds,
                        _known_route(item["route"], f"{field}.route", routes),
                        _group_sizes(item.get("group_sizes", {1: 1.0}), f"{field}.group_sizes"))


def _speed(value, field):
    item = _mapping(value, field, allowed=("distribution", "mean_m_s", "sd_m_s", "low_m_s", "high_m_s",
                                           "min_m_s", "max_m_s"))
    distribution = item.get("distribution", "normal")
    if distribution not in DISTRIBUTIONS:
        raise ValueError(f"{field}.distribution={distribution!r}: allowed values are "
                         f"{', '.join(DISTRIBUTIONS)}")
    # Phys. Rev. E 51, 4282 (1995): desired speeds roughly Gaussian, mean 1.34 m/s,
    # standard deviation 0.26 m/s (value from memory of that paper).
    speed = SpeedDistribution(
        distribution=distribution,
        mean_m_s=_number(item.get("mean_m_s", 1.34), f"{field}.mean_m_s", low=0.0, low_open=True, high=5.0),
        sd_m_s=_number(item.get("sd_m_s", 0.26), f"{field}.sd_m_s", low=0.0, high=2.0),
        low_m_s=_number(item.get("low_m_s", 1.0), f"{field}.low_m_s", low=0.0, low_open=True, high=5.0),
        high_m_s=_number(item.get("high_m_s", 1.6), f"{field}.high_m_s", low=0.0, low_open=True, high=5.0),
        min_m_s=_number(item.get("min_m_s", 0.3), f"{field}.min_m_s", low=0.0, low_open=True, high=5.0),
        max_m_s=_number(item.get("max_m_s", 2.5), f"{field}.max_m_s", low=0.0, low_open=True, high=5.0),
    )
    if speed.min_m_s > speed.max_m_s:
        raise ValueError(f"{field}.min_m_s={speed.min_m_s!r}: must not exceed max_m_s={speed.max_m_s!r}")
    if distribution == "uniform" and speed.low_m_s > speed.high_m_s:
        raise ValueError(f"{field}.low_m_s={speed.low_m_s!r}: must not exceed high_m_s={speed.high_m_s!r}")
    return speed


def _check_route_legs(scenario):
    """A leg that runs through a wall would pin its walkers against it: reject it up front."""
    for route_name, route in scenario.routes.items():
        for here, choices in route.links.items():
            for there in choices:
                crossed = crossed_walls(scenario.waypoints[here].centre, scenario.waypoints[there].centre, scenario.walls)
                if len(crossed):
                    raise ValueError(f"routes.{route_name}.links.{here}.{there}: the straight leg from "
                                     f"{here!r} to {there!r} crosses walls[{crossed[0]}]; add a waypoint around it")


def _group_sizes(value, field):
    return _probabilities(value, field, key=lambda size: _integer(size, f"{field} size {size!r}", low=1, high=10))


def _probabilities(value, field, key):
    mapping = _mapping(value, field)
    if not mapping:
        raise ValueError(f"{field} is empty: give at least one choice with its probability")
    table = {}
    for choice, probability in mapping.items():
        table[key(choice)] = _number(probability, f"{field}.{choice}", low=0.0, high=1.0)
    total = sum(table.values())
    if abs(total - 1.0) > _PROBABILITY_TOLERANCE:
        raise ValueError(f"{field}: probabilities add up to {total:g}, must add up to 1")
    return table


def _known_waypoint(value, field, waypoints):
    if str(value) not in waypoints:
        raise ValueError(f"{field}={value!r}: unknown waypoint, allowed values are {', '.join(sorted(waypoints))}")
    return str(value)


def _known_route(value, field, routes):
    if str(value) not in routes:
        raise ValueError(f"{field}={value!r}: unknown route, allowed values are {', '.join(sorted(routes))}")
    return str(value)


def _mapping(value, field, allowed=None, required=()):
    if not isinstance(value, dict):
        raise ValueError(f"{field}={value!r}: must be a mapping")
    if allowed is not None:
        unknown = sorted(set(map(str, value)) - set(allowed))
        if unknown:
            raise ValueError(f"{field}.{unknown[0]}: unknown field, allowed fields are {', '.join(allowed)}")
    for name in required:
        if name not in value:
            raise ValueError(f"{field}.{name} is missing (required: {', '.join(required)})")
    return value


def _list(value, field):
    if not isinstance(value, list):
        raise ValueError(f"{field}={value!r}: must be a list")
    return value


def _text(value, field):
    if not isinstance(value, str):
        raise ValueError(f"{field}={value!r}: must be text")
    return value


def _number(value, field, low=None, high=None, low_open=False):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ValueError(f"{field}={value!r}: must be a finite number")
    too_low = low is not None and (value < low or (low_open and value == low))
    if too_low or (high is not None and value > high):
        left = "(" if low_open else "["
        allowed = f"{left}{'-inf' if low is None else low}, {'inf' if high is None else high}]"
        raise ValueError(f"{field}={value!r}: out of range, allowed values are {allowed}")
    return float(value)


def _integer(value, field, low, high):
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"{field}={value!r}: must be a whole number in [{low}, {high}]")
    if not low <= value <= high:
        raise ValueError(f"{field}={value!r}: out of range, allowed values are [{low}, {high}]")
    return int(value)


def _point(value, field):
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        raise ValueError(f"{field}={value!r}: must be a point [x, y]")
    return np.array([_number(value[0], f"{field}[0]"), _number(value[1], f"{field}[1]")])


def _optional_point(value, field):
    return None if value is None else _point(value, field)
