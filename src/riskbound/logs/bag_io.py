"""rosbag2 bags without a ROS install: write and read them with `rosbags` and its type store.

Bags are standard rosbag2 directories (metadata.yaml plus one .mcap or .db3 file), so the
standard ROS 2 tools read what we write and we read what they record. Messages are CDR-encoded
with the ROS 2 Humble type definitions, which are identical (same type hashes) for the message
types used here up to the Kilted wheels the package runs with.

Crowd bags (written by `riskbound crowd`) hold:

| topic            | type                           | content                                          |
|------------------|--------------------------------|--------------------------------------------------|
| /detections      | geometry_msgs/msg/PoseArray    | what a people detector would report: noisy, with misses and clutter, heading in orientation, shuffled |
| /crowd_truth     | geometry_msgs/msg/PoseArray    | true walker poses (heading = walking direction)  |
| /crowd_truth_ids | std_msgs/msg/UInt32MultiArray  | walker ids, same order as /crowd_truth; written with the same log time as its PoseArray, one dimension labelled `walker_id` |
| /clock           | rosgraph_msgs/msg/Clock        | simulated time, for use_sim_time                 |
| /map             | nav_msgs/msg/OccupancyGrid     | the scenario's walls, obstacles and bounds: one message at the start, stored latched (reliable, transient local); older bags have none |

The ids go in a sibling UInt32MultiArray rather than a MarkerArray: it is the smallest standard
message that carries unsigned ids losslessly, and pairing is by log time and index order.
Bag metadata (custom_data) carries the scenario, seed, walker radius and robot start/goal hints.

Every failure to read (missing path, not a bag, truncated or corrupt file, missing topic, wrong
type, unpaired ids) raises BagError with a message naming the bag and what was wrong.
"""

import sqlite3
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import yaml
from rosbags.interfaces import Qos, QosDurability, QosHistory, QosLiveliness, QosReliability, QosTime
from rosbags.rosbag2 import Reader, StoragePlugin, Writer
from rosbags.rosbag2.errors import WriterError
from rosbags.typesys import Stores, get_typestore

from riskbound.motion.heading import quaternion_xyzw_to_yaw, yaw_to_quaternion_xyzw
from riskbound.world.grid_message import grid_message_fields, occupancy_from_grid_message

TYPESTORE = get_typestore(Stores.ROS2_HUMBLE)
STORAGE_FORMATS = ("mcap", "sqlite3")

TOPIC_DETECTIONS = "/detections"
TOPIC_TRUTH = "/crowd_truth"
TOPIC_TRUTH_IDS = "/crowd_truth_ids"
TOPIC_CLOCK = "/clock"

POSE_ARRAY = "geometry_msgs/msg/PoseArray"
UINT32_ARRAY = "std_msgs/msg/UInt32MultiArray"
CLOCK = "rosgraph_msgs/msg/Clock"
ID_DIMENSION_LABEL = "walker_id"

_STORAGE_PLUGINS = {"mcap": StoragePlugin.MCAP, "sqlite3": StoragePlugin.SQLITE3}
_ROSBAG2_VERSION = 9

_NO_TIME = QosTime(0, 0)


def _qos(reliability, depth):
    return Qos(QosHistory.KEEP_LAST, depth, reliability, QosDurability.VOLATILE, _NO_TIME, _NO_TIME,
               QosLiveliness.AUTOMATIC, _NO_TIME, False)


# Offered QoS stored per topic, so a replay republishes with the profiles a live
# system would use: sensor-data style for detections and the clock, reliable for ground truth.
CROWD_TOPICS = {
    TOPIC_DETECTIONS: (POSE_ARRAY, _qos(QosReliability.BEST_EFFORT, 5)),
    TOPIC_TRUTH: (POSE_ARRAY, _qos(QosReliability.RELIABLE, 10)),
    TOPIC_TRUTH_IDS: (UINT32_ARRAY, _qos(QosReliability.RELIABLE, 10)),
    TOPIC_CLOCK: (CLOCK, _qos(QosReliability.BEST_EFFORT, 1)),
}

TOPIC_MAP = "/map"
OCCUPANCY_GRID = "nav_msgs/msg/OccupancyGrid"
# Latched, as a map server offers it: a subscriber that comes late still gets the one message.
MAP_TOPICS = {TOPIC_MAP: (OCCUPANCY_GRID, Qos(QosHistory.KEEP_LAST, 1, QosReliability.RELIABLE,
                                              QosDurability.TRANSIENT_LOCAL, _NO_TIME, _NO_TIME,
                                              QosLiveliness.AUTOMATIC, _NO_TIME, False))}

_T = TYPESTORE.types


class BagError(Exception):
    """A bag could not be written or read; the message says which bag and why."""


