"""report.md, the review's report for people (read top to bottom: summary, table of events,
overview figures, one section and figure per event), and `write_outputs`, which writes every file.

Files written to the output directory:

    report.md            the report
    overview.png         map: robot track, obstacle tracks, where each event happened
    clearance.png        smallest clearance to any obstacle over time, threshold, events shaded
    solve_times.png      planner solve-time histogram and timeline (failures marked)
    event_NN.png         per event: snapshot at the closest approach (footprints, forecast risk
                         ellipses, recorded and re-solved plans) and that obstacle's clearance over time
    events.json          machine-readable results (schema in riskbound.logs.review.events_json)
"""

import json
import math
from pathlib import Path

from riskbound.logs.review.events_json import SCHEMA, events_document, planner_summary, watchdog_summary
from riskbound.logs.review.figures import (FIGURES, clearance_figure, event_figure, overview_figure,
                                           solve_time_figure)
from riskbound.logs.review.sanity import REJECTED_WHAT


def _f(value, digits=2, unit=""):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—" if value is None or math.isnan(value) else ("∞" if value > 0 else "−∞")
    return f"{value:.{digits}f}{unit}"


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
            count = planner["least_violation"]
            failures += (f", {count} least-violation plan{'' if count == 1 else 's'} (commanded inside an "
                         f"obstacle ellipse: the risk bound did not hold)")
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
                head = f"  - {title} (α={plan['risk_level']:g}): {plan['status']} in {plan['solve_ms']:.0f} ms; "
                if plan["success"]:
                    lines.append(head + "clearance to where the obstacle really went "
                                 f"{_f(plan['clearance_vs_actual_m'], 3, ' m')}")
                else:
                    lines.append(head + "no usable plan, so nothing to score against what happened")
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
    if data.not_examined:
        lines.append("- **Not examined:** " + "; ".join(data.not_examined) + ". The clearance could not be "
                     "computed, so this report cannot say whether anything happened.")
    elif events:
        closest = min(events, key=lambda e: e.min_clearance_m)
        lines.append(f"- **{len(events)} event(s), {collisions} collision(s).** Closest approach "
                     f"{closest.min_clearance_m:.3f} m (event {closest.index}, at {closest.t_min - t0:.2f} s).")
    else:
        lines.append("- **No events:** the clearance never dropped below the threshold.")
    if data.closest is not None:
        who = f"obstacle {data.closest.obstacle_id}"
        lines.append(f"- Closest approach over the whole run: {data.closest.clearance_m:.3f} m at "
                     f"{data.closest.time_s - t0:.2f} s ({who}; riskbound.clearance, the closed-loop summary's "
                     f"definition).")
    if data.rejected:
        counts = ", ".join(f"{count} on `{data.used.get(role, role)}`" for role, count in sorted(data.rejected.items()))
        lines.append(f"- **Rejected messages:** {counts}: each held {REJECTED_WHAT}; they were left out.")
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
    if data.not_examined:
        lines.append("Not examined (see the summary).")
    elif events:
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
              "`riskbound.logs.review.events_json`).", ""]
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
