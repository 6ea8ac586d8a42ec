"""Read a recorded bag into plain arrays for the review, without a ROS graph.

Topics are found by their last name component (`/odom`, `/robot1/odom` ...; `--namespace` picks
one robot when a bag holds several). What each is used for:

| name              | type                              | used for                                     |
|-------------------|-----------------------------------|----------------------------------------------|
| odom              | nav_msgs/msg/Odometry             | robot track (without it no clearance at all) |
| crowd_truth       | geometry_msgs/msg/PoseArray       | obstacles, first choice (synthetic bags)     |
| crowd_truth_ids   | std_msgs/msg/UInt32MultiArray     | ids of crowd_truth (pairing: see _pair_ids)  |
| obstacle_forecast | sensor_msgs/msg/PointCloud2       | obstacles, second choice (step 0 = current   |
|                   |                                   | estimate); forecast checks; replanning       |
| detections        | geometry_msgs/msg/PoseArray       | obstacles, last choice (no identities)       |
| plan              | nav_msgs/msg/Path                 | planned paths in the event figures           |
| planner_status    | diagnostic_msgs/msg/DiagnosticStatus | solve times, failures, risk level, margins |
| diagnostics       | diagnostic_msgs/msg/DiagnosticArray  | watchdog state, stops and their causes     |
| cmd_vel, cmd_vel_plan | geometry_msgs/msg/TwistStamped | gated and planned commands                  |
| goal              | geometry_msgs/msg/PoseStamped     | replanning target                            |

Time base: header stamps (the time the data describe; sim time in a simulated run). Messages
without a header (planner_status) and zero stamps get their log time shifted by the median
(stamp − log time) offset of the stamped messages, so all series share one clock.

Every failure to read (missing path, not a bag, truncated or corrupt file, undecodable message)
raises BagError naming the bag and what was wrong.
"""

from pathlib import Path

import numpy as np

from riskbound.logs.bag_io import BagError, quaternion_xyzw_to_yaw, read_custom_data
from riskbound.logs.review.collect import read_all
from riskbound.logs.review.obstacle_rows import (obstacles_from_forecasts, obstacles_from_pose_arrays, ordered,
                                                 screen_forecasts, times_of)
from riskbound.logs.review.sanity import ODOM_POSITION, ODOM_USED, plausible_positions
from riskbound.logs.review.series import (CommandSeries, ForecastSeries, PlanSeries, ReviewData, RobotTrack,
                                          StatusSeries, empty_obstacles)
from riskbound.logs.review.topics import OBSTACLE_SOURCES, ROLES, match_topics

DEFAULT_HALF_EXTENTS_M = (0.25, 0.2)
DEFAULT_ROBOT_RADIUS_M = 0.3


def _robot_track(records, offset, notes, rejected):
    if not records:
        empty = np.zeros((0, 6, 6))
        return RobotTrack(np.zeros(0), np.zeros((0, 2)), np.zeros(0), np.zeros((0, 2)), np.zeros(0), empty, empty)
    times, records = ordered(times_of(records, offset), records)
    values = np.stack([r[4] for r in records])
    with np.errstate(invalid="ignore"):
        plausible = plausible_positions(values[:, ODOM_POSITION]) & np.all(np.isfinite(values[:, ODOM_USED]), axis=1)
    if not np.all(plausible):
        rejected["odom"] = int((~plausible).sum())
    keep = plausible.copy()
    keep[1:] &= np.diff(times) > 0.0  # repeated stamps add nothing and break interpolation
    values, times = values[keep], times[keep]
    frames = {r[2] for r in records}
    if len(frames) > 1:
        notes.append(f"odom: several frame_ids ({', '.join(sorted(frames))})")
    return RobotTrack(
        times_s=times, positions=values[:, 0:2].copy(), yaws=quaternion_xyzw_to_yaw(values[:, 3:7]),
        body_velocities=values[:, 43:45].copy(), yaw_rates=values[:, 48].copy(),
        pose_covariances=values[:, 7:43].reshape(-1, 6, 6), twist_covariances=values[:, 49:85].reshape(-1, 6, 6),
        frame_id=records[0][2] if records else "", child_frame_id=records[0][3] if records else "")


def _status_series(records, offset):
    if not records:
        return StatusSeries(np.zeros(0), np.zeros(0, dtype=int), [], [])
    times, records = ordered(times_of(records, offset), records)
    return StatusSeries(times, np.array([r[2] for r in records], dtype=int), [r[3] for r in records],
                        [r[4] for r in records])


def _command_series(records, offset):
    if not records:
        return CommandSeries(np.zeros(0), np.zeros((0, 3)))
    times, records = ordered(times_of(records, offset), records)
    return CommandSeries(times, np.stack([r[2] for r in records]))


