"""Which topics the review reads, by role, and what it loses without each.

Topics are found by their last name component (`/odom`, `/robot1/odom` ...; `--namespace` picks
one robot when a bag holds several). The table of roles is riskbound.logs.review.load's docstring.
"""

ODOMETRY = "nav_msgs/msg/Odometry"
POSE_ARRAY = "geometry_msgs/msg/PoseArray"
UINT32_ARRAY = "std_msgs/msg/UInt32MultiArray"
POINT_CLOUD = "sensor_msgs/msg/PointCloud2"
PATH = "nav_msgs/msg/Path"
DIAGNOSTIC_STATUS = "diagnostic_msgs/msg/DiagnosticStatus"
DIAGNOSTIC_ARRAY = "diagnostic_msgs/msg/DiagnosticArray"
TWIST_STAMPED = "geometry_msgs/msg/TwistStamped"
POSE_STAMPED = "geometry_msgs/msg/PoseStamped"

# name → (type, what the review loses without it)
ROLES = {
    "odom": (ODOMETRY, "no robot track: clearances and events cannot be computed"),
    "crowd_truth": (POSE_ARRAY, "no ground truth: obstacles come from the tracker's forecasts or detections"),
    "crowd_truth_ids": (UINT32_ARRAY, "ground truth without ids: obstacles are anonymous"),
    "obstacle_forecast": (POINT_CLOUD, "no forecasts: no forecast-versus-actual checks, replanning uses ground truth"),
    "detections": (POSE_ARRAY, "no raw detections"),
    "plan": (PATH, "no recorded plans in the event figures"),
    "planner_status": (DIAGNOSTIC_STATUS, "no solve times, failures, risk levels or margins"),
    "diagnostics": (DIAGNOSTIC_ARRAY, "no watchdog states or stop causes"),
    "cmd_vel": (TWIST_STAMPED, "no gated commands"),
    "cmd_vel_plan": (TWIST_STAMPED, "no planner commands"),
    "goal": (POSE_STAMPED, "no goal: replanning aims at the robot's final position"),
}
OBSTACLE_SOURCES = ("crowd_truth", "obstacle_forecast", "detections")
WATCHDOG_STATUS_NAME = "riskbound watchdog"


def match_topics(topics, namespace):
    """role → topic name, plus notes on ambiguities and wrong types."""
    used, notes = {}, []
    prefix = "/" + namespace.strip("/") if namespace else ""
    for role, (msgtype, _) in ROLES.items():
        candidates = sorted(t for t in topics if t.rstrip("/").rsplit("/", 1)[-1] == role
                            and (not prefix or t.startswith(prefix + "/") or role == "diagnostics"))
        typed = [t for t in candidates if topics[t][0] == msgtype]
        for t in candidates:
            if topics[t][0] != msgtype:
                notes.append(f"{t} has type {topics[t][0]}, expected {msgtype}: ignored")
        if not typed:
            continue
        typed.sort(key=lambda t: (t.count("/"), t))
        used[role] = typed[0]
        if len(typed) > 1:
            notes.append(f"several topics named {role} ({', '.join(typed)}); used {typed[0]} "
                         f"(pick another with --namespace)")
    return used, notes
