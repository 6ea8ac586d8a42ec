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

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from rosbags.highlevel import AnyReader

from riskbound.logs.bag_io import TYPESTORE, BagError, quaternion_xyzw_to_yaw, read_custom_data
from riskbound.logs.review import cdr
from riskbound.forecast_schema import FIELD_NAMES, POINT_DTYPE, cloud_to_forecast

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
DEFAULT_HALF_EXTENTS_M = (0.25, 0.2)
DEFAULT_ROBOT_RADIUS_M = 0.3
# Frames are 0.1 s apart at 10 Hz; a frame and its ids arrive within milliseconds of each other.
ID_PAIRING_WINDOW_NS = 50_000_000
_PROGRESS_EVERY = 2000


@dataclass
class RobotTrack:
    """Odometry in time order: positions and velocities in the odometry frame."""

    times_s: np.ndarray          # (T,)
    positions: np.ndarray        # (T, 2) [m]
    yaws: np.ndarray             # (T,) [rad]
    body_velocities: np.ndarray  # (T, 2) [m/s] body frame, as in the twist
    yaw_rates: np.ndarray        # (T,) [rad/s]
    pose_covariances: np.ndarray   # (T, 6, 6)
    twist_covariances: np.ndarray  # (T, 6, 6)
    frame_id: str = ""
    child_frame_id: str = ""

    def __len__(self):
        return len(self.times_s)

    def world_velocities(self):
        """Velocities from finite differences of the positions (m/s, odometry frame)."""
        if len(self) < 2:
            return np.zeros_like(self.positions)
        return np.gradient(self.positions, self.times_s, axis=0)

    def position_at(self, times_s):
        """Positions (n, 2) linearly interpolated at `times_s`; NaN outside the track."""
        times_s = np.atleast_1d(np.asarray(times_s, dtype=float))
        out = np.full((len(times_s), 2), np.nan)
        if len(self) == 0:
            return out
        inside = (times_s >= self.times_s[0]) & (times_s <= self.times_s[-1])
        for axis in range(2):
            out[inside, axis] = np.interp(times_s[inside], self.times_s, self.positions[:, axis])
        return out

    def index_at(self, time_s):
        """Index of the newest sample at or before time_s (0 when time_s is before the track)."""
        return max(int(np.searchsorted(self.times_s, time_s, side="right")) - 1, 0)


@dataclass
class Obstacles:
    """Obstacle observations, one row per (frame, obstacle), sorted by (id, time).

    ids are -1 for anonymous observations (raw detections, or ground truth without ids).
    """

    source: str
    times_s: np.ndarray       # (E,)
    frame_index: np.ndarray   # (E,) index into frame_times_s
    ids: np.ndarray           # (E,) int64
    positions: np.ndarray     # (E, 2)
    headings: np.ndarray      # (E,)
    half_extents: np.ndarray  # (E, 2)
    frame_times_s: np.ndarray  # (K,)
    anonymous: bool = False
    frame_id: str = ""

    def __len__(self):
        return len(self.times_s)

    def velocities(self):
        """Finite-difference velocities (E, 2) along each id's track: central where both
        neighbours exist, one-sided at the ends, NaN for a single observation (and anonymous rows)."""
        v = np.full_like(self.positions, np.nan)
        if self.anonymous or len(self) < 2:
            return v
        same_next = np.zeros(len(self), dtype=bool)
        same_next[:-1] = self.ids[1:] == self.ids[:-1]
        same_prev = np.zeros(len(self), dtype=bool)
        same_prev[1:] = same_next[:-1]
        nxt = np.minimum(np.arange(len(self)) + 1, len(self) - 1)
        prv = np.maximum(np.arange(len(self)) - 1, 0)
        hi = np.where(same_next, nxt, np.arange(len(self)))
        lo = np.where(same_prev, prv, np.arange(len(self)))
        dt = self.times_s[hi] - self.times_s[lo]
        valid = dt > 0.0
        v[valid] = (self.positions[hi[valid]] - self.positions[lo[valid]]) / dt[valid, None]
        return v

    def track(self, obstacle_id):
        """Rows of one id (a slice, since rows are sorted by id)."""
        lo = int(np.searchsorted(self.ids, obstacle_id, side="left"))
        hi = int(np.searchsorted(self.ids, obstacle_id, side="right"))
        return slice(lo, hi)