def load_review_data(path, namespace="", robot_radius_m=None, half_extents_m=None, progress=None):
    """Read everything the review uses from the bag at `path` (rosbag2 directory, .mcap or .db3).

    robot_radius_m / half_extents_m: None takes them from the bag (planner_status key
    robot_radius_m; the forecasts' half-extents) or the defaults 0.3 m and 0.25 × 0.2 m.
    progress(stage, fraction) is called while reading. Raises BagError.
    """
    path = Path(path)
    if not path.exists():
        raise BagError(f"{path}: no such bag (expected a rosbag2 directory or a .mcap/.db3 file)")
    if path.is_dir() and not (path / "metadata.yaml").is_file():
        storage = sorted(p for p in path.iterdir() if p.suffix in (".mcap", ".db3"))
        if storage:
            raise BagError(f"{path / 'metadata.yaml'}: missing, so {path} is not a complete bag directory; "
                           f"pass the storage file itself (riskbound review {storage[0]})")
        raise BagError(f"{path / 'metadata.yaml'}: missing, and {path} holds no .mcap or .db3 file either: "
                       "not a bag")
    state = {}
    rejected = {}

    def choose(topics):
        used, notes = match_topics(topics, namespace)
        state["matched"] = set(used)
        # Only one obstacle source is read: the first present one (ids only with ground truth).
        present = [role for role in OBSTACLE_SOURCES if role in used and topics[used[role]][1] > 0]
        source = present[0] if present else None
        for role in OBSTACLE_SOURCES:
            if role != source and role != "obstacle_forecast":
                used.pop(role, None)
        if source != "crowd_truth":
            used.pop("crowd_truth_ids", None)
        state.update(notes=notes, source=source, present=present)
        return used

    collector, topics, used = read_all(path, choose, progress)
    notes, source = state["notes"], state["source"]
    # Ids only matter with the ground truth they belong to.
    missing = [(role, msgtype, consequence) for role, (msgtype, consequence) in ROLES.items()
               if role not in state["matched"]
               and not (role == "crowd_truth_ids" and "crowd_truth" not in state["matched"])]
    offset = float(np.median(collector.offsets)) if collector.offsets else 0.0

    forecast_times = times_of(collector.forecasts, offset)
    forecast_times, forecast_records = ordered(forecast_times, collector.forecasts)
    forecasts = ForecastSeries(stamps_s=forecast_times, frame_ids=[r[2] for r in forecast_records],
                               raws=[r[3] for r in forecast_records], deserialize=collector.deserialize)
    robot = _robot_track(collector.odom, offset, notes, rejected)

    planner = _status_series(collector.planner, offset)
    radius_source = "option --robot-radius-m"
    if robot_radius_m is None:
        recorded = planner.numeric("robot_radius_m") if len(planner) else np.zeros(0)
        recorded = recorded[np.isfinite(recorded)]
        if len(recorded):
            robot_radius_m, radius_source = float(np.median(recorded)), "planner_status robot_radius_m"
        else:
            robot_radius_m, radius_source = DEFAULT_ROBOT_RADIUS_M, "the default: the bag does not record it"

    extents_source = "option --obstacle-half-extents-m"
    if half_extents_m is None:
        half_extents_m, extents_source = DEFAULT_HALF_EXTENTS_M, "the default: the bag does not record it"
        for i in range(min(len(forecasts), 20)):
            forecast = forecasts.get(i)
            if forecast is not None and forecast.track_count:
                # float32 on the wire: round so 0.2 reads as 0.2 in the report
                half_extents_m = tuple(round(float(v), 6) for v in np.median(forecast.half_extents, axis=0))
                extents_source = "obstacle_forecast half_length/half_width"
                break

    if source in ("crowd_truth", "detections"):
        records = collector.truth if source == "crowd_truth" else collector.detections
        ids = collector.truth_ids if source == "crowd_truth" and "crowd_truth_ids" in used else None
        if source == "crowd_truth" and ids is None:
            notes.append("crowd_truth has no sibling crowd_truth_ids topic: obstacles are anonymous")
        obstacles = obstacles_from_pose_arrays(source, records, ids, offset, half_extents_m, notes, rejected)
    elif source == "obstacle_forecast":
        obstacles = obstacles_from_forecasts(forecasts, progress, notes, rejected)
        extents_source = "obstacle_forecast half_length/half_width, per track"
    else:
        obstacles = empty_obstacles("none")
    if source != "obstacle_forecast":
        screen_forecasts(forecasts, rejected)
    if obstacles.frame_id and robot.frame_id and obstacles.frame_id != robot.frame_id:
        notes.append(f"obstacles are in frame '{obstacles.frame_id}' but odometry in '{robot.frame_id}'; "
                     f"the review assumes they coincide (no transforms are available offline)")

    plan_times, plan_records = ordered(times_of(collector.plans, offset), collector.plans)
    plans = PlanSeries(plan_times, [r[2] for r in plan_records], collector.deserialize)
    goal_times, goal_records = ordered(times_of(collector.goals, offset), collector.goals)
    goals = (goal_times, np.array([r[2] for r in goal_records], dtype=float).reshape(-1, 2))

    all_times = [s for s in (robot.times_s, obstacles.frame_times_s, planner.times_s) if len(s)]
    start_s = min(float(s[0]) for s in all_times) if all_times else 0.0
    end_s = max(float(s[-1]) for s in all_times) if all_times else 0.0
    try:
        metadata = read_custom_data(path) if path.is_dir() else {}
    except BagError as error:
        metadata = {}
        notes.append(str(error))
    return ReviewData(
        path=path, topics=topics, used=used, missing=missing, notes=notes, start_s=start_s, end_s=end_s,
        robot=robot, obstacles=obstacles, forecasts=forecasts, plans=plans, planner=planner,
        watchdog=_status_series(collector.diagnostics, offset),
        commands={role: _command_series(records, offset) for role, records in collector.commands.items()},
        goals=goals, metadata=metadata, robot_radius_m=float(robot_radius_m), robot_radius_source=radius_source,
        half_extents_m=tuple(float(v) for v in half_extents_m), half_extents_source=extents_source,
        rejected=rejected, namespace=namespace)
