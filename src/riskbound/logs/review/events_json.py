"""events.json: the review's results for machines, and the run-level planner and watchdog summaries
that report.md shows too.

events.json schema (version "riskbound.review/2"; times in seconds on the bag's clock, i.e. header
stamps; lengths in metres; null where a value is unknown). Version 2 added "examined",
"not_examined_reasons", "closest_approach" and "rejected_messages": an empty "events" list means
"nothing came closer than the threshold" only when "examined" is true.

    {
      "schema": "riskbound.review/2",
      "bag": str, "start_s": float, "end_s": float,
      "examined": bool, "not_examined_reasons": [str],
      "closest_approach": null | {"clearance_m": float, "t": float, "obstacle_id": int,
                                  "robot_position": [x, y], "obstacle_position": [x, y]},
      "rejected_messages": {topic role: int},   # dropped for implausible values (load.REJECTED_WHAT)
      "obstacle_source": "crowd_truth" | "obstacle_forecast" | "detections" | "none",
      "clearance_threshold_m": float, "robot_radius_m": float, "robot_radius_source": str,
      "obstacle_half_extents_m": [half_length, half_width], "obstacle_half_extents_source": str,
      "missing_topics": [{"name": str, "type": str, "consequence": str}],
      "notes": [str],
      "planner": {"cycles": int, "failures": int, "solve_ms_median": float|null,
                  "solve_ms_p95": float|null, "solve_ms_max": float|null},
      "watchdog": {"stops": int|null, "stop_causes": [str]},
      "events": [{
        "index": int,                   # 1-based, in onset order
        "t_start": float, "t_end": float,   # threshold crossings (interpolated)
        "t_min": float, "min_clearance_m": float,   # refined closest approach
        "obstacle_id": int|null,        # walker id (crowd_truth) or track id; null if anonymous
        "collision": bool,              # min_clearance_m < 0
        "samples": int,                 # observations below the threshold
        "robot_position_at_min": [x, y], "obstacle_position_at_min": [x, y],
        "obstacle_heading_at_min": float, "obstacle_half_extents_m": [half_length, half_width],
        "relative_speed_mps": float|null,     # at onset
        "time_to_collision_s": float|null,    # at onset, constant velocities; null if never/unknown
        "forecast_checks": [{"lead_s": float, "available": bool, "reason": str (if not available),
            "forecast_stamp": float, "track_id": int, "predicted_position": [x, y],
            "predicted_covariance": [[..],[..]], "actual_position": [x, y], "extrapolated": bool,
            "risk_level": float, "risk_level_source": str, "position_error_m": float,
            "mahalanobis": float, "chi2_bound": float, "inside_risk_ellipse": bool}],
        "planner": {"available": bool, "window_s": [from, to], "cycles": int, "solve_ms_median": float|null,
            "solve_ms_max": float|null, "failures": int, "failure_statuses": [str], "least_violation": int,
            "min_margin_m": float|null, "risk_level": float|null, "risk_allocation": str|null,
            "status_at_onset": str},
        "watchdog": {"available": bool, "states": [str], "stops": int, "stop_causes": [str],
            "stopped": bool, "commands": int, "zero_commands": int, "commands_held_to_zero": int},
        "replan": null | {"available": bool, "state_stamp": float, "goal": [x, y], "goal_source": str,
            "settings_from_status": [str], "overrides": {name: value}, "forecast_source": str,
            "as_recorded": PLAN, "replanned": PLAN,
            "recorded_plan": {"stamp": float, "positions": [[x, y]], "clearance_vs_actual_m": float|null}},
            where PLAN = {"success": bool, "status": str, "solver_status": str, "solve_ms": float,
            "iterations": int, "min_margin_m": float|null, "risk_level": float, "risk_allocation": str,
            "positions": [[x, y]], "clearance_vs_actual_m": float|null}
        "figure": str|null              # event_NN.png, null beyond --max-figures
      }]
    }
"""

import math

import numpy as np

SCHEMA = "riskbound.review/2"


def _json_value(value):
    if isinstance(value, dict):
        return {k: _json_value(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_value(v) for v in value]
    if isinstance(value, (np.floating, float)):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.ndarray):
        return _json_value(value.tolist())
    return value


def planner_summary(data):
    planner = data.planner
    solve_ms = planner.numeric("solve_ms") if len(planner) else np.zeros(0)
    finite = solve_ms[np.isfinite(solve_ms)]
    return {"cycles": len(planner), "failures": int(np.sum(planner.levels >= 2)) if len(planner) else 0,
            "solve_ms_median": float(np.median(finite)) if len(finite) else None,
            "solve_ms_p95": float(np.percentile(finite, 95)) if len(finite) else None,
            "solve_ms_max": float(np.max(finite)) if len(finite) else None}


def watchdog_summary(data):
    watchdog = data.watchdog
    if len(watchdog) == 0:
        return {"stops": None, "stop_causes": []}
    stops_total = watchdog.numeric("stops_total")
    finite = stops_total[np.isfinite(stops_total)]
    causes, previous = [], finite[0] if len(finite) else np.nan
    for value, values in zip(stops_total, watchdog.values):
        if np.isfinite(value) and np.isfinite(previous) and value > previous:
            causes.append(values.get("last_stop_cause", ""))
        if np.isfinite(value):
            previous = value
    return {"stops": int(finite[-1] - finite[0]) if len(finite) else None,
            "stop_causes": sorted(set(c for c in causes if c))}


def event_record(event):
    return _json_value({
        "index": event.index, "t_start": event.t_start, "t_end": event.t_end, "t_min": event.t_min,
        "min_clearance_m": event.min_clearance_m, "obstacle_id": event.obstacle_id, "collision": event.collision,
        "samples": event.samples, "robot_position_at_min": event.robot_xy_at_min,
        "obstacle_position_at_min": event.obstacle_xy_at_min, "obstacle_heading_at_min": event.obstacle_heading_at_min,
        "obstacle_half_extents_m": event.half_extents, "relative_speed_mps": event.relative_speed_mps,
        "time_to_collision_s": event.time_to_collision_s, "forecast_checks": event.forecast_checks,
        "planner": event.planner, "watchdog": event.watchdog, "replan": event.replan, "figure": event.figure,
    })


def _closest_record(closest):
    if closest is None:
        return None
    return {"clearance_m": closest.clearance_m, "t": closest.time_s, "obstacle_id": closest.obstacle_id,
            "robot_position": closest.robot_xy, "obstacle_position": closest.obstacle_xy}


def events_document(data, events, clearance_m):
    return _json_value({
        "schema": SCHEMA, "bag": str(data.path), "start_s": data.start_s, "end_s": data.end_s,
        "examined": not data.not_examined, "not_examined_reasons": data.not_examined,
        "closest_approach": _closest_record(data.closest), "rejected_messages": data.rejected,
        "obstacle_source": data.obstacles.source, "clearance_threshold_m": clearance_m,
        "robot_radius_m": data.robot_radius_m, "robot_radius_source": data.robot_radius_source,
        "obstacle_half_extents_m": data.half_extents_m, "obstacle_half_extents_source": data.half_extents_source,
        "missing_topics": [{"name": name, "type": msgtype, "consequence": consequence}
                           for name, msgtype, consequence in data.missing],
        "notes": data.notes, "planner": planner_summary(data), "watchdog": watchdog_summary(data),
        "events": [event_record(e) for e in events],
    })
