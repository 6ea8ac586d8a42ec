"""One pass over a bag: every message the review uses, decoded into plain records per role.

Fast byte decoders (riskbound.logs.review.cdr) first; the type store where a message's layout is
not the one they expect. Any failure to read raises BagError naming the bag and what was wrong.
"""

import numpy as np
from rosbags.highlevel import AnyReader

from riskbound.logs.bag_io import TYPESTORE, BagError
from riskbound.logs.review import cdr
from riskbound.logs.review.topics import WATCHDOG_STATUS_NAME

_PROGRESS_EVERY = 2000


def _stamp_or_none(stamp):
    return stamp if stamp != 0.0 else None


class Collector:
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


def read_all(path, used, progress):
    """One pass over the bag; returns the collector and the bag's topic table."""
    try:
        with AnyReader([path], default_typestore=TYPESTORE) as reader:
            topics = {name: (info.msgtype, info.msgcount) for name, info in reader.topics.items()}
            roles = used(topics)
            wanted = {topic: role for role, topic in roles.items()}
            typestore = reader.typestore
            collector = Collector(path, typestore.deserialize_cdr)
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
