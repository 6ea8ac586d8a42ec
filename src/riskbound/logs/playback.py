"""Bag playback without ROS: which messages to play, in what order, and when (the replay node's core).

A pass plays the window [start + skip_first_s, start + skip_first_s + window_s] of the bag
(window_s = 0: to the end) in log-time order. Wall time and bag time are tied by the speed factor:

    bag_time(wall) = window_start + speed · (wall − pass_start_wall)
    due_wall(t)    = pass_start_wall + (t − window_start) / speed

so speed 2 plays twice as fast and speed 0.5 at half speed. With `repeat` the next pass starts
when the previous one ends, from the window start again, so the bag's time jumps back (nodes
under use_sim_time see time run backwards and must cope). Messages stay serialised (CDR bytes as
stored); the node publishes them as they are, so no message is decoded or re-encoded on the way.

When `drive_sim_time` is set, the replay publishes /clock itself (sim_time_hz ticks of bag_time
per wall second, one at the start of each pass) and does not replay a /clock topic stored in the
bag, whose ticks would fight its own after a speed change or a repeat.
"""

from dataclasses import dataclass, field, fields, replace

from riskbound.logs.bag_io import TOPIC_CLOCK, BagError, open_bag
from riskbound.settings_table import SettingSpec

REPLAY_SPECS = (
    SettingSpec("bag", "", "rosbag2 bag to play: a bag directory or its .mcap/.db3 file", read_only=True),
    SettingSpec("speed", 1.0, "playback speed as a multiple of recorded time", 0.0, 100.0, low_open=True,
                read_only=True),
    SettingSpec("skip_first_s", 0.0, "skip this much of the bag's beginning [s]", 0.0, 1e6, read_only=True),
    SettingSpec("window_s", 0.0, "play this much of the bag after the skipped part; 0: to the end [s]",
                0.0, 1e6, read_only=True),
    SettingSpec("repeat", False, "play the window again, from its start, each time it ends", read_only=True),
    SettingSpec("drive_sim_time", True, "publish /clock from the playback time (for use_sim_time); a /clock "
                "topic stored in the bag is then not replayed", read_only=True),
    SettingSpec("sim_time_hz", 100.0, "/clock messages per second of wall time", 1.0, 1000.0, read_only=True),
    SettingSpec("await_timeout_s", 60.0, "wait at most this long for await_senders and "
                "await_listeners before playing anyway [s]", 0.0, 3600.0, read_only=True),
    SettingSpec("pause_before_s", 0.0, "wall-time pause after the wait, before the first message [s]",
                0.0, 3600.0, read_only=True),
    SettingSpec("exit_at_end", True, "end the node (exit code 0) when the window has been played and repeat "
                "is false", read_only=True),
)
LIST_SPECS = {
    "only_topics": "topics to play (absolute names as stored); empty: every topic in the bag",
    "await_senders": "play only once each of these topics has a publisher (nodes that must be up "
                     "first: their publishers appear when they are ready), or after await_timeout_s",
    "await_listeners": "play only once each of these topics has a subscriber (a recorder that must not "
                       "miss the start), or after await_timeout_s",
}
SPECS_BY_NAME = {spec.name: spec for spec in REPLAY_SPECS}


@dataclass(frozen=True)
class ReplaySettings:
    """Validated replay settings (SI units)."""

    bag: str = ""
    speed: float = 1.0
    skip_first_s: float = 0.0
    window_s: float = 0.0
    repeat: bool = False
    drive_sim_time: bool = True
    sim_time_hz: float = 100.0
    await_timeout_s: float = 60.0
    pause_before_s: float = 0.0
    exit_at_end: bool = True
    only_topics: tuple = field(default=())
    await_senders: tuple = field(default=())
    await_listeners: tuple = field(default=())

    def __post_init__(self):
        for item in fields(self):
            value = getattr(self, item.name)
            if item.name in LIST_SPECS:
                if isinstance(value, str) or not all(isinstance(v, str) and v for v in value):
                    raise ValueError(f"{item.name}={value!r} is not allowed: must be a list of non-empty topic names")
                object.__setattr__(self, item.name, tuple(value))
                continue
            spec = SPECS_BY_NAME[item.name]
            if isinstance(spec.default, float) and isinstance(value, int) and not isinstance(value, bool):
                object.__setattr__(self, item.name, float(value))
            reason = spec.check(getattr(self, item.name))
            if reason:
                raise ValueError(reason)
        if not self.bag:
            raise ValueError("bag='' is not allowed: must name a rosbag2 bag directory or .mcap/.db3 file")

    def with_changes(self, **changes):
        """Return a copy with `changes` applied; ValueError names the first invalid one."""
        return replace(self, **changes)