@dataclass
class ForecastSeries:
    """The tracker's forecasts, decoded on demand (a ten-minute bag holds thousands)."""

    stamps_s: np.ndarray
    frame_ids: list
    raws: list
    deserialize: object = None
    _cache: dict = field(default_factory=dict)
    errors: dict = field(default_factory=dict)

    def __len__(self):
        return len(self.stamps_s)

    def get(self, index):
        """ObstacleForecast of message `index`, or None when it does not decode (reason in errors)."""
        if index not in self._cache:
            try:
                self._cache[index] = cloud_to_forecast(self.deserialize(self.raws[index], POINT_CLOUD))
            except Exception as error:  # a damaged cloud must not end the review
                self._cache[index] = None
                self.errors[index] = f"{type(error).__name__}: {error}"
        return self._cache[index]

    def index_before(self, time_s):
        """Index of the newest forecast stamped at or before time_s, or None."""
        i = int(np.searchsorted(self.stamps_s, time_s, side="right")) - 1
        return i if i >= 0 else None


@dataclass
class PlanSeries:
    """Recorded plans, decoded on demand (only the event figures and re-solves need them)."""

    stamps_s: np.ndarray   # (P,) header stamps (the odometry stamp the plan started from)
    raws: list
    deserialize: object = None
    _cache: dict = field(default_factory=dict)

    def __len__(self):
        return len(self.stamps_s)

    def get(self, index):
        """(pose stamps (n,), positions (n, 2)) of plan `index`; empty arrays if it does not decode."""
        if index not in self._cache:
            raw = self.raws[index]
            try:
                _, _, stamps, poses = cdr.path(raw)
                self._cache[index] = (stamps, poses[:, 0:2].copy())
            except cdr.CdrLayoutError:
                try:
                    msg = self.deserialize(raw, PATH)
                    self._cache[index] = (
                        np.array([p.header.stamp.sec + 1e-9 * p.header.stamp.nanosec for p in msg.poses]),
                        np.array([[p.pose.position.x, p.pose.position.y] for p in msg.poses]).reshape(-1, 2))
                except Exception:  # a damaged plan must not end the review
                    self._cache[index] = (np.zeros(0), np.zeros((0, 2)))
        return self._cache[index]

    def index_before(self, time_s):
        i = int(np.searchsorted(self.stamps_s, time_s, side="right")) - 1
        return i if i >= 0 else None


@dataclass
class StatusSeries:
    """DiagnosticStatus messages of one source in time order; values kept as the strings sent."""

    times_s: np.ndarray
    levels: np.ndarray
    messages: list
    values: list
    _columns: dict = field(default_factory=dict)

    def __len__(self):
        return len(self.times_s)

    def numeric(self, key):
        """Float array of one key (NaN where absent or not a number); computed once per key."""
        if ("numeric", key) not in self._columns:
            out = np.full(len(self), np.nan)
            for i, values in enumerate(self.values):
                try:
                    out[i] = float(values[key])
                except (KeyError, ValueError):
                    pass
            out.flags.writeable = False
            self._columns["numeric", key] = out
        return self._columns["numeric", key]

    def text(self, key):
        """List of one key's strings ("" where absent); computed once per key."""
        if ("text", key) not in self._columns:
            self._columns["text", key] = [values.get(key, "") for values in self.values]
        return self._columns["text", key]

    def window(self, start_s, end_s):
        lo = int(np.searchsorted(self.times_s, start_s, side="left"))
        hi = int(np.searchsorted(self.times_s, end_s, side="right"))
        return slice(lo, hi)


