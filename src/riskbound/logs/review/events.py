"""Near-miss events: intervals where the robot's disc comes closer than a threshold to an
obstacle's box (a collision when the clearance drops below zero).

Clearance is evaluated at every obstacle observation (robot position interpolated from
odometry), per obstacle id. An event is a run of observations below the threshold; runs of the same
obstacle less than `merge_gap_s` apart are one event, so noise around the threshold does not split
one close pass into many. Onset and end are where the clearance crosses the threshold, linearly
interpolated between the observations on either side. The minimum is refined between the
observations around the lowest sample exactly as riskbound.clearance.closest_approach does (robot
from odometry, obstacle linearly interpolated between observations, a coarse and a fine grid), so
the event that holds the run's closest approach reports the same clearance as the closed-loop
summary.

Relative speed and time-to-collision are taken at onset: obstacle velocity by finite differences
of its observations, robot velocity by finite differences of odometry; time-to-collision is the
time until the footprints touch if both kept those velocities (inf when they never would).
Anonymous obstacles (raw detections) have no track: an event is then a run of frames whose nearest
observation is below the threshold, without refinement, speed or time-to-collision.
"""

from dataclasses import dataclass, field

import numpy as np

from riskbound.clearance import NEIGHBOUR_GAP_PERIODS, Approach, disc_box_clearance, refine_between
from riskbound.logs.review.footprint import time_to_contact

# Planner and watchdog context starts this long before onset.
CONTEXT_S = 2.0
# Statuses at or above this DiagnosticStatus level are failures (2 = ERROR).
FAILURE_LEVEL = 2


@dataclass
class NearMissEvent:
    index: int
    obstacle_id: object           # int, or None for anonymous obstacles
    t_start: float
    t_end: float
    t_min: float
    min_clearance_m: float
    collision: bool
    samples: int                   # observations below the threshold
    robot_xy_at_min: list
    obstacle_xy_at_min: list
    obstacle_heading_at_min: float
    half_extents: list
    relative_speed_mps: float
    time_to_collision_s: float
    rows: slice = None             # the obstacle's rows in data.obstacles (None if anonymous)
    forecast_checks: list = field(default_factory=list)
    planner: dict = field(default_factory=dict)
    watchdog: dict = field(default_factory=dict)
    replan: dict = None
    figure: str = None

    def obstacle_position_at(self, data, time_s):
        """Obstacle position at time_s, linearly interpolated along its observations (NaN outside)."""
        if self.rows is None:
            return np.full(2, np.nan)
        obs = data.obstacles
        times = obs.times_s[self.rows]
        if not times[0] <= time_s <= times[-1]:
            return np.full(2, np.nan)
        xy = obs.positions[self.rows]
        return np.array([np.interp(time_s, times, xy[:, 0]), np.interp(time_s, times, xy[:, 1])])


@dataclass
class ClearanceSeries:
    """Per obstacle frame: the smallest clearance over all obstacles and which row it was."""

    times_s: np.ndarray
    min_clearance_m: np.ndarray
    row: np.ndarray


def observation_clearances(data):
    """Signed clearance [m] of every obstacle observation (NaN where odometry does not cover it)."""
    obs = data.obstacles
    if len(obs) == 0 or len(data.robot) < 2:
        return np.full(len(obs), np.nan)
    robot_xy = data.robot.position_at(obs.times_s)
    return disc_box_clearance(robot_xy, data.robot_radius_m, obs.positions, obs.headings, obs.half_extents)


def clearance_series(data, clearance):
    """Smallest clearance per frame (for the clearance-over-time figure)."""
    obs = data.obstacles
    K = len(obs.frame_times_s)
    best = np.full(K, np.inf)
    row = np.full(K, -1)
    finite = np.isfinite(clearance)
    if np.any(finite):
        order = np.lexsort((clearance[finite], obs.frame_index[finite]))
        rows = np.nonzero(finite)[0][order]
        first = np.ones(len(rows), dtype=bool)
        first[1:] = obs.frame_index[rows[1:]] != obs.frame_index[rows[:-1]]
        rows = rows[first]
        best[obs.frame_index[rows]] = clearance[rows]
        row[obs.frame_index[rows]] = rows
    best[~np.isfinite(best)] = np.nan
    return ClearanceSeries(obs.frame_times_s, best, row)


def _runs(below, ids, times, max_step_s):
    """(first, last) row pairs of maximal runs of consecutive `below` rows of the same id."""
    n = len(below)
    joined = np.zeros(n, dtype=bool)  # row i continues row i-1
    joined[1:] = below[1:] & below[:-1] & (ids[1:] == ids[:-1]) & (np.diff(times) <= max_step_s)
    starts = np.nonzero(below & ~joined)[0]
    ends_mask = np.zeros(n, dtype=bool)
    ends_mask[:-1] = below[:-1] & ~joined[1:]
    ends_mask[-1] = below[-1] if n else False
    ends = np.nonzero(ends_mask)[0]
    return list(zip(starts.tolist(), ends.tolist()))