def seconds_to_ns(seconds):
    """Float seconds → integer nanoseconds (rounded, not truncated: 0.3 s must be 300000000 ns)."""
    return int(round(float(seconds) * 1e9))


def _stamp(time_ns):
    return _T["builtin_interfaces/msg/Time"](sec=time_ns // 1_000_000_000, nanosec=time_ns % 1_000_000_000)


def pose_array_cdr(time_ns, frame_id, positions, headings):
    """Serialised geometry_msgs/PoseArray: positions (n, 2) [m], headings (n,) [rad], z = 0."""
    positions = np.asarray(positions, dtype=float).reshape(-1, 2)
    headings = np.asarray(headings, dtype=float).reshape(-1)
    if len(headings) != len(positions):
        raise ValueError(f"headings has {len(headings)} entries for {len(positions)} positions")
    Pose, Point, Quaternion = _T["geometry_msgs/msg/Pose"], _T["geometry_msgs/msg/Point"], _T["geometry_msgs/msg/Quaternion"]
    quaternions = yaw_to_quaternion_xyzw(headings)
    poses = [Pose(position=Point(x=float(px), y=float(py), z=0.0),
                  orientation=Quaternion(x=float(qx), y=float(qy), z=float(qz), w=float(qw)))
             for (px, py), (qx, qy, qz, qw) in zip(positions, quaternions)]
    header = _T["std_msgs/msg/Header"](stamp=_stamp(time_ns), frame_id=frame_id)
    return TYPESTORE.serialize_cdr(_T[POSE_ARRAY](header=header, poses=poses), POSE_ARRAY)


def ids_cdr(ids):
    """Serialised std_msgs/UInt32MultiArray with one dimension labelled `walker_id`."""
    ids = np.asarray(ids, dtype=np.uint32).reshape(-1)
    dim = _T["std_msgs/msg/MultiArrayDimension"](label=ID_DIMENSION_LABEL, size=len(ids), stride=len(ids))
    layout = _T["std_msgs/msg/MultiArrayLayout"](dim=[dim], data_offset=0)
    return TYPESTORE.serialize_cdr(_T[UINT32_ARRAY](layout=layout, data=ids), UINT32_ARRAY)


def clock_cdr(time_ns):
    """Serialised rosgraph_msgs/Clock."""
    return TYPESTORE.serialize_cdr(_T[CLOCK](clock=_stamp(time_ns)), CLOCK)


def occupancy_grid_cdr(time_ns, occupancy):
    """Serialised nav_msgs/OccupancyGrid of an OccupancyMap, stamped (and map_load_time) `time_ns`."""
    fields = grid_message_fields(occupancy)
    stamp = _stamp(int(time_ns))
    x, y, z = fields["position"]
    qx, qy, qz, qw = fields["orientation"]
    origin = _T["geometry_msgs/msg/Pose"](position=_T["geometry_msgs/msg/Point"](x=x, y=y, z=z),
                                         orientation=_T["geometry_msgs/msg/Quaternion"](x=qx, y=qy, z=qz, w=qw))
    info = _T["nav_msgs/msg/MapMetaData"](map_load_time=stamp, resolution=fields["resolution"],
                                          width=fields["width"], height=fields["height"], origin=origin)
    header = _T["std_msgs/msg/Header"](stamp=stamp, frame_id=fields["frame_id"])
    message = _T[OCCUPANCY_GRID](header=header, info=info, data=fields["data"])
    return TYPESTORE.serialize_cdr(message, OCCUPANCY_GRID)


class BagWriter:
    """Write a new rosbag2 bag (a directory that must not exist yet) topic by topic.

    Use as a context manager; on an exception the storage is closed without its index and the
    error is raised as BagError. `topics` maps topic → (message type, offered Qos or None).
    """

    def __init__(self, path, topics, storage="mcap", custom_data=None):
        if storage not in _STORAGE_PLUGINS:
            raise ValueError(f"storage={storage!r}: allowed values are {', '.join(STORAGE_FORMATS)}")
        self.path = Path(path)
        self.storage = storage
        self._topics = dict(topics)
        self._custom_data = {str(k): str(v) for k, v in (custom_data or {}).items()}
        self._writer = None
        self._connections = {}
        self.counts = {topic: 0 for topic in self._topics}

    def __enter__(self):
        try:
            self._writer = Writer(self.path, version=_ROSBAG2_VERSION, storage_plugin=_STORAGE_PLUGINS[self.storage])
            for key, value in self._custom_data.items():
                self._writer.set_custom_data(key, value)
            self._writer.open()
            for topic, (msgtype, qos) in self._topics.items():
                self._connections[topic] = self._writer.add_connection(
                    topic, msgtype, typestore=TYPESTORE, offered_qos_profiles=[qos] if qos else [])
        except (WriterError, OSError) as error:
            raise BagError(f"{self.path}: cannot create bag: {error}") from None
        return self

    def write(self, topic, time_ns, data):
        """Append one serialised message with log time `time_ns`."""
        try:
            self._writer.write(self._connections[topic], int(time_ns), data)
        except KeyError:
            raise BagError(f"{self.path}: topic {topic!r} was not declared; declared: "
                           f"{', '.join(self._connections)}") from None
        except (WriterError, OSError, sqlite3.Error) as error:
            raise BagError(f"{self.path}: cannot write {topic}: {error}") from None
        self.counts[topic] += 1

    def __exit__(self, exc_type, exc, traceback):
        writer, self._writer = self._writer, None
        if writer is None:
            return False
        if exc_type is not None:
            writer.abort()
            return False
        try:
            writer.close()
        except (WriterError, OSError, sqlite3.Error) as error:
            raise BagError(f"{self.path}: cannot finish bag: {error}") from None
        return False


@dataclass
class PoseArraySeries:
    """All PoseArray messages of one topic, in log-time order."""

    log_times_ns: np.ndarray   # (K,) int64
    stamps_s: np.ndarray       # (K,) header stamps [s]
    frame_ids: list            # K strings
    positions: list            # K arrays (n_k, 2) [m]
    headings: list             # K arrays (n_k,) [rad]

    def __len__(self):
        return len(self.log_times_ns)


@dataclass
class CrowdBag:
    """A crowd bag in plain numpy: detections, ground truth with ids, clock, metadata."""

    path: Path
    storage: str
    detections: PoseArraySeries
    truth: PoseArraySeries
    truth_ids: list            # K arrays (n_k,) uint32, same order as truth.positions[k]
    clock_s: np.ndarray        # (C,)
    metadata: dict = field(default_factory=dict)  # custom_data strings
    message_counts: dict = field(default_factory=dict)
    static_map: object = None  # OccupancyMap from /map; None in a bag without one


@contextmanager
def open_bag(path):
    """Open a bag for reading with rosbags' Reader; damage found while opening or while reading
    inside the block raises BagError naming the bag."""
    path = Path(path)
    if not path.exists():
        raise BagError(f"{path}: no such bag (expected a rosbag2 directory or a .mcap/.db3 file)")
    try:
        with Reader(path) as reader:
            yield reader
    except BagError:
        raise
    # A damaged file can fail anywhere in the parsers (struct, sqlite3, decompression, arithmetic
    # on garbage lengths), so any error while reading it means the bag is unreadable.
    except Exception as error:
        raise BagError(f"{path}: not a readable rosbag2 bag ({type(error).__name__}: {error})") from None


def read_raw(path, topics=None):
    """Yield (topic, msgtype, log_time_ns, serialised bytes) in log-time order.

    topics: iterable of topic names to keep (None: all). Damage anywhere, including in the middle
    of the file, raises BagError.
    """
    with open_bag(path) as reader:
        yield from _raw_messages(reader, topics)


def _raw_messages(reader, topics):
    wanted = None if topics is None else set(topics)
    connections = [c for c in reader.connections if wanted is None or c.topic in wanted]
    if not connections:
        return
    for connection, time_ns, data in reader.messages(connections=connections):
        yield connection.topic, connection.msgtype, time_ns, data


def read_messages(path, topics=None):
    """Yield (topic, msgtype, log_time_ns, message) with messages deserialised by the type store."""
    with open_bag(path) as reader:
        yield from _decoded(path, _raw_messages(reader, topics))


def _decoded(path, raw_messages):
    for topic, msgtype, time_ns, data in raw_messages:
        try:
            message = TYPESTORE.deserialize_cdr(data, msgtype)
        except Exception as error:  # garbage bytes can fail anywhere in the decoder
            raise BagError(f"{path}: message on {topic} at {time_ns} ns does not decode as {msgtype}: "
                           f"{type(error).__name__}: {error}") from None
        yield topic, msgtype, time_ns, message


def bag_topics(path):
    """{topic: (msgtype, message count)} from the bag's index, without reading messages."""
    with open_bag(path) as reader:
        return _topic_table(reader)


def _topic_table(reader):
    return {name: (info.msgtype, info.msgcount) for name, info in reader.topics.items()}


def read_custom_data(path):
    """custom_data of a bag directory's metadata.yaml ({} for a bare storage file)."""
    metadata_path = Path(path) / "metadata.yaml"
    if not metadata_path.is_file():
        return {}
    try:
        document = yaml.safe_load(metadata_path.read_text(encoding="utf-8"))
        info = document["rosbag2_bagfile_information"]
        return dict(info.get("custom_data") or {})
    except (OSError, yaml.YAMLError, KeyError, TypeError, AttributeError) as error:
        raise BagError(f"{metadata_path}: unreadable metadata ({type(error).__name__}: {error})") from None


def _pose_array_arrays(message):
    poses = message.poses
    positions = np.array([[p.position.x, p.position.y] for p in poses], dtype=float).reshape(-1, 2)
    quaternions = np.array([[p.orientation.x, p.orientation.y, p.orientation.z, p.orientation.w] for p in poses],
                           dtype=float).reshape(-1, 4)
    headings = quaternion_xyzw_to_yaw(quaternions)
    stamp_s = message.header.stamp.sec + 1e-9 * message.header.stamp.nanosec
    return stamp_s, message.header.frame_id, positions, headings


def _series(records):
    return PoseArraySeries(
        log_times_ns=np.array([r[0] for r in records], dtype=np.int64),
        stamps_s=np.array([r[1] for r in records], dtype=float),
        frame_ids=[r[2] for r in records],
        positions=[r[3] for r in records],
        headings=[r[4] for r in records],
    )


def read_crowd_bag(path):
    """Read a crowd bag (see the module docstring) into a CrowdBag. Raises BagError."""
    path = Path(path)
    detections, truth, ids, clock = [], [], [], []
    static_map = None
    with open_bag(path) as reader:
        topics = _topic_table(reader)
        for topic, (msgtype, _) in CROWD_TOPICS.items():
            if topic not in topics:
                raise BagError(f"{path}: topic {topic} is missing; a crowd bag has "
                               f"{', '.join(CROWD_TOPICS)} (found: {', '.join(sorted(topics)) or 'none'})")
            if topics[topic][0] != msgtype:
                raise BagError(f"{path}: topic {topic} has type {topics[topic][0]}, expected {msgtype}")
        for topic, msgtype, time_ns, message in _decoded(path, _raw_messages(reader, [*CROWD_TOPICS, TOPIC_MAP])):
            if topic == TOPIC_MAP:
                if static_map is None:
                    static_map = _map_from_message(path, msgtype, message)
            elif topic == TOPIC_CLOCK:
                clock.append(message.clock.sec + 1e-9 * message.clock.nanosec)
            elif topic == TOPIC_TRUTH_IDS:
                ids.append((time_ns, np.asarray(message.data, dtype=np.uint32).copy()))
            else:
                target = detections if topic == TOPIC_DETECTIONS else truth
                target.append((time_ns, *_pose_array_arrays(message)))
    truth_ids = _pair_ids(path, truth, ids)
    storage = "sqlite3" if _storage_suffix(path) == ".db3" else "mcap"
    return CrowdBag(path=path, storage=storage, detections=_series(detections), truth=_series(truth),
                    truth_ids=truth_ids, clock_s=np.array(clock, dtype=float),
                    metadata=read_custom_data(path),
                    message_counts={topic: count for topic, (_, count) in topics.items()}, static_map=static_map)


def read_static_map(path, expected_frame_id=None, **options):
    """The first /map message of any bag as an OccupancyMap, or None when the bag has no /map.

    options: occupied_threshold, unknown_is_occupied (riskbound.world.occupancy.OccupancyMap).
    Raises BagError for an unreadable bag or a /map message that is not a usable map."""
    for _, msgtype, _, message in read_messages(path, [TOPIC_MAP]):
        return _map_from_message(path, msgtype, message, expected_frame_id, **options)
    return None


def _map_from_message(path, msgtype, message, expected_frame_id=None, **options):
    if msgtype != OCCUPANCY_GRID:
        raise BagError(f"{path}: topic {TOPIC_MAP} has type {msgtype}, expected {OCCUPANCY_GRID}")
    try:
        return occupancy_from_grid_message(message, expected_frame_id=expected_frame_id, **options)
    except ValueError as error:
        raise BagError(f"{path}: {TOPIC_MAP} does not hold a usable map: {error}") from None


def _pair_ids(path, truth, ids):
    if len(ids) != len(truth):
        raise BagError(f"{path}: {len(truth)} {TOPIC_TRUTH} messages but {len(ids)} {TOPIC_TRUTH_IDS} messages")
    paired = []
    for (truth_ns, *_, positions, _), (ids_ns, walker_ids) in zip(truth, ids):
        if truth_ns != ids_ns or len(walker_ids) != len(positions):
            raise BagError(f"{path}: {TOPIC_TRUTH_IDS} at {ids_ns} ns ({len(walker_ids)} ids) does not match "
                           f"{TOPIC_TRUTH} at {truth_ns} ns ({len(positions)} poses)")
        paired.append(walker_ids)
    return paired


def _storage_suffix(path):
    path = Path(path)
    if path.is_dir():
        files = sorted(p.suffix for p in path.iterdir() if p.suffix in (".mcap", ".db3"))
        return files[0] if files else ""
    return path.suffix


def bag_size_bytes(path):
    """Total size of a bag directory (or file) in bytes."""
    path = Path(path)
    if path.is_dir():
        return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    return path.stat().st_size
