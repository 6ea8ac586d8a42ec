"""Summary of one closed-loop run from its recorded bag and the crowd bag it replayed (no ROS).

Ground truth: the walkers of the crowd bag's /crowd_truth (poses with headings and ids) and the
robot of the recorded /odom (the simulated robot's odometry is its true state). Clearance is
riskbound.clearance's, the one definition the review, the benchmarks and the tests use: the
robot's disc (the planner's robot_radius_m) against each walker's box oriented with its heading
(the tracker's footprint half-extents), signed, negative when the footprints overlap. At every
truth frame inside the run the robot position is interpolated linearly from odometry (50 Hz
against walkers at 10 Hz); c_k is the smallest clearance over the walkers of frame k, and a frame
with c_k < 0 is a collision. The minimum clearance is riskbound.clearance.closest_approach over
the run (refined between frames), the number `riskbound review` reports for the same recording.
Planner cycles are the /planner_status
messages (one per cycle, whatever its outcome); the cycles expected are the control rate times
the span between the first and the last status (log times, i.e. the recorder's simulated clock).
"""

import json
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from riskbound.clearance import closest_approach, disc_box_clearance
from riskbound.logs.bag_io import BagError, read_crowd_bag, read_messages

STATUS_TOPIC = "/planner_status"
ODOM_TOPIC = "/odom"
CMD_TOPIC = "/cmd_vel"
DIAGNOSTICS_TOPIC = "/diagnostics"
# Planner statuses in which a solve was attempted (the others are input problems or goal reached).
SOLVE_STATUSES_EXCLUDED = {"goal_reached", "no_odometry", "no_goal", "no_forecast", "stale_odometry",
                           "stale_forecast", "bad_odometry", "bad_forecast", "bad_goal", "wrong_frame",
                           "internal_error"}


@dataclass
class RunSummary:
    """Figures of one run; times in seconds of the bag's clock unless named otherwise."""

    goal_xy: list
    goal_reached: bool
    time_to_goal_s: float            # from the first odometry to the first arrival; NaN if none
    final_distance_to_goal_m: float
    min_distance_to_goal_m: float
    collisions: int                  # truth frames with overlapping footprints
    min_clearance_m: float           # riskbound.clearance.closest_approach over the run
    min_clearance_time_s: float      # seconds after the first odometry
    min_clearance_walker_id: int     # -1 when no walker was compared
    truth_frames_checked: int
    robot_radius_m: float
    walker_half_extents_m: list      # [half_length, half_width] of each walker's box
    planner_cycles: int
    planner_cycles_expected: int
    planner_status_counts: dict
    solves: int
    solve_ms_median: float
    solve_ms_p95: float
    solve_ms_max: float
    path_length_m: float
    mean_speed_mps: float
    watchdog_stops_total: int
    message_counts: dict = field(default_factory=dict)

    @property
    def passed(self):
        return self.goal_reached and self.collisions == 0

    def to_json(self):
        return json.dumps(asdict(self), indent=2, default=_json_default)


@dataclass
class RunSeries:
    """Time series behind the summary and its plots (seconds after the first odometry)."""

    odom_t: np.ndarray
    odom_xy: np.ndarray
    truth_t: np.ndarray
    truth_positions: list
    truth_headings: list
    truth_ids: list
    clearance_t: np.ndarray
    clearance_m: np.ndarray
    status_t: np.ndarray
    solve_ms: np.ndarray
    status_words: list


def _json_default(value):
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    raise TypeError(f"{type(value).__name__} is not JSON serialisable")


def _status_values(message):
    return {kv.key: kv.value for kv in message.values}


def _float(text):
    try:
        return float(text)
    except (TypeError, ValueError):
        return float("nan")


