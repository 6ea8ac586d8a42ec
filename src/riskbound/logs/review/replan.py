"""Re-solve the planner offline at the onset of each event, as recorded and with other settings.

Inputs at onset, from the bag: the newest odometry (state and covariance, as the planner node
converts it), the newest forecast resampled onto the planner grid counted from the odometry stamp
(without forecasts: the observed obstacles at constant velocity, without uncertainty), and the
goal (goal topic; else the scenario's robot_goal hint; else the robot's final position).

Settings: PlannerSettings defaults, overwritten by the values of the newest planner_status before
onset (the status carries risk_level, risk_allocation, robot_model, horizon_steps, step_s), then by
the overrides. Both problems are solved cold (no warm start). The IPOPT wall-time cap is lifted
(control_rate_hz = 1 unless overridden) so the outcome does not depend on how busy the reviewing
machine is; the iteration cap stays as set.

Each plan is also scored against what happened: the smallest clearance between the planned robot
positions and the event's obstacle where it actually was at those times.
"""

from dataclasses import fields

import numpy as np

from riskbound.clearance import disc_box_clearance
from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import SPECS_BY_NAME, PlannerSettings

OFFLINE_CONTROL_RATE_HZ = 1.0
_SETTING_NAMES = {f.name for f in fields(PlannerSettings)}


def parse_setting(name, text, option="--replan-param"):
    """A planner setting from text, typed like its default; ValueError names the option given
    (`option`), the setting and, when out of range, the allowed range."""
    if name not in SPECS_BY_NAME:
        raise ValueError(f"{option} {name}: not a planner setting; known: {', '.join(sorted(SPECS_BY_NAME))}")
    default = SPECS_BY_NAME[name].default
    try:
        if isinstance(default, bool):
            if text.lower() not in ("true", "false"):
                raise ValueError
            value = text.lower() == "true"
        elif isinstance(default, int):
            value = int(text)
        elif isinstance(default, float):
            value = float(text)
        else:
            value = text
    except ValueError:
        expected = {bool: "true or false", int: "an integer", float: "a number"}.get(type(default), "text")
        raise ValueError(f"{option} {name}={text!r}: expected {expected}") from None
    reason = SPECS_BY_NAME[name].check(value)
    if reason:
        raise ValueError(f"{option} {reason}")
    return value


def parse_overrides(risk_level=None, params=()):
    """{setting: value} from --replan-risk and --replan-param name=value entries."""
    overrides = {}
    for item in params:
        name, sep, text = item.partition("=")
        if not sep:
            raise ValueError(f"--replan-param {item!r}: expected name=value")
        overrides[name.strip()] = parse_setting(name.strip(), text.strip())
    if risk_level is not None:
        risk_level = float(risk_level)
        reason = SPECS_BY_NAME["risk_level"].check(risk_level)
        if reason:
            raise ValueError(f"--replan-risk {risk_level:g}: out of range, must be in "
                             f"{SPECS_BY_NAME['risk_level'].allowed()}")
        overrides["risk_level"] = risk_level
    return overrides


def recorded_settings(data, time_s):
    """PlannerSettings in force at time_s as far as planner_status tells, and the keys it set."""
    settings = PlannerSettings()
    planner = data.planner
    newest = int(np.searchsorted(planner.times_s, time_s, side="right")) - 1 if len(planner) else -1
    if newest < 0:
        return settings, []
    recorded = {}
    for name, text in planner.values[newest].items():
        if name in _SETTING_NAMES:
            try:
                recorded[name] = parse_setting(name, text)
            except ValueError:
                continue
    return settings.with_changes(**recorded), sorted(recorded)


def _goal(data):
    times, positions = data.goals
    if len(times):
        return positions[-1], "goal topic"
    hint = data.metadata.get("robot_goal")
    if hint:
        try:
            xy = np.array([float(v) for v in hint.strip("[]() ").split(",")])
            if xy.shape == (2,) and np.all(np.isfinite(xy)):
                return xy, "bag metadata robot_goal"
        except ValueError:
            pass
    return data.robot.positions[-1], "robot's final position (no goal in the bag)"


def _goal_at(data, time_s):
    times, positions = data.goals
    i = int(np.searchsorted(times, time_s, side="right")) - 1
    if len(times) and i >= 0:
        return positions[i], "goal topic"
    return _goal(data)


def _forecast_on_grid(data, odom_stamp, grid_s):
    """(forecast on the planner grid, description) for a plan starting at odom_stamp."""
    forecasts = data.forecasts
    index = forecasts.index_before(odom_stamp) if len(forecasts) else None
    if index is not None:
        forecast = forecasts.get(index)
        if forecast is not None:
            stamp = float(forecasts.stamps_s[index])
            on_grid = forecast.resampled((odom_stamp - stamp) + grid_s)
            return (ObstacleForecast(on_grid.track_ids, grid_s, on_grid.positions, on_grid.headings,
                                     on_grid.covariances, on_grid.half_extents),
                    f"obstacle_forecast stamped {odom_stamp - stamp:.2f} s before the state")
    obs = data.obstacles
    if len(obs) == 0 or obs.anonymous:
        return ObstacleForecast.empty(grid_s), "no forecast and no tracked obstacles: planned without obstacles"
    frame = int(np.searchsorted(obs.frame_times_s, odom_stamp, side="right")) - 1
    rows = np.nonzero(obs.frame_index == max(frame, 0))[0]
    velocities = np.nan_to_num(obs.velocities()[rows])
    ahead = (odom_stamp - obs.frame_times_s[max(frame, 0)]) + grid_s
    positions = obs.positions[rows][:, None, :] + velocities[:, None, :] * ahead[None, :, None]
    return (ObstacleForecast(obs.ids[rows], grid_s, positions, np.repeat(obs.headings[rows][:, None], len(grid_s), 1),
                             np.zeros((len(rows), len(grid_s), 2, 2)), obs.half_extents[rows]),
            f"{obs.source} at constant velocity, no uncertainty (no forecast in the bag)")


