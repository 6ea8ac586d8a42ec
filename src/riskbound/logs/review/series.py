"""The review's data in memory: robot track, obstacle rows, forecasts, plans, statuses, commands,
and the ReviewData that holds them (filled by riskbound.logs.review.load)."""

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from riskbound.forecast_schema import cloud_to_forecast
from riskbound.logs.review import cdr
from riskbound.logs.review.sanity import plausible_forecast
from riskbound.logs.review.topics import PATH, POINT_CLOUD


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
    rejected: set = field(default_factory=set)   # indices holding absurd values (see plausible_forecast)

    def __len__(self):
        return len(self.stamps_s)

    def get(self, index):
        """ObstacleForecast of message `index`, or None when it does not decode (reason in errors)
        or holds values no tracker could have meant (index in rejected)."""
        if index not in self._cache:
            try:
                forecast = cloud_to_forecast(self.deserialize(self.raws[index], POINT_CLOUD))
            except Exception as error:  # a damaged cloud must not end the review
                forecast = None
                self.errors[index] = f"{type(error).__name__}: {error}"
            if forecast is not None and not plausible_forecast(forecast):
                forecast = None
                self.rejected.add(index)
            self._cache[index] = forecast
        return None if index in self.rejected else self._cache[index]

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
    rejected: dict = field(default_factory=dict)   # role → messages dropped for implausible values
    namespace: str = ""
    not_examined: list = field(default_factory=list)   # reasons the run could not be examined (review.coverage)
    closest: object = None       # riskbound.clearance.Approach of the whole run, once computed


def empty_obstacles(source):
    return Obstacles(source, np.zeros(0), np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64),
                     np.zeros((0, 2)), np.zeros(0), np.zeros((0, 2)), np.zeros(0))