def summarise_run(recorded_bag, crowd_bag, goal_xy, robot_radius_m, control_rate_hz, goal_tolerance_m=0.3,
                  walker_half_extents_m=(0.25, 0.2)):
    """(RunSummary, RunSeries) of a recorded run. BagError when a bag is unreadable or lacks
    odometry or planner statuses. walker_half_extents_m: (half_length, half_width) of each
    walker's box, the tracker's footprint."""
    odom_t, odom_xy, status_t, status, cmd_count, stops_total, counts = [], [], [], [], 0, 0, {}
    for topic, _, time_ns, message in read_messages(recorded_bag, [ODOM_TOPIC, STATUS_TOPIC, CMD_TOPIC,
                                                                   DIAGNOSTICS_TOPIC]):
        counts[topic] = counts.get(topic, 0) + 1
        if topic == ODOM_TOPIC:
            stamp = message.header.stamp
            odom_t.append(stamp.sec + 1e-9 * stamp.nanosec)
            odom_xy.append((message.pose.pose.position.x, message.pose.pose.position.y))
        elif topic == STATUS_TOPIC:
            status_t.append(time_ns * 1e-9)
            status.append(_status_values(message))
        elif topic == CMD_TOPIC:
            cmd_count += 1
        else:
            for item in message.status:
                values = _status_values(item)
                if "stops_total" in values:
                    stops_total = max(stops_total, int(_float(values["stops_total"])))
    if not odom_t:
        raise BagError(f"{recorded_bag}: no {ODOM_TOPIC} messages: the simulated robot never ran")
    if not status_t:
        raise BagError(f"{recorded_bag}: no {STATUS_TOPIC} messages: the planner never cycled")
    order = np.argsort(odom_t, kind="stable")
    odom_t = np.asarray(odom_t)[order]
    odom_xy = np.asarray(odom_xy, dtype=float).reshape(-1, 2)[order]
    # As the review reads odometry: non-finite samples and repeated stamps carry no position.
    keep = np.all(np.isfinite(odom_xy), axis=1)
    keep[1:] &= np.diff(odom_t) > 0.0
    odom_t, odom_xy = odom_t[keep], odom_xy[keep]
    if len(odom_t) < 2:
        raise BagError(f"{recorded_bag}: fewer than two usable {ODOM_TOPIC} messages: no robot path")
    t0 = odom_t[0]

    crowd = read_crowd_bag(crowd_bag)
    extents = np.asarray(walker_half_extents_m, dtype=float)
    inside = (crowd.truth.stamps_s >= odom_t[0]) & (crowd.truth.stamps_s <= odom_t[-1])
    truth_t = crowd.truth.stamps_s[inside]
    truth_positions = [p for p, keep in zip(crowd.truth.positions, inside) if keep]
    truth_headings = [h for h, keep in zip(crowd.truth.headings, inside) if keep]
    truth_ids = [i for i, keep in zip(crowd.truth_ids, inside) if keep]
    robot_at_truth = np.column_stack([np.interp(truth_t, odom_t, odom_xy[:, 0]),
                                      np.interp(truth_t, odom_t, odom_xy[:, 1])])
    clearance = np.array([
        np.min(disc_box_clearance(robot, robot_radius_m, walkers, np.nan_to_num(headings), extents))
        if len(walkers) else np.inf
        for robot, walkers, headings in zip(robot_at_truth, truth_positions, truth_headings)])
    walkers_per_frame = [len(ids) for ids in truth_ids]
    approach = closest_approach(
        odom_t, odom_xy, robot_radius_m, np.repeat(truth_t, walkers_per_frame),
        np.concatenate(truth_ids).astype(np.int64) if truth_ids else np.zeros(0, dtype=np.int64),
        np.concatenate(truth_positions) if truth_positions else np.zeros((0, 2)),
        np.nan_to_num(np.concatenate(truth_headings)) if truth_headings else np.zeros(0),
        np.tile(extents, (sum(walkers_per_frame), 1)))

    goal = np.asarray(goal_xy, dtype=float)
    distance = np.linalg.norm(odom_xy - goal, axis=1)
    arrived = np.flatnonzero(distance <= goal_tolerance_m)
    steps = np.linalg.norm(np.diff(odom_xy, axis=0), axis=1)
    duration_s = odom_t[-1] - t0

    status_t = np.asarray(status_t)
    words = [values.get("status", "") for values in status]
    solve_ms = np.array([_float(values.get("solve_ms")) for values in status])
    attempted = np.array([w not in SOLVE_STATUSES_EXCLUDED and w != "" for w in words], dtype=bool)
    solved_ms = solve_ms[attempted & np.isfinite(solve_ms)]
    expected = int(round((status_t[-1] - status_t[0]) * control_rate_hz)) + 1
    status_counts = {}
    for word in words:
        status_counts[word] = status_counts.get(word, 0) + 1

    summary = RunSummary(
        goal_xy=[float(goal[0]), float(goal[1])],
        goal_reached=bool(len(arrived)),
        time_to_goal_s=float(odom_t[arrived[0]] - t0) if len(arrived) else float("nan"),
        final_distance_to_goal_m=float(distance[-1]),
        min_distance_to_goal_m=float(np.min(distance)),
        collisions=int(np.sum(clearance < 0.0)),
        min_clearance_m=approach.clearance_m if approach is not None else float("inf"),
        min_clearance_time_s=approach.time_s - t0 if approach is not None else float("nan"),
        min_clearance_walker_id=approach.obstacle_id if approach is not None else -1,
        truth_frames_checked=int(len(clearance)),
        robot_radius_m=float(robot_radius_m), walker_half_extents_m=[float(v) for v in extents],
        planner_cycles=int(len(status_t)), planner_cycles_expected=expected,
        planner_status_counts=dict(sorted(status_counts.items())),
        solves=int(len(solved_ms)),
        solve_ms_median=float(np.median(solved_ms)) if len(solved_ms) else float("nan"),
        solve_ms_p95=float(np.percentile(solved_ms, 95)) if len(solved_ms) else float("nan"),
        solve_ms_max=float(np.max(solved_ms)) if len(solved_ms) else float("nan"),
        path_length_m=float(np.sum(steps)),
        mean_speed_mps=float(np.sum(steps) / duration_s) if duration_s > 0 else 0.0,
        watchdog_stops_total=stops_total,
        message_counts=dict(sorted({**counts, CMD_TOPIC: cmd_count}.items())),
    )
    series = RunSeries(odom_t=odom_t - t0, odom_xy=odom_xy, truth_t=truth_t - t0, truth_positions=truth_positions,
                       truth_headings=truth_headings, truth_ids=truth_ids, clearance_t=truth_t - t0,
                       clearance_m=clearance,
                       status_t=status_t - t0, solve_ms=solve_ms, status_words=words)
    return summary, series


