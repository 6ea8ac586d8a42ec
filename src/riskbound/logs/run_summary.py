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

Contacts and stops (riskbound.logs.contact_geometry): every walker contact (consecutive frames in
contact with one walker) classified at its onset as the robot moving into the walker or the
walker into the robot, with both speeds; the longest stop while the goal is open. Static world
(riskbound.crowd.static_map, with the crowd bag's /map and the bounds of its metadata): static
contacts (intervals of odometry samples in which the robot's disc overlaps occupied cells) and the
time the robot's centre spent outside the bounds.

The verdict (RunSummary.failures) depends on the robot: goal reached, no static contact, no time
outside the bounds, and no walker contact for a multirotor (double_integrator); a ground robot
(unicycle) is slower than a brisk walker, so a replayed walker, who cannot react to it, can catch
it from behind: it fails only on contacts in which it moved into the walker. summarise_run takes
the robot model as an argument (`riskbound closedloop` passes the parameter file's planner
robot_model).
"""

import json
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import yaml

from riskbound.clearance import closest_approach
from riskbound.crowd.static_map import static_clearance, static_contacts
from riskbound.logs.bag_io import BagError, read_crowd_bag, read_messages
from riskbound.logs.contact_geometry import (ROBOT_INTO_WALKER, ROBOT_INTO_WALKER_MPS, STANDING_SPEED_MPS,
                                             frame_clearances, runs_of, stops, walker_contacts)
from riskbound.motion.heading import quaternion_xyzw_to_yaw

STATUS_TOPIC = "/planner_status"
ODOM_TOPIC = "/odom"
CMD_TOPIC = "/cmd_vel"
DIAGNOSTICS_TOPIC = "/diagnostics"
# Planner statuses in which a solve was attempted (the others are input problems or goal reached).
SOLVE_STATUSES_EXCLUDED = {"goal_reached", "no_odometry", "no_goal", "no_forecast", "stale_odometry",
                           "stale_forecast", "bad_odometry", "bad_forecast", "bad_goal", "wrong_frame",
                           "internal_error"}
# Robot models whose verdict tolerates walker-into-robot contacts (module docstring).
ROBOTS_WALKERS_MAY_CATCH = ("unicycle",)


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
    robot_model: str = "double_integrator"
    solve_ms_p99: float = float("nan")
    walker_contacts: list = field(default_factory=list)   # contact_geometry.WalkerContact, onset order
    robot_into_walker_contacts: int = 0
    walker_into_robot_contacts: int = 0
    robot_into_walker_threshold_mps: float = ROBOT_INTO_WALKER_MPS
    static_map_checked: bool = False   # False: the crowd bag has no /map and no bounds
    static_contacts: int = 0           # intervals of odometry samples with the disc on occupied cells
    static_contact_s: float = 0.0
    min_static_clearance_m: float = float("inf")
    time_outside_bounds_s: float = 0.0
    longest_stop_s: float = 0.0        # while the goal is open (contact_geometry)
    longest_stop_onset_s: float = float("nan")
    stops: int = 0
    start_wait_s: float = 0.0
    standing_speed_mps: float = STANDING_SPEED_MPS

    def failures(self):
        """Why the run fails, in words; empty when it passes (module docstring)."""
        reasons = [] if self.goal_reached else [f"goal not reached (closest {self.min_distance_to_goal_m:.2f} m)"]
        if self.robot_model in ROBOTS_WALKERS_MAY_CATCH:
            if self.robot_into_walker_contacts:
                reasons.append(f"{self.robot_into_walker_contacts} walker contacts with the robot moving into the walker")
        elif self.collisions:
            reasons.append(f"{len(self.walker_contacts)} walker contacts ({self.robot_into_walker_contacts} with the "
                           f"robot moving into the walker; {self.collisions} truth frames with overlapping footprints)")
        if self.static_contacts:
            reasons.append(f"{self.static_contacts} static contacts ({self.static_contact_s:.2f} s on walls or "
                           "obstacles)")
        if self.time_outside_bounds_s > 0.0:
            reasons.append(f"{self.time_outside_bounds_s:.2f} s outside the bounds")
        return reasons

    @property
    def passed(self):
        return not self.failures()

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


def attempted_solve_ms(status_words, solve_ms):
    """The solve times [ms] of the cycles in which a solve was attempted (finite ones only)."""
    solve_ms = np.asarray(solve_ms, dtype=float)
    attempted = np.array([w not in SOLVE_STATUSES_EXCLUDED and w != "" for w in status_words], dtype=bool)
    return solve_ms[attempted & np.isfinite(solve_ms)] if len(solve_ms) else np.zeros(0)


def read_solve_ms(recorded_bag):
    """attempted_solve_ms of a recorded run's /planner_status messages."""
    values = [_status_values(message) for _, _, _, message in read_messages(recorded_bag, [STATUS_TOPIC])]
    return attempted_solve_ms([v.get("status", "") for v in values], [_float(v.get("solve_ms")) for v in values])


def summarise_run(recorded_bag, crowd_bag, goal_xy, robot_radius_m, control_rate_hz, goal_tolerance_m=0.3,
                  walker_half_extents_m=(0.25, 0.2), robot_model="double_integrator"):
    """(RunSummary, RunSeries) of a recorded run. BagError when a bag is unreadable or lacks
    odometry or planner statuses. walker_half_extents_m: (half_length, half_width) of each
    walker's box, the tracker's footprint; robot_model: the planner's, for the verdict (module
    docstring)."""
    if robot_model not in ("double_integrator", *ROBOTS_WALKERS_MAY_CATCH):
        raise ValueError(f"robot_model={robot_model!r}: must be 'double_integrator' or 'unicycle'")
    odom_t, odom_xy, odom_v, status_t, status, cmd_count, stops_total, counts = [], [], [], [], [], 0, 0, {}
    odom_frames = set()
    for topic, _, time_ns, message in read_messages(recorded_bag, [ODOM_TOPIC, STATUS_TOPIC, CMD_TOPIC,
                                                                   DIAGNOSTICS_TOPIC]):
        counts[topic] = counts.get(topic, 0) + 1
        if topic == ODOM_TOPIC:
            stamp = message.header.stamp
            odom_t.append(stamp.sec + 1e-9 * stamp.nanosec)
            odom_xy.append((message.pose.pose.position.x, message.pose.pose.position.y))
            q = message.pose.pose.orientation
            linear = message.twist.twist.linear
            odom_v.append((q.x, q.y, q.z, q.w, linear.x, linear.y))
            odom_frames.add(message.header.frame_id)
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
    # The twist is in the body frame (child_frame_id): turned into the odometry frame by the yaw.
    twist = np.asarray(odom_v, dtype=float).reshape(-1, 6)[order]
    yaw, body_x, body_y = quaternion_xyzw_to_yaw(twist[:, :4]), twist[:, 4], twist[:, 5]
    odom_velocity = np.column_stack([np.cos(yaw) * body_x - np.sin(yaw) * body_y,
                                     np.sin(yaw) * body_x + np.cos(yaw) * body_y])
    # As the review reads odometry: non-finite samples and repeated stamps carry no position.
    keep = np.all(np.isfinite(odom_xy), axis=1)
    keep[1:] &= np.diff(odom_t) > 0.0
    odom_t, odom_xy, odom_velocity = odom_t[keep], odom_xy[keep], np.nan_to_num(odom_velocity[keep])
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
    velocity_at_truth = np.column_stack([np.interp(truth_t, odom_t, odom_velocity[:, 0]),
                                         np.interp(truth_t, odom_t, odom_velocity[:, 1])])
    per_walker = frame_clearances(robot_at_truth, robot_radius_m, truth_positions, truth_headings, extents)
    clearance = np.array([np.min(values) if len(values) else np.inf for values in per_walker])
    contacts = walker_contacts(truth_t - t0, truth_ids, truth_positions, per_walker, robot_at_truth,
                               velocity_at_truth)
    static = static_world_figures(crowd, odom_t, odom_xy, robot_radius_m, odom_frames)
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

    stood = stops(odom_t - t0, np.hypot(odom_velocity[:, 0], odom_velocity[:, 1]),
                  odom_t[arrived[0]] - t0 if len(arrived) else None)

    status_t = np.asarray(status_t)
    words = [values.get("status", "") for values in status]
    solve_ms = np.array([_float(values.get("solve_ms")) for values in status])
    solved_ms = attempted_solve_ms(words, solve_ms)
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
        robot_model=robot_model,
        solve_ms_p99=float(np.percentile(solved_ms, 99)) if len(solved_ms) else float("nan"),
        walker_contacts=contacts,
        robot_into_walker_contacts=sum(c.who == ROBOT_INTO_WALKER for c in contacts),
        walker_into_robot_contacts=sum(c.who != ROBOT_INTO_WALKER for c in contacts),
        longest_stop_s=stood.longest_stop_s, longest_stop_onset_s=stood.longest_stop_onset_s, stops=stood.stops,
        start_wait_s=stood.start_wait_s,
        **static,
    )
    series = RunSeries(odom_t=odom_t - t0, odom_xy=odom_xy, truth_t=truth_t - t0, truth_positions=truth_positions,
                       truth_headings=truth_headings, truth_ids=truth_ids, clearance_t=truth_t - t0,
                       clearance_m=clearance,
                       status_t=status_t - t0, solve_ms=solve_ms, status_words=words)
    return summary, series


def static_world_figures(crowd, odom_t, odom_xy, robot_radius_m, odom_frames):
    """RunSummary's static fields from the crowd bag's /map and bounds; {} when it has neither."""
    occupancy, text = crowd.static_map, crowd.metadata.get("bounds")
    if occupancy is None or text is None:
        return {}
    try:
        bounds = [float(v) for v in yaml.safe_load(text)]
    except (TypeError, ValueError, yaml.YAMLError):
        raise BagError(f"{crowd.path}: bounds={text!r} in the metadata is not [x_min, x_max, y_min, y_max]") from None
    if odom_frames - {occupancy.frame_id}:
        raise BagError(f"{crowd.path}: /map is in frame {occupancy.frame_id!r}, the odometry in "
                       f"{sorted(odom_frames)}: the static contacts cannot be checked")
    try:
        figures = static_contacts(odom_t, odom_xy, robot_radius_m, occupancy, bounds)
    except ValueError as error:
        raise BagError(f"{crowd.path}: {error}") from None
    in_contact = static_clearance(odom_xy, robot_radius_m, occupancy) < 0.0
    held = np.r_[np.diff(odom_t), 0.0]
    return dict(static_map_checked=True, static_contacts=len(runs_of(in_contact)),
                static_contact_s=float(np.sum(held[in_contact])), min_static_clearance_m=figures.min_clearance_m,
                time_outside_bounds_s=figures.time_outside_bounds_s)


def summary_text(summary):
    """A few lines for people: the verdict and the figures that matter."""
    s = summary
    verdict = "PASSED" if s.passed else "FAILED"
    reasons = s.failures()
    by_who = (f"{s.robot_into_walker_contacts} with the robot moving into the walker (> "
              f"{s.robot_into_walker_threshold_mps:g} m/s toward it at onset), {s.walker_into_robot_contacts} "
              "with the walker moving into the robot")
    static = (f"{s.static_contacts} static contacts ({s.static_contact_s:.2f} s), minimum static clearance "
              f"{s.min_static_clearance_m:.3f} m, {s.time_outside_bounds_s:.2f} s outside the bounds"
              if s.static_map_checked else "not checked (the crowd bag has no /map or no bounds)")
    lines = [
        f"closed loop {verdict}" + (f": {'; '.join(reasons)}" if reasons else ""),
        f"  goal ({s.goal_xy[0]:.1f}, {s.goal_xy[1]:.1f}) " + (
            f"reached after {s.time_to_goal_s:.1f} s" if s.goal_reached else "not reached")
        + f", path {s.path_length_m:.1f} m, mean speed {s.mean_speed_mps:.2f} m/s",
        f"  minimum clearance {s.min_clearance_m:.3f} m at t={s.min_clearance_time_s:.2f} s, walker "
        f"{s.min_clearance_walker_id} (robot disc {s.robot_radius_m:g} m against walker boxes "
        f"{s.walker_half_extents_m[0]:g} × {s.walker_half_extents_m[1]:g} m, {s.truth_frames_checked} truth frames), "
        f"collisions {s.collisions}",
        f"  walker contacts: {len(s.walker_contacts)}: {by_who}",
        *[f"    walker {c.walker_id} at t={c.onset_s:.1f} s for {c.frames} frames (min {c.min_clearance_m:.3f} m): "
          f"{c.who.replace('_', ' ')}; robot {c.robot_speed_mps:.2f} m/s ({c.robot_toward_walker_mps:+.2f} toward), "
          f"walker {c.walker_speed_mps:.2f} m/s ({c.walker_toward_robot_mps:+.2f} toward)" for c in s.walker_contacts],
        f"  static world: {static}",
        f"  stops while the goal is open (speed < {s.standing_speed_mps:g} m/s): {s.stops}, longest "
        f"{s.longest_stop_s:.1f} s" + (f" from t={s.longest_stop_onset_s:.1f} s" if s.stops else "")
        + f"; waiting at the start {s.start_wait_s:.1f} s ({s.robot_model})",
        f"  planner: {s.planner_cycles} cycles reported of {s.planner_cycles_expected} expected, {s.solves} solves, "
        f"solve ms median {s.solve_ms_median:.1f}, p95 {s.solve_ms_p95:.1f}, p99 {s.solve_ms_p99:.1f}, "
        f"max {s.solve_ms_max:.1f}",
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
                   f"{summary.collisions} collision frames)")
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
