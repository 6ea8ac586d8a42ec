"""Write closed-loop-like bags from known trajectories, without ROS: for the review's tests and its
timing benchmark.

A SyntheticRun holds the robot's odometry track and the walkers' true poses; `write_review_bag`
turns it into the topics a recorded run has (see riskbound.logs.review.load), deriving the rest
the way the running system would: the tracker's forecasts by constant velocity from the truth
(covariance σ₀² + (σ_v t)² per axis), the plan as the robot's straight-line continuation, planner
statuses and watchdog diagnostics with the keys the nodes publish, commands from odometry.
"""

from dataclasses import dataclass, field

import numpy as np

from riskbound.logs import bag_io
from riskbound.logs.review import topics as review_topics
from riskbound.motion.forecast import ObstacleForecast
from riskbound.forecast_schema import FIELD_NAMES, POINT_DTYPE, forecast_points

_T = bag_io.TYPESTORE.types
_UINT32, _FLOAT32 = 6, 7  # sensor_msgs/PointField datatypes
ALL_TOPICS = ("odom", "crowd_truth", "crowd_truth_ids", "detections", "obstacle_forecast", "plan",
              "planner_status", "diagnostics", "cmd_vel", "cmd_vel_plan", "goal")
_TYPES = {role: review_topics.ROLES[role][0] for role in ALL_TOPICS}


@dataclass
class SyntheticRun:
    """Robot odometry at its own rate; walkers at frame rate (NaN where a walker is absent)."""

    robot_times_s: np.ndarray       # (T,)
    robot_positions: np.ndarray     # (T, 2)
    frame_times_s: np.ndarray       # (K,)
    walker_ids: np.ndarray          # (U,)
    walker_positions: np.ndarray    # (K, U, 2)
    half_extents: tuple = (0.25, 0.2)
    goal: tuple = (10.0, 0.0)
    risk_level: float = 0.05
    failures: tuple = ()            # frame indices whose planner status is a failure
    least_violations: tuple = ()    # frame indices whose plan is a least-violation plan (level WARN)
    stops: list = field(default_factory=list)   # (time_s, cause) of watchdog stops
    forecast_steps: int = 20
    forecast_step_s: float = 0.1
    forecast_sigma0_m: float = 0.05
    forecast_sigma_v_mps: float = 0.3
    track_id_offset: int = 1000     # tracker ids differ from walker ids, as in a real run
    forecast_bias_m: tuple = (0.0, 0.0)  # added to every forecast position: a tracker that is off
    # Log-time offsets of crowd_truth_ids after crowd_truth, cycled over frames: a bag recorded from a
    # live graph receives the two separately (a crowd bag writes both at the same log time).
    ids_log_offsets_ns: tuple = (0,)

    def robot_yaws(self):
        v = np.gradient(self.robot_positions, self.robot_times_s, axis=0)
        return np.arctan2(v[:, 1], v[:, 0])

    def walker_velocities(self):
        return np.gradient(self.walker_positions, self.frame_times_s, axis=0)


def straight_crossing(robot_start, robot_velocity, walker_start, walker_velocity, duration_s,
                      rate_hz=10.0, odom_rate_hz=50.0, walker_id=7, t0_s=100.0, others=()):
    """Robot and one walker on straight lines at constant velocity (plus optional `others`:
    (id, start, velocity) walkers). Times start at t0_s (a non-zero clock, as in a real bag)."""
    frames = t0_s + np.arange(int(round(duration_s * rate_hz)) + 1) / rate_hz
    odom = t0_s + np.arange(int(round(duration_s * odom_rate_hz)) + 1) / odom_rate_hz
    walkers = [(walker_id, walker_start, walker_velocity), *others]
    ids = np.array([w[0] for w in walkers])
    positions = np.stack([np.asarray(start, float)[None, :] + (frames - t0_s)[:, None] * np.asarray(vel, float)
                          for _, start, vel in walkers], axis=1)
    robot = np.asarray(robot_start, float)[None, :] + (odom - t0_s)[:, None] * np.asarray(robot_velocity, float)
    goal = tuple(np.asarray(robot_start, float) + 1.5 * duration_s * np.asarray(robot_velocity, float))
    return SyntheticRun(odom, robot, frames, ids, positions, goal=goal)