@dataclass
class CommandSeries:
    times_s: np.ndarray
    velocities: np.ndarray  # (n, 3): linear x, linear y, angular z (body frame)

    def __len__(self):
        return len(self.times_s)


@dataclass
class ReviewData:
    path: Path
    topics: dict                 # every topic in the bag: name → (type, count)
    used: dict                   # role → topic name
    missing: list                # (role, expected type, consequence)
    notes: list                  # what the reader noticed (ambiguities, wrong types, fallbacks)
    start_s: float
    end_s: float
    robot: RobotTrack
    obstacles: Obstacles
    forecasts: ForecastSeries
    plans: PlanSeries
    planner: StatusSeries
    watchdog: StatusSeries
    commands: dict               # "cmd_vel"/"cmd_vel_plan" → CommandSeries
    goals: tuple                 # (times (g,), positions (g, 2))
    metadata: dict
    robot_radius_m: float
    robot_radius_source: str
    half_extents_m: tuple        # (half_length, half_width) for obstacles that do not carry their own
    half_extents_source: str


def _match_topics(topics, namespace):
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


def _stamp_or_none(stamp):
    return stamp if stamp != 0.0 else None


def _empty_obstacles(source):
    return Obstacles(source, np.zeros(0), np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64),
                     np.zeros((0, 2)), np.zeros(0), np.zeros((0, 2)), np.zeros(0))


