"""The checks every planner input passes before a cycle plans from it.

Each check returns what the cycle needs or raises InputProblem: its `kind` becomes the status
word, its message the reason in planner_status. Bad or stale input never produces a command.
"""

import numpy as np

from riskbound.motion.forecast import ObstacleForecast
from riskbound.ros.conversions import quaternion_to_yaw, stamp_to_seconds


class InputProblem(Exception):
    """An input the cycle must not plan from; `kind` is the status word, the message says why."""

    def __init__(self, kind, message):
        super().__init__(message)
        self.kind = kind


def _finite(*values):
    return bool(np.all(np.isfinite(np.asarray(values, dtype=float))))


def is_out_of_order(stamp_s, newest_s, now_s, timeout_s):
    """True for a message older than the newest one kept, while that one is still fresh.

    Once the newest is stale, older stamps are accepted again so that a source restarted with
    an earlier clock (simulation reset, bag loop) is not locked out for good.
    """
    return newest_s is not None and stamp_s < newest_s and now_s - newest_s <= timeout_s


def robot_state(msg, planning_frame, now_s, timeout_s, model):
    """(stamp_s, x0, P0, yaw, body_frame) from the newest odometry `msg` (None: none yet)."""
    if msg is None:
        raise InputProblem("no_odometry", "no odometry received yet on 'odom'")
    if msg.header.frame_id != planning_frame:
        raise InputProblem("wrong_frame", f"odometry frame_id '{msg.header.frame_id}' is not the "
                                          f"planning_frame '{planning_frame}'")
    if not msg.child_frame_id:
        raise InputProblem("bad_odometry", "odometry child_frame_id is empty (it is the command's body frame)")
    stamp_s = stamp_to_seconds(msg.header.stamp)
    age_s = now_s - stamp_s
    if age_s > timeout_s:
        raise InputProblem("stale_odometry", f"odometry is {age_s:.2f} s old (odom_timeout_s={timeout_s})")
    if age_s < -timeout_s:
        raise InputProblem("stale_odometry", f"odometry stamp is {-age_s:.2f} s in the future "
                                             f"(odom_timeout_s={timeout_s})")
    pose, twist = msg.pose.pose, msg.twist.twist
    position = (pose.position.x, pose.position.y)
    body_velocity = (twist.linear.x, twist.linear.y)
    if not _finite(*position, *body_velocity, twist.angular.z):
        raise InputProblem("bad_odometry", "odometry position or velocity is NaN or Inf")
    yaw = quaternion_to_yaw(pose.orientation)
    if not np.isfinite(yaw):
        raise InputProblem("bad_odometry", "odometry orientation is NaN, Inf or a zero quaternion")
    pose_cov = np.asarray(msg.pose.covariance, dtype=float).reshape(6, 6)
    twist_cov = np.asarray(msg.twist.covariance, dtype=float).reshape(6, 6)
    if not (np.all(np.isfinite(pose_cov)) and np.all(np.isfinite(twist_cov))):
        raise InputProblem("bad_odometry", "odometry covariance is NaN or Inf")
    x0, P0 = model.state_from_odometry(position, yaw, body_velocity, pose_cov, twist_cov)
    return stamp_s, x0, P0, yaw, msg.child_frame_id


def goal_position(msg, planning_frame):
    """The goal's (x, y) from the newest goal `msg` (None: none yet)."""
    if msg is None:
        raise InputProblem("no_goal", "no goal received yet on 'goal'")
    if msg.header.frame_id != planning_frame:
        raise InputProblem("wrong_frame", f"goal frame_id '{msg.header.frame_id}' is not the "
                                          f"planning_frame '{planning_frame}'")
    goal = np.array([msg.pose.position.x, msg.pose.position.y], dtype=float)
    if not np.all(np.isfinite(goal)):
        raise InputProblem("bad_goal", "goal position is NaN or Inf")
    return goal


def forecast_on_grid(newest, error, planning_frame, now_s, odom_stamp_s, settings, timeout_s, required):
    """The forecast resampled at the planner's grid, and a note when it was ignored.

    `newest` is (stamp_s, frame_id, ObstacleForecast) of the newest decodable cloud or None;
    `error` why the newest cloud could not be decoded (None: it could). Planner step k is at
    odom_stamp + k·step_s, i.e. (odom_stamp − forecast_stamp) + k·step_s after the forecast stamp.
    """
    grid_s = settings.step_s * np.arange(1, settings.horizon_steps + 1)
    if error is not None:
        raise InputProblem("bad_forecast", error)
    if newest is None:
        if required:
            raise InputProblem("no_forecast", "no obstacle_forecast received yet (require_forecast is true)")
        return ObstacleForecast.empty(grid_s), ""
    stamp_s, frame_id, forecast = newest
    if frame_id != planning_frame:
        raise InputProblem("wrong_frame", f"obstacle_forecast frame_id '{frame_id}' is not the "
                                          f"planning_frame '{planning_frame}'")
    age_s = now_s - stamp_s
    if abs(age_s) > timeout_s:
        what = f"{age_s:.2f} s old" if age_s > 0 else f"stamped {-age_s:.2f} s in the future"
        note = f"obstacle_forecast is {what} (forecast_timeout_s={timeout_s})"
        if required:
            raise InputProblem("stale_forecast", note)
        return ObstacleForecast.empty(grid_s), note + ": planning without obstacles"
    problems = forecast.problems()
    if problems:
        raise InputProblem("bad_forecast", "obstacle_forecast rejected: " + "; ".join(problems))
    on_grid = forecast.resampled((odom_stamp_s - stamp_s) + grid_s)
    return ObstacleForecast(on_grid.track_ids, grid_s, on_grid.positions, on_grid.headings,
                            on_grid.covariances, on_grid.half_extents), ""
