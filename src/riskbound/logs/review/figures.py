"""The review's figures: overview map, clearance over time, solve times, and one snapshot per event.

    overview.png         map: robot track, obstacle tracks, where each event happened
    clearance.png        smallest clearance to any obstacle over time, threshold, events shaded
    solve_times.png      planner solve-time histogram and timeline (failures marked)
    event_NN.png         per event: snapshot at the closest approach (footprints, forecast risk
                         ellipses, recorded and re-solved plans) and that obstacle's clearance over time
"""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.collections import LineCollection, PolyCollection  # noqa: E402
from matplotlib.patches import Circle, Ellipse, Polygon  # noqa: E402

FIGURES = ("overview.png", "clearance.png", "solve_times.png")
SNAPSHOT_HALF_WIDTH_M = 3.0
_DPI = 90
_PNG = {"compress_level": 3}  # quicker to encode than the default 6; files ~20 % larger


def _legend(ax, **style):
    """A legend only when something was drawn with a label (an empty one makes matplotlib warn)."""
    if ax.get_legend_handles_labels()[0]:
        ax.legend(**style)


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
    _legend(ax, loc="best", fontsize=8)
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
    _legend(ax, loc="upper right", fontsize=8)
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
        _legend(ax, fontsize=8)
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
    _legend(snap, loc="upper left", fontsize=7)
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
    _legend(curve, fontsize=8)
    curve.grid(alpha=0.3)
    fig.subplots_adjust(left=0.06, right=0.98, bottom=0.1, top=0.93, wspace=0.18)
    fig.savefig(path, dpi=_DPI, pil_kwargs=_PNG)
    plt.close(fig)