def summary_text(summary):
    """A few lines for people: the verdict and the figures that matter."""
    s = summary
    verdict = "PASSED" if s.passed else "FAILED"
    reasons = ([] if s.goal_reached else [f"goal not reached (closest {s.min_distance_to_goal_m:.2f} m)"]) + (
        [f"{s.collisions} truth frames with overlapping footprints"] if s.collisions else [])
    lines = [
        f"closed loop {verdict}" + (f": {'; '.join(reasons)}" if reasons else ""),
        f"  goal ({s.goal_xy[0]:.1f}, {s.goal_xy[1]:.1f}) " + (
            f"reached after {s.time_to_goal_s:.1f} s" if s.goal_reached else "not reached")
        + f", path {s.path_length_m:.1f} m, mean speed {s.mean_speed_mps:.2f} m/s",
        f"  minimum clearance {s.min_clearance_m:.3f} m at t={s.min_clearance_time_s:.2f} s, walker "
        f"{s.min_clearance_walker_id} (robot disc {s.robot_radius_m:g} m against walker boxes "
        f"{s.walker_half_extents_m[0]:g} × {s.walker_half_extents_m[1]:g} m, {s.truth_frames_checked} truth frames), "
        f"collisions {s.collisions}",
        f"  planner: {s.planner_cycles} cycles reported of {s.planner_cycles_expected} expected, {s.solves} solves, "
        f"solve ms median {s.solve_ms_median:.1f}, p95 {s.solve_ms_p95:.1f}, max {s.solve_ms_max:.1f}",
        "  planner statuses: " + ", ".join(f"{k or '(none)'} {v}" for k, v in s.planner_status_counts.items()),
        f"  watchdog stops: {s.watchdog_stops_total}",
    ]
    return "\n".join(lines)