def clearance_against_actual(data, event, times_s, positions):
    """Smallest clearance [m] between planned robot positions and the event's obstacle where it
    actually was at those times (plan points outside the obstacle's record are skipped)."""
    if event.rows is None or len(times_s) == 0:
        return None
    obs = data.obstacles
    track_times = obs.times_s[event.rows]
    inside = (times_s >= track_times[0]) & (times_s <= track_times[-1])
    if not np.any(inside):
        return None
    xy = obs.positions[event.rows]
    at = np.stack([np.interp(times_s[inside], track_times, xy[:, 0]),
                   np.interp(times_s[inside], track_times, xy[:, 1])], axis=-1)
    headings = np.interp(times_s[inside], track_times, np.unwrap(obs.headings[event.rows]))
    extents = obs.half_extents[event.rows][0]
    clearance = disc_box_clearance(positions[inside], data.robot_radius_m, at, headings, extents)
    return float(np.nanmin(clearance))


def _plan_summary(result, start_s, data, event):
    summary = {"success": bool(result.success), "status": result.status, "solver_status": result.solver_status,
               "solve_ms": float(result.solve_ms), "iterations": int(result.iterations),
               "min_margin_m": _finite_or_none(result.min_margin_m), "positions": [], "clearance_vs_actual_m": None}
    # Only a plan the planner would have commanded is scored against what happened; the last
    # iterate of an infeasible or failed solve is no plan.
    if result.success and len(result.states):
        positions = np.asarray(result.states)[:, 0:2]
        times = start_s + np.asarray(result.times)
        summary["positions"] = positions.tolist()
        summary["clearance_vs_actual_m"] = clearance_against_actual(data, event, times, positions)
    return summary


def _finite_or_none(value):
    value = float(value)
    return value if np.isfinite(value) else None


class Replanner:
    """Solves at each event onset with the recorded settings and with the overrides; the MPC
    objects are built once per distinct structure and reused."""

    def __init__(self, overrides):
        self.overrides = dict(overrides)
        self._built = {}

    def _solver(self, settings):
        key = tuple(getattr(settings, s.name) for s in SPECS_BY_NAME.values() if s.rebuild)
        if key not in self._built:
            self._built[key] = ChanceConstrainedMPC(settings)
        mpc = self._built[key]
        mpc.settings = settings  # non-structural settings act at the next solve
        mpc.reset()
        return mpc

    def replan(self, data, event):
        """Both plans at the event's onset, summarised (positions, status, clearance vs actual)."""
        if len(data.robot) == 0:
            return {"available": False, "reason": "no odometry"}
        recorded, from_status = recorded_settings(data, event.t_start)
        offline = {} if "control_rate_hz" in self.overrides else {"control_rate_hz": OFFLINE_CONTROL_RATE_HZ}
        as_recorded = recorded.with_changes(**offline)
        changed = as_recorded.with_changes(**self.overrides)
        robot = data.robot
        i = robot.index_at(event.t_start)
        odom_stamp = float(robot.times_s[i])
        goal, goal_source = _goal_at(data, event.t_start)
        outcome = {"available": True, "state_stamp": odom_stamp, "goal": [float(v) for v in goal],
                   "goal_source": goal_source, "settings_from_status": from_status,
                   "overrides": {k: v for k, v in self.overrides.items()}}
        for label, settings in (("as_recorded", as_recorded), ("replanned", changed)):
            mpc = self._solver(settings)
            x0, P0 = mpc.model.state_from_odometry(robot.positions[i], robot.yaws[i], robot.body_velocities[i],
                                                   robot.pose_covariances[i], robot.twist_covariances[i])
            grid = settings.step_s * np.arange(1, settings.horizon_steps + 1)
            forecast, forecast_source = _forecast_on_grid(data, odom_stamp, grid)
            result = mpc.solve(x0, P0, goal, forecast)
            outcome[label] = dict(_plan_summary(result, odom_stamp, data, event), risk_level=settings.risk_level,
                                  risk_allocation=settings.risk_allocation)
            outcome["forecast_source"] = forecast_source
        plans = data.plans
        index = plans.index_before(event.t_start) if len(plans) else None
        if index is not None:
            times, positions = plans.get(index)
            outcome["recorded_plan"] = {
                "stamp": float(plans.stamps_s[index]), "positions": positions.tolist(),
                "clearance_vs_actual_m": clearance_against_actual(data, event, times, positions)}
        return outcome