class _Collector:
    """Accumulates decoded messages per role during the single pass over the bag."""

    def __init__(self, path, deserialize):
        self.path = path
        self.deserialize = deserialize
        self.offsets = []
        self.odom = []
        self.truth = []
        self.truth_ids = []
        self.detections = []
        self.forecasts = []
        self.plans = []
        self.planner = []
        self.diagnostics = []
        self.commands = {"cmd_vel": [], "cmd_vel_plan": []}
        self.goals = []

    def _fallback(self, topic, msgtype, time_ns, raw):
        try:
            return self.deserialize(raw, msgtype)
        except Exception as error:  # garbage bytes can fail anywhere in the decoder
            raise BagError(f"{self.path}: message on {topic} at {time_ns} ns does not decode as {msgtype}: "
                           f"{type(error).__name__}: {error}") from None

    def _offset(self, stamp, time_ns):
        if stamp:
            self.offsets.append(stamp - 1e-9 * time_ns)

    def add(self, role, topic, msgtype, time_ns, raw):
        try:
            self._fast(role, time_ns, raw)
        except cdr.CdrLayoutError:
            self._slow(role, self._fallback(topic, msgtype, time_ns, raw), time_ns, raw)

    def _fast(self, role, time_ns, raw):
        if role == "odom":
            stamp, frame, child, values = cdr.odometry(raw)
            self._offset(stamp, time_ns)
            self.odom.append((stamp or None, time_ns, frame, child, values))
        elif role in ("crowd_truth", "detections"):
            stamp, frame, poses = cdr.pose_array(raw)
            self._offset(stamp, time_ns)
            (self.truth if role == "crowd_truth" else self.detections).append((stamp or None, time_ns, frame, poses))
        elif role == "crowd_truth_ids":
            self.truth_ids.append((time_ns, cdr.uint32_multi_array(raw)))
        elif role == "obstacle_forecast":
            stamp, frame = cdr.header(raw)
            self.forecasts.append((stamp or None, time_ns, frame, raw))
        elif role == "plan":
            stamp, _ = cdr.header(raw)
            self.plans.append((stamp or None, time_ns, raw))
        elif role == "planner_status":
            level, _, message, _, values = cdr.diagnostic_status(raw)
            self.planner.append((None, time_ns, level, message, values))
        elif role == "diagnostics":
            stamp, statuses = cdr.diagnostic_array(raw)
            self._diagnostics(stamp, time_ns, statuses)
        elif role in self.commands:
            stamp, _, values = cdr.twist_stamped(raw)
            self.commands[role].append((stamp or None, time_ns, values[[0, 1, 5]].copy()))
        elif role == "goal":
            stamp, _, values = cdr.pose_stamped(raw)
            self.goals.append((stamp or None, time_ns, values[0:2].copy()))

    def _diagnostics(self, stamp, time_ns, statuses):
        for level, name, message, _, values in statuses:
            if name == WATCHDOG_STATUS_NAME or ("state" in values and "stops_total" in values):
                self.diagnostics.append((stamp or None, time_ns, level, message, values))

    def _slow(self, role, msg, time_ns, raw):
        """Same records as _fast, from a message decoded by the type store."""
        def stamp_of(m):
            return _stamp_or_none(m.header.stamp.sec + 1e-9 * m.header.stamp.nanosec)

        def pose_row(p):
            return [p.position.x, p.position.y, p.position.z,
                    p.orientation.x, p.orientation.y, p.orientation.z, p.orientation.w]

        if role == "odom":
            twist = msg.twist.twist
            values = np.concatenate([pose_row(msg.pose.pose), np.asarray(msg.pose.covariance, dtype=float),
                                     [twist.linear.x, twist.linear.y, twist.linear.z,
                                      twist.angular.x, twist.angular.y, twist.angular.z],
                                     np.asarray(msg.twist.covariance, dtype=float)])
            self.odom.append((stamp_of(msg), time_ns, msg.header.frame_id, msg.child_frame_id, values))
        elif role in ("crowd_truth", "detections"):
            poses = np.array([pose_row(p) for p in msg.poses], dtype=float).reshape(-1, 7)
            (self.truth if role == "crowd_truth" else self.detections).append(
                (stamp_of(msg), time_ns, msg.header.frame_id, poses))
        elif role == "crowd_truth_ids":
            self.truth_ids.append((time_ns, np.asarray(msg.data, dtype=np.uint32).copy()))
        elif role == "obstacle_forecast":
            self.forecasts.append((stamp_of(msg), time_ns, msg.header.frame_id, raw))
        elif role == "plan":
            self.plans.append((stamp_of(msg), time_ns, raw))
        elif role == "planner_status":
            self.planner.append((None, time_ns, int(msg.level), msg.message, {kv.key: kv.value for kv in msg.values}))
        elif role == "diagnostics":
            statuses = [(int(s.level), s.name, s.message, s.hardware_id, {kv.key: kv.value for kv in s.values})
                        for s in msg.status]
            self._diagnostics(stamp_of(msg), time_ns, statuses)
        elif role in self.commands:
            t = msg.twist
            self.commands[role].append((stamp_of(msg), time_ns, np.array([t.linear.x, t.linear.y, t.angular.z])))
        elif role == "goal":
            self.goals.append((stamp_of(msg), time_ns, np.array([msg.pose.position.x, msg.pose.position.y])))


def _times(records, offset):
    """Stamp of each record, or its log time + offset when it has none."""
    return np.array([r[0] if r[0] is not None else 1e-9 * r[1] + offset for r in records], dtype=float)


def _ordered(times, records):
    order = np.argsort(times, kind="stable")
    return times[order], [records[i] for i in order]


def _robot_track(records, offset, notes):
    if not records:
        empty = np.zeros((0, 6, 6))
        return RobotTrack(np.zeros(0), np.zeros((0, 2)), np.zeros(0), np.zeros((0, 2)), np.zeros(0), empty, empty)
    times, records = _ordered(_times(records, offset), records)
    values = np.stack([r[4] for r in records])
    finite = np.all(np.isfinite(values[:, [0, 1, 3, 4, 5, 6, 43, 44, 48]]), axis=1)
    if not np.all(finite):
        notes.append(f"odom: {int((~finite).sum())} messages with NaN/Inf pose or twist skipped")
    keep = finite.copy()
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