def _stamp(time_s):
    ns = bag_io.seconds_to_ns(time_s)
    return _T["builtin_interfaces/msg/Time"](sec=ns // 1_000_000_000, nanosec=ns % 1_000_000_000)


def _header(time_s, frame_id):
    return _T["std_msgs/msg/Header"](stamp=_stamp(time_s), frame_id=frame_id)


def _vector(x=0.0, y=0.0, z=0.0):
    return _T["geometry_msgs/msg/Vector3"](x=float(x), y=float(y), z=float(z))


def _pose(x, y, yaw):
    q = bag_io.yaw_to_quaternion_xyzw([yaw])[0]
    return _T["geometry_msgs/msg/Pose"](
        position=_T["geometry_msgs/msg/Point"](x=float(x), y=float(y), z=0.0),
        orientation=_T["geometry_msgs/msg/Quaternion"](x=q[0], y=q[1], z=q[2], w=q[3]))


def _serialize(message, role):
    return bag_io.TYPESTORE.serialize_cdr(message, _TYPES[role])


def odometry_cdr(time_s, position, yaw, body_velocity, frame_id="odom", child_frame_id="base_link"):
    pose_cov = np.diag([1e-4, 1e-4, 1e6, 1e6, 1e6, 1e-3])  # planar robot: z, roll, pitch unknown
    twist_cov = np.diag([1e-3, 1e-3, 1e6, 1e6, 1e6, 1e-3])
    message = _T[review_topics.ODOMETRY](
        header=_header(time_s, frame_id), child_frame_id=child_frame_id,
        pose=_T["geometry_msgs/msg/PoseWithCovariance"](pose=_pose(position[0], position[1], yaw),
                                                        covariance=pose_cov.ravel()),
        twist=_T["geometry_msgs/msg/TwistWithCovariance"](
            twist=_T["geometry_msgs/msg/Twist"](linear=_vector(*body_velocity), angular=_vector()),
            covariance=twist_cov.ravel()))
    return _serialize(message, "odom")


def forecast_cloud_cdr(time_s, forecast, frame_id="odom"):
    """The obstacle_forecast PointCloud2 of riskbound.ros.forecast_codec, built with the bag type
    store (same field list, offsets and point layout as forecast_to_cloud)."""
    J, S = forecast.track_count, len(forecast.times)
    points = forecast_points(forecast)
    fields = [_T["sensor_msgs/msg/PointField"](name=name, offset=POINT_DTYPE.fields[name][1],
                                                datatype=_UINT32 if name in ("track_id", "step") else _FLOAT32,
                                                count=1) for name in FIELD_NAMES]
    message = _T[review_topics.POINT_CLOUD](header=_header(time_s, frame_id), height=1, width=J * S, fields=fields,
                                   is_bigendian=False, point_step=POINT_DTYPE.itemsize,
                                   row_step=POINT_DTYPE.itemsize * J * S,
                                   data=np.frombuffer(points.tobytes(), dtype=np.uint8), is_dense=True)
    return _serialize(message, "obstacle_forecast")


def path_cdr(time_s, times_s, positions, frame_id="odom"):
    poses = [_T["geometry_msgs/msg/PoseStamped"](header=_header(t, frame_id), pose=_pose(x, y, 0.0))
             for t, (x, y) in zip(times_s, positions)]
    return _serialize(_T[review_topics.PATH](header=_header(time_s, frame_id), poses=poses), "plan")


def _key_values(values):
    return [_T["diagnostic_msgs/msg/KeyValue"](key=k, value=str(v)) for k, v in values.items()]


def planner_status_cdr(level, message, values):
    status = _T[review_topics.DIAGNOSTIC_STATUS](level=level, name="riskbound planner", message=message,
                                        hardware_id="/planner", values=_key_values(values))
    return _serialize(status, "planner_status")


def watchdog_diagnostics_cdr(time_s, level, message, values):
    status = _T[review_topics.DIAGNOSTIC_STATUS](level=level, name=review_topics.WATCHDOG_STATUS_NAME, message=message,
                                        hardware_id="/watchdog", values=_key_values(values))
    array = _T[review_topics.DIAGNOSTIC_ARRAY](header=_header(time_s, ""), status=[status])
    return _serialize(array, "diagnostics")


def twist_cdr(time_s, velocity, frame_id="base_link"):
    twist = _T["geometry_msgs/msg/Twist"](linear=_vector(velocity[0], velocity[1]), angular=_vector(z=velocity[2]))
    return _serialize(_T[review_topics.TWIST_STAMPED](header=_header(time_s, frame_id), twist=twist), "cmd_vel")


def goal_cdr(time_s, position, frame_id="odom"):
    message = _T[review_topics.POSE_STAMPED](header=_header(time_s, frame_id),
                                             pose=_pose(position[0], position[1], 0.0))
    return _serialize(message, "goal")


def _forecast(run, k, present, velocities):
    times = run.forecast_step_s * np.arange(run.forecast_steps + 1)
    p = run.walker_positions[k, present]
    v = velocities[k, present]
    positions = p[:, None, :] + v[:, None, :] * times[None, :, None] + np.asarray(run.forecast_bias_m, dtype=float)
    variance = run.forecast_sigma0_m**2 + (run.forecast_sigma_v_mps * times) ** 2
    covariances = variance[None, :, None, None] * np.eye(2) * np.ones((len(p), 1, 1, 1))
    headings = np.repeat(np.arctan2(v[:, 1], v[:, 0])[:, None], len(times), axis=1)
    return ObstacleForecast(run.walker_ids[present] + run.track_id_offset, times, positions, headings,
                            covariances, np.tile(run.half_extents, (len(p), 1)))


def write_review_bag(path, run, topics=ALL_TOPICS, storage="mcap", namespace="", robot_radius_m=None,
                     progress=None, with_clock=False):
    """Write `run` as a recorded bag holding the chosen `topics` (names from ALL_TOPICS; each is
    written as /<namespace>/<name>, /diagnostics and crowd topics as the crowd bags name them).
    robot_radius_m: also put the radius into planner_status (the key a planner may add).
    with_clock: also write /clock at every frame, so that the bag is a crowd bag as well
    (riskbound.logs.bag_io.read_crowd_bag reads it, as the closed-loop summary does)."""
    unknown = set(topics) - set(ALL_TOPICS)
    if unknown:
        raise ValueError(f"topics: unknown {sorted(unknown)}; allowed: {', '.join(ALL_TOPICS)}")
    prefix = "/" + namespace.strip("/") if namespace else ""

    def name(role):
        if role == "diagnostics" or role.startswith("crowd_truth") or role == "detections":
            return "/" + role
        return f"{prefix}/{role}"

    declared = {name(role): (_TYPES[role], None) for role in topics}
    if with_clock:
        declared[bag_io.TOPIC_CLOCK] = bag_io.CROWD_TOPICS[bag_io.TOPIC_CLOCK]
    yaws = run.robot_yaws()
    robot_v = np.gradient(run.robot_positions, run.robot_times_s, axis=0)
    walker_v = run.walker_velocities()
    yaw_at_frames = np.interp(run.frame_times_s, run.robot_times_s, np.unwrap(yaws))
    failures = set(run.failures)
    violating = set(run.least_violations) - failures
    stop_times = sorted(run.stops)

    def body(k_velocity, yaw):
        c, s = np.cos(yaw), np.sin(yaw)
        return np.array([c * k_velocity[0] + s * k_velocity[1], -s * k_velocity[0] + c * k_velocity[1], 0.0])

    with bag_io.BagWriter(path, declared, storage=storage) as writer:
        def put(role, time_s, data):
            if role in topics:
                writer.write(name(role), bag_io.seconds_to_ns(time_s), data)

        if "goal" in topics:
            put("goal", run.robot_times_s[0], goal_cdr(run.robot_times_s[0], run.goal))
        if "odom" in topics:
            for t, p, yaw, v in zip(run.robot_times_s, run.robot_positions, yaws, robot_v):
                put("odom", t, odometry_cdr(t, p, yaw, body(v, yaw)[0:2]))
        next_diagnostics = run.frame_times_s[0]
        stops_total = 0
        for k, t in enumerate(run.frame_times_s):
            if with_clock:
                writer.write(bag_io.TOPIC_CLOCK, bag_io.seconds_to_ns(t), bag_io.clock_cdr(bag_io.seconds_to_ns(t)))
            present = np.all(np.isfinite(run.walker_positions[k]), axis=1)
            positions = run.walker_positions[k, present]
            headings = np.arctan2(walker_v[k, present, 1], walker_v[k, present, 0])
            if "crowd_truth" in topics:
                put("crowd_truth", t, bag_io.pose_array_cdr(bag_io.seconds_to_ns(t), "odom", positions, headings))
                offset_ns = run.ids_log_offsets_ns[k % len(run.ids_log_offsets_ns)]
                put("crowd_truth_ids", t + 1e-9 * offset_ns, bag_io.ids_cdr(run.walker_ids[present]))
            put("detections", t, bag_io.pose_array_cdr(bag_io.seconds_to_ns(t), "odom", positions, headings))
            if "obstacle_forecast" in topics:
                put("obstacle_forecast", t, forecast_cloud_cdr(t, _forecast(run, k, present, walker_v)))
            robot_xy = np.array([np.interp(t, run.robot_times_s, run.robot_positions[:, i]) for i in range(2)])
            velocity = np.array([np.interp(t, run.robot_times_s, robot_v[:, i]) for i in range(2)])
            if "plan" in topics:
                offsets = run.forecast_step_s * np.arange(run.forecast_steps + 1)
                put("plan", t, path_cdr(t, t + offsets, robot_xy + offsets[:, None] * velocity))
            failed = k in failures
            status = "infeasible" if failed else "least_violation" if k in violating else "solved"
            values = {"solve_ms": f"{20.0 + 15.0 * np.sin(0.1 * k) ** 2 + (60.0 if failed else 0.0):.6g}",
                      "iterations": str(8 + k % 5), "solver_status": "Infeasible_Problem_Detected" if failed
                      else "Solve_Succeeded", "status": status, "cost": "1.5",
                      "obstacles_considered": str(int(present.sum())), "obstacles_dropped": "0",
                      "risk_level": f"{run.risk_level:.6g}", "risk_allocation": "joint",
                      "risk_per_constraint": f"{run.risk_level / 160:.6g}",
                      "min_margin_m": "nan" if failed else f"{0.3 + 0.1 * np.cos(0.05 * k):.6g}",
                      "robot_model": "double_integrator", "horizon_steps": "20", "step_s": "0.1"}
            if robot_radius_m is not None:
                values["robot_radius_m"] = f"{robot_radius_m:.6g}"
            if failed:
                values["reason"] = "no plan: infeasible (solver: Infeasible_Problem_Detected)"
            if status == "least_violation":
                values.update(max_violation="0.3", min_margin_m="-0.12",
                              reason="no plan meets every obstacle constraint: commanding the least-violation plan")
            put("planner_status", t, planner_status_cdr(2 if failed else 1 if status == "least_violation" else 0,
                                                        status, values))
            stopped = any(s <= t < s + 1.0 for s, _ in stop_times)
            command = body(velocity, yaw_at_frames[k])
            put("cmd_vel_plan", t, twist_cdr(t, command))
            put("cmd_vel", t, twist_cdr(t, np.zeros(3) if stopped else command))
            if t >= next_diagnostics:
                past = [(s, cause) for s, cause in stop_times if s <= t]
                stops_total = len(past)
                state = "stopped" if stopped else "healthy"
                put("diagnostics", t, watchdog_diagnostics_cdr(t, 2 if stopped else 0, state, {
                    "state": state, "faults": "", "last_stop_cause": past[-1][1] if past else "",
                    "stops_total": str(stops_total), "solve_ms_median": "25"}))
                next_diagnostics += 1.0
            if progress is not None and k % 100 == 0:
                progress("writing", k / len(run.frame_times_s))
    return path