def _crossing(t0, c0, t1, c1, threshold):
    """Time the clearance crosses the threshold between two samples (linear interpolation)."""
    if not (np.isfinite(c0) and np.isfinite(c1)) or c0 == c1:
        return t1
    return t0 + (threshold - c0) / (c1 - c0) * (t1 - t0)


def nominal_frame_period_s(obstacles):
    """Median time between obstacle frames [s] (0.1 when there are fewer than two)."""
    frame_dt = np.diff(obstacles.frame_times_s)
    return float(np.median(frame_dt)) if len(frame_dt) else 0.1


def find_events(data, clearance_m=0.5, merge_gap_s=0.5):
    """Near-miss events in time order, and the per-frame clearance series.

    clearance_m: threshold [m] below which an approach is an event (≥ 0; 0 finds collisions only).
    """
    if not (np.isfinite(clearance_m) and clearance_m >= 0.0):
        raise ValueError(f"clearance_m={clearance_m!r}: must be a finite number ≥ 0")
    if not (np.isfinite(merge_gap_s) and merge_gap_s >= 0.0):
        raise ValueError(f"merge_gap_s={merge_gap_s!r}: must be a finite number ≥ 0")
    obs = data.obstacles
    clearance = observation_clearances(data)
    series = clearance_series(data, clearance)
    if len(obs) == 0 or len(data.robot) < 2:
        return [], series

    nominal_dt = nominal_frame_period_s(obs)
    max_step_s = max(merge_gap_s, 1.5 * nominal_dt)
    if obs.anonymous:
        rows = series.row[series.row >= 0]
        ids = np.full(len(rows), -1)
    else:
        rows = np.arange(len(obs))
        ids = obs.ids
    values = clearance[rows]
    times = obs.times_s[rows]
    below = np.nan_to_num(values, nan=np.inf) < clearance_m
    runs = _runs(below, ids, times, max_step_s)
    merged = []
    for first, last in runs:
        if merged and ids[merged[-1][0]] == ids[first] and times[first] - times[merged[-1][1]] <= max_step_s:
            merged[-1][1] = last
        else:
            merged.append([first, last])

    robot_velocity = data.robot.world_velocities()
    obstacle_velocity = obs.velocities()
    events = []
    for first, last in merged:
        events.append(_event(data, obs, rows, ids, values, times, first, last, clearance_m, max_step_s,
                             nominal_dt, robot_velocity, obstacle_velocity))
    events.sort(key=lambda e: (e.t_start, -1 if e.obstacle_id is None else e.obstacle_id))
    for i, event in enumerate(events):
        event.index = i + 1
    return events, series


def _event(data, obs, rows, ids, values, times, first, last, threshold, max_step_s, nominal_dt_s, robot_velocity,
           obstacle_velocity):
    anonymous = obs.anonymous

    def neighbour(i, j):
        """Row i is the same obstacle as row j, observed next to it in time."""
        return 0 <= i < len(rows) and ids[i] == ids[j] and abs(times[i] - times[j]) <= max_step_s

    run = np.arange(first, last + 1)
    k = int(run[np.nanargmin(values[run])])
    row = rows[k]
    t_min, c_min = float(times[k]), float(values[k])
    robot_xy = data.robot.position_at(t_min)[0]
    obstacle_xy, heading = obs.positions[row].copy(), float(obs.headings[row])
    track = None if anonymous else obs.track(int(ids[first]))

    if track is not None:
        # The same refinement as riskbound.clearance.closest_approach, so the run's closest
        # approach and the event that holds it agree.
        refine_step_s = NEIGHBOUR_GAP_PERIODS * nominal_dt_s
        t_from = times[k - 1] if neighbour(k - 1, k) and times[k] - times[k - 1] <= refine_step_s else times[k]
        t_to = times[k + 1] if neighbour(k + 1, k) and times[k + 1] - times[k] <= refine_step_s else times[k]
        found = refine_between(data.robot.times_s, data.robot.positions, data.robot_radius_m, obs.times_s[track],
                               obs.positions[track], obs.headings[track], obs.half_extents[row], float(t_from),
                               float(t_to), Approach(c_min, t_min, int(ids[first]), robot_xy, obstacle_xy, heading))
        t_min, c_min = found.time_s, found.clearance_m
        robot_xy, obstacle_xy, heading = found.robot_xy, found.obstacle_xy, found.obstacle_heading

    t_start = float(times[first])
    if neighbour(first - 1, first):
        t_start = float(_crossing(times[first - 1], values[first - 1], times[first], values[first], threshold))
    t_end = float(times[last])
    if neighbour(last + 1, last):
        t_end = float(_crossing(times[last], values[last], times[last + 1], values[last + 1], threshold))

    relative_speed = ttc = float("nan")
    if track is not None:
        onset_row = rows[first]
        robot_at = data.robot.position_at(t_start)[0]
        rv = np.array([np.interp(t_start, data.robot.times_s, robot_velocity[:, i]) for i in range(2)])
        ov = obstacle_velocity[onset_row]
        obstacle_at = obs.positions[onset_row]
        if np.all(np.isfinite(ov)):  # back from the first observation below the threshold to the crossing
            obstacle_at = obstacle_at + ov * (t_start - obs.times_s[onset_row])
        relative_speed = float(np.linalg.norm(rv - ov))
        ttc = time_to_contact(robot_at, rv, data.robot_radius_m, obstacle_at, ov, obs.headings[onset_row],
                              obs.half_extents[onset_row])
    return NearMissEvent(
        index=0, obstacle_id=None if anonymous else int(ids[first]), t_start=t_start, t_end=float(t_end),
        t_min=t_min, min_clearance_m=c_min, collision=bool(c_min < 0.0), samples=int(last - first + 1),
        robot_xy_at_min=[float(v) for v in robot_xy], obstacle_xy_at_min=[float(v) for v in obstacle_xy],
        obstacle_heading_at_min=heading, half_extents=[float(v) for v in obs.half_extents[row]],
        relative_speed_mps=relative_speed, time_to_collision_s=float(ttc), rows=track)