@dataclass(frozen=True)
class TopicInfo:
    """One topic to play: name, ROS type name, the QoS the recorder saw offered (rosbags Qos or None)."""

    name: str
    msgtype: str
    qos: object
    count: int


class BagPlayback:
    """The messages of one bag to play with the given settings: topics, window and passes."""

    def __init__(self, settings):
        self.settings = settings
        with open_bag(settings.bag) as reader:
            self.bag_start_ns = reader.start_time
            self.bag_end_ns = reader.end_time
            available = {}
            for connection in reader.connections:
                offered = list(getattr(connection.ext, "offered_qos_profiles", None) or [])
                previous = available.get(connection.topic)
                count = connection.msgcount + (previous.count if previous else 0)
                if previous is not None and previous.msgtype != connection.msgtype:
                    raise BagError(f"{settings.bag}: topic {connection.topic} is stored with two types, "
                                   f"{previous.msgtype} and {connection.msgtype}")
                available[connection.topic] = TopicInfo(connection.topic, connection.msgtype,
                                                        offered[0] if offered else None, count)
        missing = [t for t in settings.only_topics if t not in available]
        if missing:
            raise ValueError(f"only_topics={list(settings.only_topics)!r}: {', '.join(missing)} not in {settings.bag} "
                             f"(it has {', '.join(sorted(available)) or 'no topics'})")
        chosen = settings.only_topics or tuple(sorted(available))
        if settings.drive_sim_time:
            chosen = tuple(t for t in chosen if t != TOPIC_CLOCK)
        self.topics = {name: available[name] for name in chosen}
        self.window_start_ns = self.bag_start_ns + _ns(settings.skip_first_s)
        if self.window_start_ns > self.bag_end_ns:
            raise ValueError(f"skip_first_s={settings.skip_first_s!r} is out of range: the bag lasts "
                             f"{(self.bag_end_ns - self.bag_start_ns) * 1e-9:.3f} s")
        self.window_end_ns = self.bag_end_ns if settings.window_s == 0.0 else min(
            self.bag_end_ns, self.window_start_ns + _ns(settings.window_s))

    @property
    def pass_length_s(self):
        """Length of one pass in bag time [s]."""
        return (self.window_end_ns - self.window_start_ns) * 1e-9

    def messages(self):
        """Yield (log_time_ns, topic, serialised bytes) of one pass, in log-time order. BagError on damage."""
        if not self.topics:
            return
        with open_bag(self.settings.bag) as reader:
            connections = [c for c in reader.connections if c.topic in self.topics]
            for connection, time_ns, data in reader.messages(connections=connections, start=self.window_start_ns,
                                                             stop=self.window_end_ns + 1):
                yield time_ns, connection.topic, bytes(data)


class PassTimeline:
    """Wall time ↔ bag time for one pass that started at wall time `start_wall_s` (monotonic seconds)."""

    def __init__(self, window_start_ns, speed, start_wall_s):
        self.window_start_ns = window_start_ns
        self.speed = speed
        self.start_wall_s = start_wall_s

    def due_wall_s(self, time_ns):
        """Wall time at which the message logged at time_ns is due."""
        return self.start_wall_s + (time_ns - self.window_start_ns) * 1e-9 / self.speed

    def bag_time_ns(self, wall_s):
        """Bag time at wall time wall_s (never before the window start)."""
        return self.window_start_ns + max(0, _ns(self.speed * (wall_s - self.start_wall_s)))


class ClockTicks:
    """Wall times of /clock ticks every 1/sim_time_hz; a tick missed by more than one period (an
    overloaded machine) is dropped rather than sent in a burst."""

    def __init__(self, sim_time_hz, start_wall_s):
        self.period_s = 1.0 / sim_time_hz
        self.next_s = start_wall_s

    def advance(self, now_s):
        """Move on from the tick just sent at (about) now_s."""
        self.next_s = max(self.next_s + self.period_s, now_s)

def _ns(seconds):
    return int(round(float(seconds) * 1e9))