def _pair_ids(records, id_records):
    """The ids message of each PoseArray frame, or None.

    A crowd bag writes a frame's ids with the frame's log time; a bag recorded from a live graph
    receives the two messages separately, a few milliseconds apart and sometimes in either order.
    So each frame takes the ids message nearest in log time (within ID_PAIRING_WINDOW_NS) that has
    as many ids as the frame has poses, each ids message used once.
    """
    id_records = sorted(id_records, key=lambda r: r[0])
    id_times = np.array([r[0] for r in id_records], dtype=np.int64)
    used = np.zeros(len(id_records), dtype=bool)
    paired = []
    for record in records:
        time_ns, count = record[1], len(record[3])
        at = int(np.searchsorted(id_times, time_ns))
        best = None
        for j in range(max(at - 2, 0), min(at + 2, len(id_records))):
            gap = abs(int(id_times[j]) - time_ns)
            if not used[j] and len(id_records[j][1]) == count and gap <= ID_PAIRING_WINDOW_NS and (
                    best is None or gap < abs(int(id_times[best]) - time_ns)):
                best = j
        if best is not None:
            used[best] = True
        paired.append(None if best is None else id_records[best][1])
    return paired


def _obstacles_from_pose_arrays(source, records, id_records, offset, half_extents, notes):
    """Rows from PoseArray frames; ids paired per frame when available (frames without are dropped)."""
    times, records = _ordered(_times(records, offset), records)
    anonymous = id_records is None
    if not anonymous:
        paired = _pair_ids(records, id_records)
        unpaired = sum(ids is None for ids in paired)
        if unpaired > len(records) // 2:
            notes.append(f"{source}: no matching ids for {unpaired} of {len(records)} frames; "
                         f"obstacles treated as anonymous")
            anonymous = True
        elif unpaired:
            notes.append(f"{source}: no matching ids for {unpaired} of {len(records)} frames; those frames skipped")
            keep = [i for i, ids in enumerate(paired) if ids is not None]
            times, records, paired = times[keep], [records[i] for i in keep], [paired[i] for i in keep]
    counts = np.array([len(r[3]) for r in records], dtype=np.int64)
    poses = np.concatenate([r[3] for r in records]) if records else np.zeros((0, 7))
    frame_index = np.repeat(np.arange(len(records)), counts)
    ids = (np.full(len(poses), -1, dtype=np.int64) if anonymous
           else np.concatenate(paired).astype(np.int64) if records else np.zeros(0, dtype=np.int64))
    finite = np.all(np.isfinite(poses[:, 0:2]), axis=1)
    if not np.all(finite):
        notes.append(f"{source}: {int((~finite).sum())} poses with NaN/Inf positions skipped")
    headings = quaternion_xyzw_to_yaw(poses[:, 3:7])
    # A pose without a usable orientation still has a footprint: assume the box along x.
    headings = np.where(np.isfinite(headings), headings, 0.0)
    order = np.lexsort((frame_index, ids))
    order = order[finite[order]]
    if not anonymous:
        duplicate = (np.diff(ids[order]) == 0) & (np.diff(frame_index[order]) == 0)
        if np.any(duplicate):
            notes.append(f"{source}: {int(duplicate.sum())} repeated ids within a frame dropped")
            order = order[np.concatenate([[True], ~duplicate])]
    frames = {r[2] for r in records}
    return Obstacles(source=source, times_s=times[frame_index[order]], frame_index=frame_index[order],
                     ids=ids[order], positions=poses[order, 0:2].copy(), headings=headings[order],
                     half_extents=np.tile(np.asarray(half_extents, dtype=float), (len(order), 1)),
                     frame_times_s=times, anonymous=anonymous, frame_id=sorted(frames)[0] if frames else "")


# The codec's layout (riskbound.ros.forecast_codec): uint32 = 6, float32 = 7 in sensor_msgs/PointField.
_CODEC_FIELDS = [(name, POINT_DTYPE.fields[name][1], 6 if name in ("track_id", "step") else 7, 1)
                 for name in FIELD_NAMES]