def planner_context(data, event, context_s=CONTEXT_S):
    """Planner statuses from context_s before onset to the end of the event."""
    planner = data.planner
    if len(planner) == 0:
        return {"available": False}
    window = planner.window(event.t_start - context_s, event.t_end)
    solve_ms = planner.numeric("solve_ms")[window]
    margins = planner.numeric("min_margin_m")[window]
    levels = planner.levels[window]
    statuses = planner.text("status")[window]
    failures = [s or m for s, m, level in zip(statuses, planner.messages[window], levels) if level >= FAILURE_LEVEL]
    onset = int(np.searchsorted(planner.times_s, event.t_start, side="right")) - 1
    finite_margins = margins[np.isfinite(margins)]
    finite_solve = solve_ms[np.isfinite(solve_ms)]
    result = {
        "available": True, "window_s": [event.t_start - context_s, event.t_end], "cycles": int(len(levels)),
        "solve_ms_median": float(np.median(finite_solve)) if len(finite_solve) else None,
        "solve_ms_max": float(np.max(finite_solve)) if len(finite_solve) else None,
        "failures": len(failures), "failure_statuses": sorted(set(failures)),
        # Plans commanded although they enter an obstacle ellipse (infeasible_response least_violation).
        "least_violation": int(sum(status == "least_violation" for status in statuses)),
        "min_margin_m": float(np.min(finite_margins)) if len(finite_margins) else None,
    }
    if onset >= 0:
        values = planner.values[onset]
        result.update(risk_level=_float_or_none(values.get("risk_level")),
                      risk_allocation=values.get("risk_allocation"), status_at_onset=values.get("status", ""))
    return result


def watchdog_context(data, event, context_s=CONTEXT_S):
    """Watchdog states, stops and their causes around the event; commands held to zero."""
    watchdog = data.watchdog
    result = {"available": len(watchdog) > 0}
    if len(watchdog):
        window = watchdog.window(event.t_start - context_s, event.t_end + context_s)
        states = watchdog.text("state")[window]
        stops_total = watchdog.numeric("stops_total")
        before = int(np.searchsorted(watchdog.times_s, event.t_start - context_s, side="left")) - 1
        previous = stops_total[before] if before >= 0 else (stops_total[window][0] if len(states) else np.nan)
        causes = []
        for i in range(window.start, window.stop):
            if np.isfinite(stops_total[i]) and np.isfinite(previous) and stops_total[i] > previous:
                causes.append(watchdog.values[i].get("last_stop_cause", ""))
            if np.isfinite(stops_total[i]):
                previous = stops_total[i]
        seen = list(dict.fromkeys(s for s in states if s))
        result.update(states=seen, stops=len(causes), stop_causes=sorted(set(c for c in causes if c)),
                      stopped=("stopped" in seen))
    gated, planned = data.commands.get("cmd_vel"), data.commands.get("cmd_vel_plan")
    if gated is not None and len(gated):
        lo = int(np.searchsorted(gated.times_s, event.t_start - context_s, side="left"))
        hi = int(np.searchsorted(gated.times_s, event.t_end, side="right"))
        zero = np.all(gated.velocities[lo:hi] == 0.0, axis=1)
        result["zero_commands"] = int(zero.sum())
        result["commands"] = int(hi - lo)
        if planned is not None and len(planned) and hi > lo:
            j = np.clip(np.searchsorted(planned.times_s, gated.times_s[lo:hi], side="right") - 1, 0, None)
            moving_plan = np.any(planned.velocities[j] != 0.0, axis=1)
            result["commands_held_to_zero"] = int(np.sum(zero & moving_plan))
    return result


def _float_or_none(text):
    try:
        return float(text)
    except (TypeError, ValueError):
        return None