def plot_run(summary, series, out_dir):
    """trajectories.png and clearance.png in out_dir; returns their paths."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.patches import Circle, Polygon

    out_dir = Path(out_dir)
    paths = []
    figure, axes = plt.subplots(figsize=(9, 7.5))
    tracks = {}
    for positions, ids in zip(series.truth_positions, series.truth_ids):
        for walker_id, xy in zip(ids.tolist(), positions):
            tracks.setdefault(walker_id, []).append(xy)
    for index, xy in enumerate(tracks.values()):
        xy = np.asarray(xy)
        axes.plot(xy[:, 0], xy[:, 1], color="0.75", linewidth=0.8, label="walkers (truth)" if index == 0 else None)
    scatter = axes.scatter(series.odom_xy[:, 0], series.odom_xy[:, 1], c=series.odom_t, s=4, cmap="viridis",
                           label="robot", zorder=3)
    figure.colorbar(scatter, ax=axes, label="time [s]")
    axes.plot(*series.odom_xy[0], "ks", markersize=8, label="start")
    axes.plot(*summary.goal_xy, "r*", markersize=14, label="goal")
    if len(series.clearance_m):
        worst = int(np.argmin(series.clearance_m))
        robot = [np.interp(series.clearance_t[worst], series.odom_t, series.odom_xy[:, i]) for i in (0, 1)]
        axes.add_patch(Circle(robot, summary.robot_radius_m, fill=False, color="tab:red", linewidth=1.5,
                              label=f"closest approach ({summary.min_clearance_m:.2f} m)"))
        half_length, half_width = summary.walker_half_extents_m
        corners = np.array([[half_length, half_width], [-half_length, half_width], [-half_length, -half_width],
                            [half_length, -half_width]])
        for walker, heading in zip(series.truth_positions[worst], np.nan_to_num(series.truth_headings[worst])):
            c, s = np.cos(heading), np.sin(heading)
            axes.add_patch(Polygon(walker + corners @ np.array([[c, s], [-s, c]]), closed=True, fill=False,
                                   color="tab:orange", linewidth=1.0))
    axes.set_aspect("equal")
    axes.set_xlabel("x [m]")
    axes.set_ylabel("y [m]")
    axes.set_title(f"closed loop: robot and walkers ({'goal reached' if summary.goal_reached else 'goal NOT reached'}, "
                   f"{summary.collisions} collisions)")
    axes.legend(loc="upper left", fontsize=8)
    path = out_dir / "trajectories.png"
    figure.savefig(path, dpi=120, bbox_inches="tight")
    plt.close(figure)
    paths.append(path)

    figure, (top, bottom) = plt.subplots(2, 1, figsize=(9, 6.5), sharex=True)
    top.plot(series.clearance_t, series.clearance_m, color="tab:blue", linewidth=1.2)
    top.axhline(0.0, color="tab:red", linewidth=1.0, label="footprints touch")
    top.set_ylabel("clearance to nearest walker [m]")
    top.set_title("clearance of the robot's footprint to the walkers' (ground truth)")
    top.legend(loc="upper right", fontsize=8)
    solved = np.isfinite(series.solve_ms) & (series.solve_ms > 0)
    bottom.plot(series.status_t[solved], series.solve_ms[solved], ".", markersize=3, color="tab:green")
    bottom.set_ylabel("planner solve time [ms]")
    bottom.set_xlabel("time since the robot started [s]")
    path = out_dir / "clearance.png"
    figure.savefig(path, dpi=120, bbox_inches="tight")
    plt.close(figure)
    paths.append(path)
    return paths