def _first_step(raw):
    """Points of a forecast's first step straight from the bytes, when the cloud has exactly the
    codec's layout (else None: the caller decodes it with the codec)."""
    try:
        _, _, fields, big_endian, point_step, count, data = cdr.point_cloud(raw)
    except cdr.CdrLayoutError:
        return None
    if fields != _CODEC_FIELDS or big_endian or point_step != POINT_DTYPE.itemsize or len(data) != count * point_step:
        return None
    points = np.frombuffer(data, dtype=POINT_DTYPE, count=count)
    if count == 0:
        return points
    first = points[points["step"] == points["step"].min()]
    if len(np.unique(first["track_id"])) != len(first):
        return None
    return first


def _obstacles_from_forecasts(forecasts, progress, notes):
    """Rows from each forecast's first step (step 0 is the tracker's current estimate).

    Decoded straight from the bytes when the cloud has the codec's layout (thousands of clouds
    per minute), through the codec otherwise; the tests check that both give the same rows.
    """
    rows = []
    for i in range(len(forecasts)):
        if progress is not None and i % 500 == 0:
            progress("forecasts", i / max(len(forecasts), 1))
        first = _first_step(forecasts.raws[i])
        if first is not None:
            if len(first):
                xy = np.stack([first["x"], first["y"]], axis=-1).astype(float)
                extents = np.stack([first["half_length"], first["half_width"]], axis=-1).astype(float)
                rows.append((i, forecasts.stamps_s[i] + float(first["t"][0]), first["track_id"].astype(np.int64), xy,
                             first["yaw"].astype(float), extents))
            continue
        forecast = forecasts.get(i)
        if forecast is None or forecast.track_count == 0:
            continue
        rows.append((i, forecasts.stamps_s[i] + forecast.times[0], forecast.track_ids, forecast.positions[:, 0],
                     forecast.headings[:, 0], forecast.half_extents))
    if forecasts.errors:
        first = min(forecasts.errors)
        notes.append(f"obstacle_forecast: {len(forecasts.errors)} messages did not decode "
                     f"(first at {forecasts.stamps_s[first]:.3f} s: {forecasts.errors[first]})")
    if not rows:
        return _empty_obstacles("obstacle_forecast")
    counts = np.array([len(r[2]) for r in rows])
    frame_index = np.repeat(np.arange(len(rows)), counts)
    ids = np.concatenate([r[2] for r in rows])
    order = np.lexsort((frame_index, ids))
    return Obstacles(source="obstacle_forecast", times_s=np.repeat([r[1] for r in rows], counts)[order],
                     frame_index=frame_index[order], ids=ids[order],
                     positions=np.concatenate([r[3] for r in rows])[order],
                     headings=np.concatenate([r[4] for r in rows])[order],
                     half_extents=np.concatenate([r[5] for r in rows])[order],
                     frame_times_s=np.array([r[1] for r in rows]), frame_id=forecasts.frame_ids[0])


def _status_series(records, offset):
    if not records:
        return StatusSeries(np.zeros(0), np.zeros(0, dtype=int), [], [])
    times, records = _ordered(_times(records, offset), records)
    return StatusSeries(times, np.array([r[2] for r in records], dtype=int), [r[3] for r in records],
                        [r[4] for r in records])


def _command_series(records, offset):
    if not records:
        return CommandSeries(np.zeros(0), np.zeros((0, 3)))
    times, records = _ordered(_times(records, offset), records)
    return CommandSeries(times, np.stack([r[2] for r in records]))


