"""The review's output: report.md (read top to bottom: summary, table of events, overview figures,
one section and figure per event), PNG figures and events.json.

Files written to the output directory:

    report.md            the report
    overview.png         map: robot track, obstacle tracks, where each event happened
    clearance.png        smallest clearance to any obstacle over time, threshold, events shaded
    solve_times.png      planner solve-time histogram and timeline (failures marked)
    event_NN.png         per event: snapshot at the closest approach (footprints, forecast risk
                         ellipses, recorded and re-solved plans) and that obstacle's clearance over time
    events.json          machine-readable results, schema below

events.json schema (version "riskbound.review/1"; times in seconds on the bag's clock, i.e. header
stamps; lengths in metres; null where a value is unknown):

    {
      "schema": "riskbound.review/1",
      "bag": str, "start_s": float, "end_s": float,
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

import json
import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.collections import LineCollection, PolyCollection  # noqa: E402
from matplotlib.patches import Circle, Ellipse, Polygon  # noqa: E402

SCHEMA = "riskbound.review/1"
FIGURES = ("overview.png", "clearance.png", "solve_times.png")
SNAPSHOT_HALF_WIDTH_M = 3.0
_DPI = 90
_PNG = {"compress_level": 3}  # quicker to encode than the default 6; files ~20 % larger


# --- numbers for people ----------------------------------------------------------------------------

def _f(value, digits=2, unit=""):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—" if value is None or math.isnan(value) else ("∞" if value > 0 else "−∞")
    return f"{value:.{digits}f}{unit}"


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


def events_document(data, events, clearance_m):
    return _json_value({
        "schema": SCHEMA, "bag": str(data.path), "start_s": data.start_s, "end_s": data.end_s,
        "obstacle_source": data.obstacles.source, "clearance_threshold_m": clearance_m,
        "robot_radius_m": data.robot_radius_m, "robot_radius_source": data.robot_radius_source,
        "obstacle_half_extents_m": data.half_extents_m, "obstacle_half_extents_source": data.half_extents_source,
        "missing_topics": [{"name": name, "type": msgtype, "consequence": consequence}
                           for name, msgtype, consequence in data.missing],
        "notes": data.notes, "planner": planner_summary(data), "watchdog": watchdog_summary(data),
        "events": [event_record(e) for e in events],
    })


# --- figures ---------------------------------------------------------------------------------------

def _box_corners(centre, heading, half_extents):
    hl, hw = half_extents
    local = np.array([[hl, hw], [-hl, hw], [-hl, -hw], [hl, -hw]])
    c, s = np.cos(heading), np.sin(heading)
    return centre + local @ np.array([[c, s], [-s, c]])


def _ellipse(mean, covariance, scale_sq, **style):
    values, vectors = np.linalg.eigh(np.asarray(covariance, dtype=float))
    values = np.maximum(values, 0.0)
    angle = np.degrees(np.arctan2(vectors[1, 1], vectors[0, 1]))
    return Ellipse(mean, 2.0 * np.sqrt(values[1] * scale_sq), 2.0 * np.sqrt(values[0] * scale_sq), angle=angle,
                   **style)


def _shade_events(ax, events, t0):
    """Event intervals as one collection of full-height bands (hundreds of spans draw slowly)."""
    for collision, colour in ((False, "tab:orange"), (True, "tab:red")):
        bands = [[(e.t_start - t0, 0.0), (e.t_start - t0, 1.0), (e.t_end - t0, 1.0), (e.t_end - t0, 0.0)]
                 for e in events if e.collision == collision]
        if bands:
            ax.add_collection(PolyCollection(bands, transform=ax.get_xaxis_transform(), facecolors=colour,
                                             alpha=0.25, linewidths=0), autolim=False)


def overview_figure(data, events, path):
    fig, ax = plt.subplots(figsize=(8, 7))
    obs = data.obstacles
    if len(obs):
        boundaries = np.nonzero((np.diff(obs.ids) != 0) | obs.anonymous)[0] + 1
        if obs.anonymous:
            ax.scatter(obs.positions[:, 0], obs.positions[:, 1], s=1, color="0.6", label=f"obstacles ({obs.source})")
        else:
            segments = [seg for seg in np.split(obs.positions, boundaries) if len(seg) > 1]
            ax.add_collection(LineCollection(segments, colors="0.65", linewidths=0.6,
                                             label=f"obstacle tracks ({obs.source})"))
    if len(data.robot):
        ax.plot(data.robot.positions[:, 0], data.robot.positions[:, 1], color="tab:blue", lw=2, label="robot (odom)")
        ax.plot(*data.robot.positions[0], "o", color="tab:blue", ms=8, label="robot start")
        ax.plot(*data.robot.positions[-1], "s", color="tab:blue", ms=8, label="robot end")
    # One artist per kind, not per event: a long bag has hundreds of events.
    kinds = ((False, "tab:orange", "o", "near miss"), (True, "tab:red", "X", "collision"))
    for collision, colour, marker, label in kinds:
        chosen = [e for e in events if e.collision == collision]
        if not chosen:
            continue
        tracks = [obs.positions[e.rows] for e in chosen if e.rows is not None]
        if tracks:
            ax.add_collection(LineCollection(tracks, colors=colour, linewidths=1.2))
        xy = np.array([e.robot_xy_at_min for e in chosen])
        ax.scatter(xy[:, 0], xy[:, 1], marker=marker, s=70, c=colour, edgecolors="k", zorder=3,
                   label=f"{label} (robot at closest approach)")
    for event in events:
        if event.figure:  # numbers only for the events that have their own figure
            ax.annotate(str(event.index), event.robot_xy_at_min, xytext=(5, 5), textcoords="offset points", fontsize=9)
    ax.autoscale_view()
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x [m]")
    ax.set_ylabel("y [m]")
    ax.set_title(f"Overview: {len(events)} event(s); numbered: those with a figure below")
    ax.legend(loc="best", fontsize=8)
    ax.grid(alpha=0.3)
    fig.subplots_adjust(left=0.1, right=0.97, bottom=0.08, top=0.94)
    fig.savefig(path, dpi=_DPI, pil_kwargs=_PNG)
    plt.close(fig)


def clearance_figure(data, series, events, clearance_m, path):
    fig, ax = plt.subplots(figsize=(10, 3.8))
    t0 = data.start_s
    if len(series.times_s):
        ax.plot(series.times_s - t0, series.min_clearance_m, color="tab:blue", lw=1, label="smallest clearance")
    ax.axhline(clearance_m, color="tab:orange", ls="--", label=f"threshold {clearance_m:g} m")
    ax.axhline(0.0, color="tab:red", lw=1, label="contact")
    _shade_events(ax, events, t0)
    ax.set_xlabel(f"time since bag start [s] (start = {t0:.3f} s)")
    ax.set_ylabel("clearance [m]")
    finite = series.min_clearance_m[np.isfinite(series.min_clearance_m)] if len(series.times_s) else np.zeros(0)
    top = max(3.0 * clearance_m, 1.0)
    ax.set_ylim(min(-0.1, float(finite.min()) - 0.1) if len(finite) else -0.1, top)
    ax.set_title("Smallest clearance robot ↔ any obstacle (events shaded)")
    ax.legend(loc="upper right", fontsize=8)
    ax.grid(alpha=0.3)
    fig.subplots_adjust(left=0.07, right=0.98, bottom=0.14, top=0.91)
    fig.savefig(path, dpi=_DPI, pil_kwargs=_PNG)
    plt.close(fig)


def solve_time_figure(data, events, path):
    fig, (hist, timeline) = plt.subplots(1, 2, figsize=(11, 3.8), gridspec_kw={"width_ratios": [1, 2]})
    planner = data.planner
    t0 = data.start_s
    solve_ms = planner.numeric("solve_ms") if len(planner) else np.zeros(0)
    finite = np.isfinite(solve_ms)
    deadline = data.watchdog.numeric("deadline_ms") if len(data.watchdog) else np.zeros(0)
    deadline = deadline[np.isfinite(deadline)]
    if np.any(finite):
        hist.hist(solve_ms[finite], bins=40, color="tab:blue")
        for q, style in ((50, ":"), (95, "--")):
            hist.axvline(np.percentile(solve_ms[finite], q), color="k", ls=style, lw=1, label=f"p{q}")
        failed = planner.levels >= 2
        timeline.plot(planner.times_s[finite] - t0, solve_ms[finite], ".", ms=2, color="tab:blue", label="solve")
        if np.any(failed):
            timeline.plot(planner.times_s[failed] - t0, np.nan_to_num(solve_ms[failed]), "x", color="tab:red",
                          ms=5, label="failed cycle")
    else:
        hist.text(0.5, 0.5, "no planner_status", ha="center", transform=hist.transAxes)
    if len(deadline):
        hist.axvline(deadline[-1], color="tab:red", lw=1, label=f"deadline {deadline[-1]:g} ms")
        timeline.axhline(deadline[-1], color="tab:red", lw=1)
    _shade_events(timeline, events, t0)
    hist.set_xlabel("solve time [ms]")
    hist.set_ylabel("cycles")
    hist.set_title("Solve-time histogram")
    timeline.set_xlabel("time since bag start [s]")
    timeline.set_ylabel("solve time [ms]")
    timeline.set_title("Solve time over time (events shaded)")
    for ax in (hist, timeline):
        ax.grid(alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=8)
    fig.subplots_adjust(left=0.06, right=0.98, bottom=0.14, top=0.91, wspace=0.2)
    fig.savefig(path, dpi=_DPI, pil_kwargs=_PNG)
    plt.close(fig)


def event_figure(data, event, clearance, clearance_m, path):
    fig, (snap, curve) = plt.subplots(1, 2, figsize=(12, 5.5), gridspec_kw={"width_ratios": [1.1, 1]})
    obs, robot, r = data.obstacles, data.robot, data.robot_radius_m
    centre = np.asarray(event.robot_xy_at_min)
    colour = "tab:red" if event.collision else "tab:orange"

    # Other obstacles at the frame nearest the closest approach.
    if len(obs.frame_times_s):
        frame = int(np.argmin(np.abs(obs.frame_times_s - event.t_min)))
        rows = np.nonzero(obs.frame_index == frame)[0]
        near = rows[np.all(np.abs(obs.positions[rows] - centre) < 2 * SNAPSHOT_HALF_WIDTH_M, axis=1)]
        for row in near:
            if event.rows is not None and event.rows.start <= row < event.rows.stop:
                continue
            snap.add_patch(Polygon(_box_corners(obs.positions[row], obs.headings[row], obs.half_extents[row]),
                                   closed=True, fc="0.85", ec="0.5"))
    window = (event.t_start - 2.0, event.t_end + 1.0)
    if len(robot):
        span = (robot.times_s >= window[0]) & (robot.times_s <= window[1])
        snap.plot(robot.positions[span, 0], robot.positions[span, 1], color="tab:blue", lw=1.5, label="robot (odom)")
    if event.rows is not None:
        times = obs.times_s[event.rows]
        span = (times >= window[0]) & (times <= window[1])
        snap.plot(obs.positions[event.rows][span, 0], obs.positions[event.rows][span, 1], color=colour, lw=1.5,
                  label=f"obstacle {event.obstacle_id}")
    snap.add_patch(Circle(centre, r, fc="tab:blue", alpha=0.35, ec="tab:blue", label=f"robot disc r={r:g} m"))
    snap.add_patch(Polygon(_box_corners(np.asarray(event.obstacle_xy_at_min), event.obstacle_heading_at_min,
                                        event.half_extents), closed=True, fc=colour, alpha=0.5, ec="k",
                           label="obstacle footprint"))
    for check, style in zip(event.forecast_checks, ("-", "--", ":")):
        if check.get("available"):
            snap.add_patch(_ellipse(check["predicted_position"], check["predicted_covariance"], check["chi2_bound"],
                                    fill=False, ec="tab:purple", ls=style, lw=1.3,
                                    label=f"forecast {check['lead_s']:g} s before, 1−α ellipse"))
            snap.plot(*check["predicted_position"], "+", color="tab:purple", ms=8)
    plans = data.plans
    index = plans.index_before(event.t_start) if len(plans) else None
    if index is not None:
        xy = plans.get(index)[1]
        snap.plot(xy[:, 0], xy[:, 1], "--", color="k", lw=1.3, label="recorded plan at onset")
    replan = event.replan or {}
    for key, style, colour_plan in (("as_recorded", "-.", "tab:green"), ("replanned", "-", "tab:cyan")):
        plan = replan.get(key)
        if plan and plan.get("positions"):
            xy = np.asarray(plan["positions"])
            snap.plot(xy[:, 0], xy[:, 1], style, color=colour_plan, lw=1.6,
                      label=f"re-solved, α={plan['risk_level']:g} ({plan['status']})")
    snap.set_xlim(centre[0] - SNAPSHOT_HALF_WIDTH_M, centre[0] + SNAPSHOT_HALF_WIDTH_M)
    snap.set_ylim(centre[1] - SNAPSHOT_HALF_WIDTH_M, centre[1] + SNAPSHOT_HALF_WIDTH_M)
    snap.set_aspect("equal")
    snap.set_xlabel("x [m]")
    snap.set_ylabel("y [m]")
    snap.set_title(f"Event {event.index} at t={event.t_min - data.start_s:.2f} s: clearance "
                   f"{event.min_clearance_m:.3f} m")
    snap.legend(loc="upper left", fontsize=7)
    snap.grid(alpha=0.3)

    t0 = data.start_s
    if event.rows is not None:
        times = obs.times_s[event.rows]
        values = clearance[event.rows]
        label = f"obstacle {event.obstacle_id}"
    else:
        series_rows = np.nonzero(np.isfinite(clearance))[0]
        order = np.argsort(obs.times_s[series_rows])
        times, values = obs.times_s[series_rows][order], clearance[series_rows][order]
        label = "nearest observation"
    span = (times >= event.t_start - 3.0) & (times <= event.t_end + 3.0)
    curve.plot(times[span] - t0, values[span], ".-", color=colour, ms=3, label=label)
    curve.axhline(clearance_m, color="tab:orange", ls="--", label=f"threshold {clearance_m:g} m")
    curve.axhline(0.0, color="tab:red", lw=1, label="contact")
    curve.axvspan(event.t_start - t0, event.t_end - t0, color=colour, alpha=0.2, lw=0)
    curve.plot(event.t_min - t0, event.min_clearance_m, "v", color="k", label="closest approach")
    curve.set_xlabel("time since bag start [s]")
    curve.set_ylabel("clearance [m]")
    curve.set_title("Clearance over time")
    curve.legend(fontsize=8)
    curve.grid(alpha=0.3)
    fig.subplots_adjust(left=0.06, right=0.98, bottom=0.1, top=0.93, wspace=0.18)
    fig.savefig(path, dpi=_DPI, pil_kwargs=_PNG)
    plt.close(fig)


# --- report.md -------------------------------------------------------------------------------------

def _source_sentence(data):
    source = data.obstacles.source
    if source == "crowd_truth" and data.obstacles.anonymous:
        return ("ground truth (`crowd_truth`) **without ids**: each event is the nearest walker, ids are unknown, "
                "speeds and times to collision cannot be computed.")
    if source == "crowd_truth":
        return "ground truth (`crowd_truth`, ids from `crowd_truth_ids`)."
    if source == "obstacle_forecast":
        return ("**fallback:** no `crowd_truth` in the bag, so obstacles are the tracker's current estimates "
                "(step 0 of `obstacle_forecast`); events are as the tracker saw them, not necessarily as they were, "
                "and a forecast is checked against the tracker's later estimate.")
    if source == "detections":
        return ("**fallback:** no `crowd_truth` and no `obstacle_forecast` in the bag, so obstacles are raw "
                "`detections` without identities: each event is the nearest detection, ids are unknown, "
                "speeds and times to collision cannot be computed.")
    return "**none:** the bag has no obstacle topic; no events can be found."


def _event_row(data, event):
    check = next((c for c in event.forecast_checks if c.get("lead_s") == 1.0 and c.get("available")), None)
    forecast = (f"{_f(check['position_error_m'])} / {_f(check['mahalanobis'])} / "
                f"{'yes' if check['inside_risk_ellipse'] else '**no**'}") if check else "—"
    planner, watchdog = event.planner or {}, event.watchdog or {}
    t0 = data.start_s
    obstacle = "?" if event.obstacle_id is None else str(event.obstacle_id)
    return (f"| {event.index} | {event.t_start - t0:.2f} | {event.t_end - t0:.2f} | {event.t_min - t0:.2f} | "
            f"{event.min_clearance_m:.3f} | {obstacle} | {'**yes**' if event.collision else 'no'} | "
            f"{_f(event.relative_speed_mps)} | {_f(event.time_to_collision_s)} | {forecast} | "
            f"{_f(planner.get('solve_ms_max'), 1)} | {planner.get('failures', '—')} | "
            f"{_f(planner.get('risk_level'), 3)} | {watchdog.get('stops', '—')} |")


def _event_section(data, event):
    t0 = data.start_s
    kind = "Collision" if event.collision else "Near miss"
    who = "an anonymous obstacle" if event.obstacle_id is None else f"obstacle {event.obstacle_id}"
    lines = [f"### Event {event.index}: {kind.lower()} with {who}", ""]
    lines.append(f"- From {event.t_start - t0:.2f} s to {event.t_end - t0:.2f} s "
                 f"({event.t_end - event.t_start:.2f} s, {event.samples} observations below the threshold); "
                 f"closest at {event.t_min - t0:.2f} s with clearance **{event.min_clearance_m:.3f} m**.")
    lines.append(f"- At onset: relative speed {_f(event.relative_speed_mps, 2, ' m/s')}, time to collision at "
                 f"constant velocities {_f(event.time_to_collision_s, 2, ' s')}.")
    actual = ("where the tracker placed the obstacle then" if data.obstacles.source == "obstacle_forecast"
              else "where the obstacle was")
    lines += ["", f"What the forecast said before the closest approach, against {actual}:", "",
              "| made before | position error [m] | Mahalanobis distance | inside 1−α ellipse (α) | note |",
              "|---|---|---|---|---|"]
    for check in event.forecast_checks:
        if check.get("available"):
            note = "beyond the forecast horizon (extrapolated)" if check["extrapolated"] else ""
            lines.append(f"| {check['lead_s']:g} s | {_f(check['position_error_m'], 3)} | {_f(check['mahalanobis'])} | "
                         f"{'yes' if check['inside_risk_ellipse'] else '**no**'} ({check['risk_level']:g}) | {note} |")
        else:
            lines.append(f"| {check['lead_s']:g} s | — | — | — | {check.get('reason', '')} |")
    planner = event.planner or {}
    lines.append("")
    if planner.get("available"):
        failures = (f"{planner['failures']} failed ({', '.join(planner['failure_statuses'])})"
                    if planner["failures"] else "no failures")
        if planner.get("least_violation"):
            failures += (f", {planner['least_violation']} least-violation plans (commanded inside an obstacle "
                         f"ellipse: the risk bound did not hold)")
        lines.append(f"- Planner from 2 s before onset to the end: {planner['cycles']} cycles, {failures}; solve "
                     f"median {_f(planner['solve_ms_median'], 1)} ms, max {_f(planner['solve_ms_max'], 1)} ms; "
                     f"risk level α={_f(planner.get('risk_level'), 3)} ({planner.get('risk_allocation') or '?'}); "
                     f"smallest planned margin {_f(planner['min_margin_m'], 3, ' m')}.")
    else:
        lines.append("- Planner: no planner_status in the bag.")
    watchdog = event.watchdog or {}
    if watchdog.get("available"):
        causes = f" (causes: {', '.join(watchdog['stop_causes'])})" if watchdog["stop_causes"] else ""
        states = ", ".join(watchdog["states"]) or "—"
        lines.append(f"- Watchdog: states {states}; {watchdog['stops']} stop(s){causes}.")
    else:
        lines.append("- Watchdog: no /diagnostics from the watchdog in the bag.")
    if "commands" in watchdog:
        lines.append(f"- Commands: {watchdog['commands']} on cmd_vel, {watchdog['zero_commands']} of them zero"
                     + (f", {watchdog['commands_held_to_zero']} held to zero while the planner asked to move"
                        if "commands_held_to_zero" in watchdog else "") + ".")
    replan = event.replan
    if replan:
        if replan.get("available"):
            lines.append(f"- Re-solved at onset (state at {replan['state_stamp'] - t0:.2f} s, goal from "
                         f"{replan['goal_source']}, obstacles from {replan['forecast_source']}):")
            recorded = replan.get("recorded_plan")
            if recorded:
                lines.append(f"  - recorded plan: clearance to where the obstacle really went "
                             f"{_f(recorded['clearance_vs_actual_m'], 3, ' m')}")
            for key, title in (("as_recorded", "recorded settings"), ("replanned", "with the overrides")):
                plan = replan[key]
                lines.append(f"  - {title} (α={plan['risk_level']:g}): {plan['status']} in {plan['solve_ms']:.0f} ms; "
                             f"clearance to where the obstacle really went "
                             f"{_f(plan['clearance_vs_actual_m'], 3, ' m')}")
        else:
            lines.append(f"- Re-solve: not possible ({replan.get('reason')}).")
    lines.append("")
    if event.figure:
        lines += [f"![Event {event.index}]({event.figure})", ""]
    else:
        lines += ["(No figure: only the closest events get one; raise --max-figures for more.)", ""]
    return lines


def write_report_md(path, data, events, clearance_m, overrides):
    t0 = data.start_s
    planner, watchdog = planner_summary(data), watchdog_summary(data)
    collisions = sum(e.collision for e in events)
    lines = [f"# Near-miss review of `{data.path.name}`", "", "## Summary", ""]
    lines.append(f"- Bag: `{data.path}`, {data.end_s - data.start_s:.1f} s of data "
                 f"(clock {data.start_s:.3f} s to {data.end_s:.3f} s; times below are seconds since the start).")
    lines.append(f"- Obstacles: {_source_sentence(data)}")
    half_length, half_width = data.half_extents_m
    lines.append(f"- Robot footprint: disc of radius {data.robot_radius_m:g} m (from {data.robot_radius_source}); "
                 f"obstacle footprint: box along the obstacle's heading, half-extents "
                 f"{half_length:g} × {half_width:g} m "
                 f"(from {data.half_extents_source}). Threshold: clearance below "
                 f"{clearance_m:g} m.")
    if events:
        closest = min(events, key=lambda e: e.min_clearance_m)
        lines.append(f"- **{len(events)} event(s), {collisions} collision(s).** Closest approach "
                     f"{closest.min_clearance_m:.3f} m (event {closest.index}, at {closest.t_min - t0:.2f} s).")
    else:
        lines.append("- **No events:** the clearance never dropped below the threshold.")
    if planner["cycles"]:
        lines.append(f"- Planner: {planner['cycles']} cycles, {planner['failures']} failed; solve time median "
                     f"{_f(planner['solve_ms_median'], 1)} ms, p95 {_f(planner['solve_ms_p95'], 1)} ms, "
                     f"max {_f(planner['solve_ms_max'], 1)} ms.")
    if watchdog["stops"] is not None:
        causes = f" (causes: {', '.join(watchdog['stop_causes'])})" if watchdog["stop_causes"] else ""
        lines.append(f"- Watchdog: {watchdog['stops']} stop(s) during the recording{causes}.")
    if overrides:
        lines.append("- Re-solved at each onset with " + ", ".join(f"{k}={v}" for k, v in overrides.items()) + ".")
    if data.missing:
        lines.append("- Missing topics (the review did what it could without them):")
        lines += [f"  - `{name}` ({msgtype}): {consequence}" for name, msgtype, consequence in data.missing]
    if data.notes:
        lines.append("- Notes:")
        lines += [f"  - {note}" for note in data.notes]
    lines += ["", "## Events", ""]
    if events:
        lines += ["Times in seconds since the start; forecast column: the forecast made 1 s before the closest "
                  "approach — position error [m] / Mahalanobis distance / actual position inside its 1−α ellipse.",
                  "", "| # | start | end | closest | clearance [m] | obstacle | collision | rel. speed [m/s] | "
                  "TTC at onset [s] | forecast 1 s before | max solve [ms] | planner failures | α | watchdog stops |",
                  "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
        lines += [_event_row(data, e) for e in events]
    else:
        lines.append("None.")
    lines += ["", "## Overview", "", "![Overview map](overview.png)", "",
              "![Clearance over time](clearance.png)", "", "![Solve times](solve_times.png)", ""]
    if events:
        lines += ["## Each event", ""]
        for event in events:
            lines += _event_section(data, event)
    lines += ["## Files", "", "`events.json` holds every number above (schema `" + SCHEMA + "`, documented in "
              "`riskbound.logs.review.report`).", ""]
    Path(path).write_text("\n".join(lines), encoding="utf-8")


def write_outputs(out_dir, data, events, series, clearance, clearance_m, overrides, max_figures, progress=None):
    """All files into out_dir (created if needed). Returns the list of files written."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    ranked = sorted(events, key=lambda e: e.min_clearance_m)[:max_figures]
    chosen = {id(e) for e in ranked}
    for event in events:
        event.figure = f"event_{event.index:02d}.png" if id(event) in chosen else None
    steps = 3 + len(ranked)
    overview_figure(data, events, out / "overview.png")
    if progress:
        progress("figures", 1 / steps)
    clearance_figure(data, series, events, clearance_m, out / "clearance.png")
    if progress:
        progress("figures", 2 / steps)
    solve_time_figure(data, events, out / "solve_times.png")
    written = [out / name for name in FIGURES]
    for i, event in enumerate(e for e in events if e.figure):
        event_figure(data, event, clearance, clearance_m, out / event.figure)
        written.append(out / event.figure)
        if progress:
            progress("figures", (4 + i) / steps)
    document = events_document(data, events, clearance_m)
    (out / "events.json").write_text(json.dumps(document, indent=1), encoding="utf-8")
    write_report_md(out / "report.md", data, events, clearance_m, overrides)
    written += [out / "events.json", out / "report.md"]
    return written
