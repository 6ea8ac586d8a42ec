"""Whether the review could look at the run at all: the reasons it could not, in words.

"No events" is a finding only when the clearance was actually computed. It cannot be when the bag
has no usable robot path (no odometry topic, or fewer than two usable messages), no usable
obstacle (none of crowd_truth, obstacle_forecast, detections, or none of their messages usable),
or when the two never overlap in time. A `--namespace` that matches no topic is named with the
topics that do exist. The command then exits with EXIT_NOT_EXAMINED and says why, in its summary
line and in the report.
"""

import numpy as np

from riskbound.logs.review.topics import OBSTACLE_SOURCES

LISTED_TOPICS = 12


def _topic_list(topics):
    names = sorted(topics)
    if not names:
        return "none"
    more = f" and {len(names) - LISTED_TOPICS} more" if len(names) > LISTED_TOPICS else ""
    return ", ".join(names[:LISTED_TOPICS]) + more


def not_examined_reasons(data, clearance):
    """Reasons (list of str) the run could not be examined; empty when it was.

    clearance: the per-observation clearances (riskbound.logs.review.events.observation_clearances).
    """
    reasons = []
    namespaced = [role for role in data.used if role != "diagnostics"]
    if data.namespace and not namespaced:
        reasons.append(f"--namespace {data.namespace!r} matches no topic; the bag has {_topic_list(data.topics)}")
    if "odom" not in data.used:
        if not (data.namespace and not namespaced):
            reasons.append(f"no robot path: the bag has no odom topic (nav_msgs/msg/Odometry); it has "
                           f"{_topic_list(data.topics)}")
    elif len(data.robot) < 2:
        dropped = data.rejected.get("odom", 0)
        reasons.append(f"no robot path: {data.used['odom']} has {len(data.robot)} usable message(s)"
                       + (f" ({dropped} rejected for implausible values)" if dropped else ""))
    if data.obstacles.source == "none":
        if not (data.namespace and not namespaced):
            reasons.append(f"no obstacles: the bag has none of {', '.join(OBSTACLE_SOURCES)}")
    elif len(data.obstacles) == 0:
        dropped = data.rejected.get(data.obstacles.source, 0)
        reasons.append(f"no obstacles: {data.used.get(data.obstacles.source, data.obstacles.source)} holds no usable "
                       "observation" + (f" ({dropped} message(s) rejected for implausible values)" if dropped else ""))
    if not reasons and not np.any(np.isfinite(clearance)):
        robot, frames = data.robot.times_s, data.obstacles.frame_times_s
        reasons.append(f"the robot path ({robot[0]:.2f} to {robot[-1]:.2f} s) and the obstacle observations "
                       f"({frames[0]:.2f} to {frames[-1]:.2f} s) never overlap in time")
    return reasons