def _read_all(path, used, progress):
    """One pass over the bag; returns the collector and the bag's topic table."""
    try:
        with AnyReader([path], default_typestore=TYPESTORE) as reader:
            topics = {name: (info.msgtype, info.msgcount) for name, info in reader.topics.items()}
            roles = used(topics)
            wanted = {topic: role for role, topic in roles.items()}
            typestore = reader.typestore
            collector = _Collector(path, typestore.deserialize_cdr)
            connections = [c for c in reader.connections if c.topic in wanted]
            total = max(sum(topics[t][1] for t in wanted), 1)
            read = dict.fromkeys(wanted, 0)
            if connections:
                for count, (connection, time_ns, raw) in enumerate(reader.messages(connections=connections)):
                    collector.add(wanted[connection.topic], connection.topic, connection.msgtype, time_ns, raw)
                    read[connection.topic] += 1
                    if progress is not None and count % _PROGRESS_EVERY == 0:
                        progress("reading", count / total)
            # Storage without checksums (rosbags writes none) can lose records to damage silently:
            # the index's counts are the only witness.
            short = [f"{topic} {read[topic]} of {topics[topic][1]}" for topic in wanted
                     if read[topic] < topics[topic][1]]
            if short:
                raise BagError(f"{path}: damaged: fewer messages than its index lists ({'; '.join(short)})")
    except BagError:
        raise
    # A damaged file can fail anywhere in the parsers (struct, sqlite3, decompression, arithmetic
    # on garbage lengths), so any error while reading it means the bag is unreadable.
    except Exception as error:
        raise BagError(f"{path}: not a readable rosbag2 bag ({type(error).__name__}: {error})") from None
    if progress is not None:
        progress("reading", 1.0)
    return collector, topics, roles


def load_review_data(path, namespace="", robot_radius_m=None, half_extents_m=None, progress=None):
    """Read everything the review uses from the bag at `path` (rosbag2 directory, .mcap or .db3).

    robot_radius_m / half_extents_m: None takes them from the bag (planner_status key
    robot_radius_m; the forecasts' half-extents) or the defaults 0.3 m and 0.25 × 0.2 m.
    progress(stage, fraction) is called while reading. Raises BagError.
    """
    path = Path(path)
    if not path.exists():
        raise BagError(f"{path}: no such bag (expected a rosbag2 directory or a .mcap/.db3 file)")
    state = {}

    def choose(topics):
        used, notes = _match_topics(topics, namespace)
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

    collector, topics, used = _read_all(path, choose, progress)
    notes, source = state["notes"], state["source"]
    # Ids only matter with the ground truth they belong to.
    missing = [(role, msgtype, consequence) for role, (msgtype, consequence) in ROLES.items()
               if role not in state["matched"]
               and not (role == "crowd_truth_ids" and "crowd_truth" not in state["matched"])]
    offset = float(np.median(collector.offsets)) if collector.offsets else 0.0

    forecast_times = _times(collector.forecasts, offset)
    forecast_times, forecast_records = _ordered(forecast_times, collector.forecasts)
    forecasts = ForecastSeries(stamps_s=forecast_times, frame_ids=[r[2] for r in forecast_records],
                               raws=[r[3] for r in forecast_records], deserialize=collector.deserialize)
    robot = _robot_track(collector.odom, offset, notes)

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
        obstacles = _obstacles_from_pose_arrays(source, records, ids, offset, half_extents_m, notes)
    elif source == "obstacle_forecast":
        obstacles = _obstacles_from_forecasts(forecasts, progress, notes)
        extents_source = "obstacle_forecast half_length/half_width, per track"
    else:
        obstacles = _empty_obstacles("none")
        notes.append("no obstacle topic (crowd_truth, obstacle_forecast, detections): no events can be found")
    if obstacles.frame_id and robot.frame_id and obstacles.frame_id != robot.frame_id:
        notes.append(f"obstacles are in frame '{obstacles.frame_id}' but odometry in '{robot.frame_id}'; "
                     f"the review assumes they coincide (no transforms are available offline)")

    plan_times, plan_records = _ordered(_times(collector.plans, offset), collector.plans)
    plans = PlanSeries(plan_times, [r[2] for r in plan_records], collector.deserialize)
    goal_times, goal_records = _ordered(_times(collector.goals, offset), collector.goals)
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
        half_extents_m=tuple(float(v) for v in half_extents_m), half_extents_source=extents_source)
