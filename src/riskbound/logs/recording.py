"""Record serialised messages into a new rosbag2 bag, topics added as they are discovered (the
recorder node's core; no ROS needed).

Message definitions stored with each topic come from rosbags' type store for the ROS 2 release
the package runs with (Kilted), so the standard tools decode the bag. A topic whose type the
store does not know, or whose live type hash differs from the store's definition, is refused
with a ValueError naming it: recording bytes under a wrong definition would give a bag that
decodes to garbage.

The bag is only complete once `close()` has written the storage index and metadata.yaml; the
node calls it on every way out, including SIGINT and SIGTERM.
"""

import sqlite3
import time
from pathlib import Path

from rosbags.rosbag2 import StoragePlugin, Writer
from rosbags.rosbag2.errors import WriterError
from rosbags.typesys import Stores, get_typestore

from riskbound.logs.bag_io import STORAGE_FORMATS, BagError

RECORD_TYPESTORE = get_typestore(Stores.ROS2_KILTED)
_STORAGE_PLUGINS = {"mcap": StoragePlugin.MCAP, "sqlite3": StoragePlugin.SQLITE3}
_ROSBAG2_VERSION = 9


def default_bag_name(now=None):
    """`riskbound_YYYYmmdd_HHMMSS`, the name used when no bag directory is given."""
    return time.strftime("riskbound_%Y%m%d_%H%M%S", time.localtime(now))


class RawBagRecorder:
    """A new bag at `path` (must not exist; parent directories are created) in `bag_format`."""

    def __init__(self, path, bag_format="mcap", custom_data=None):
        if bag_format not in _STORAGE_PLUGINS:
            raise ValueError(f"bag_format={bag_format!r} is not allowed: must be one of {', '.join(STORAGE_FORMATS)}")
        self.path = Path(path)
        if self.path.exists():
            raise ValueError(f"bag_dir={str(self.path)!r} already exists: choose a new path")
        self.bag_format = bag_format
        self.counts = {}
        self.types = {}
        self._connections = {}
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._writer = Writer(self.path, version=_ROSBAG2_VERSION, storage_plugin=_STORAGE_PLUGINS[bag_format])
            for key, value in (custom_data or {}).items():
                self._writer.set_custom_data(str(key), str(value))
            self._writer.open()
        except (WriterError, OSError) as error:
            raise BagError(f"{self.path}: cannot create bag: {error}") from None

    def add_topic(self, topic, msgtype, offered_qos=None, type_hash=None):
        """Declare a topic before writing to it. offered_qos: rosbags Qos records to store;
        type_hash: the live publisher's RIHS01 hash, checked against the stored definition."""
        if topic in self._connections:
            return
        if msgtype not in RECORD_TYPESTORE.types:
            raise ValueError(f"{topic}: type {msgtype} has no definition in the Kilted type store; not recorded")
        known_hash = RECORD_TYPESTORE.hash_rihs01(msgtype)
        if type_hash and type_hash != known_hash:
            raise ValueError(f"{topic}: live type hash {type_hash} of {msgtype} differs from the stored "
                             f"definition's {known_hash}; not recorded")
        try:
            self._connections[topic] = self._writer.add_connection(
                topic, msgtype, typestore=RECORD_TYPESTORE, offered_qos_profiles=list(offered_qos or []))
        except WriterError as error:
            raise BagError(f"{self.path}: cannot add {topic}: {error}") from None
        self.counts[topic] = 0
        self.types[topic] = msgtype

    def write(self, topic, time_ns, data):
        """Append one serialised message with log time time_ns."""
        if self._writer is None:
            raise BagError(f"{self.path}: already closed")
        try:
            self._writer.write(self._connections[topic], int(time_ns), bytes(data))
        except KeyError:
            raise BagError(f"{self.path}: topic {topic!r} was not added") from None
        except (WriterError, OSError, sqlite3.Error) as error:
            raise BagError(f"{self.path}: cannot write {topic}: {error}") from None
        self.counts[topic] += 1

    def close(self):
        """Finish the bag (index, metadata.yaml). Safe to call more than once."""
        writer, self._writer = self._writer, None
        if writer is None:
            return
        try:
            writer.close()
        except (WriterError, OSError, sqlite3.Error) as error:
            raise BagError(f"{self.path}: cannot finish bag: {error}") from None
