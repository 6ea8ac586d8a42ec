"""Recorder node: writes chosen topics to a new rosbag2 bag (MCAP by default) from serialised messages.

Every discovery_period_s it looks at the graph; each chosen topic that has a publisher is
subscribed once, with the type the graph reports and a QoS that matches all its publishers
(riskbound.ros.message_types.subscription_qos), and its messages are written as received
(`raw=True`: the CDR bytes are never decoded). The log time of a message is the node's clock at
reception: simulated time under use_sim_time, so a replayed run is recorded in the bag's time.
Within a topic the order is the publisher's; across topics it is the order of reception, which DDS
does not tie to the order of publication (messages a few milliseconds apart may swap).
The offered QoS of the first publisher is stored, so a replay republishes a latched topic latched.

The bag is finished (storage index and metadata.yaml written) on every way out: Ctrl-C, SIGTERM,
or an error; a bag cut off by SIGKILL is not readable.

Parameters: bag_dir, bag_format, only_topics, discovery_period_s, queue_depth (read-only: restart to change).

Run: python -m riskbound.ros.recorder_node --ros-args -p bag_dir:=out/run1 -p "only_topics:=[/odom, /cmd_vel]"
"""

import sys

import rclpy
from rclpy.exceptions import ParameterException
from rclpy.executors import ExternalShutdownException
from rclpy.clock import Clock, ClockType
from rclpy.node import Node

from riskbound.logs.bag_io import STORAGE_FORMATS, BagError
from riskbound.logs.recording import RawBagRecorder, default_bag_name
from riskbound.ros.message_types import message_class, qos_to_bag, subscription_qos
from riskbound.ros.setting_parameters import declare_settings
from riskbound.ros.string_list_parameter import declare_string_list
from riskbound.ros.throttled_warnings import ThrottledWarnings
from riskbound.settings_table import SettingSpec

NODE_NAME = "recorder"
WARN_THROTTLE_S = 5.0
# Recorded when `only_topics` is empty: everything except the graph's own housekeeping.
NOT_RECORDED_BY_DEFAULT = ("/rosout", "/parameter_events")
RECORDER_SPECS = (
    SettingSpec("bag_dir", "", "bag directory to create (must not exist); ending in '/' or empty: a new "
                "riskbound_<date>_<time> inside that directory (or the working directory)", read_only=True),
    SettingSpec("bag_format", "mcap", "storage format of the bag", choices=STORAGE_FORMATS, read_only=True),
    SettingSpec("discovery_period_s", 0.5, "how often the graph is searched for the chosen topics [s]",
                0.05, 60.0, read_only=True),
    SettingSpec("queue_depth", 100, "messages each subscription buffers while the node is busy",
                1, 100000, read_only=True),
)


class RecorderNode(Node):
    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, **kwargs)
        values = declare_settings(self, RECORDER_SPECS)
        requested = declare_string_list(
            self, "only_topics", "topics to record (absolute or relative to the node's namespace); empty: every topic "
                            f"except {', '.join(NOT_RECORDED_BY_DEFAULT)}")
        if any(not topic for topic in requested):
            raise ValueError(f"only_topics={list(requested)!r} is not allowed: topic names must not be empty")
        self._wanted = {self.resolve_topic_name(topic) for topic in requested}
        self._depth = values["queue_depth"]
        bag_dir = values["bag_dir"]
        if not bag_dir or bag_dir.endswith("/"):
            bag_dir += default_bag_name()
        self.recorder = RawBagRecorder(bag_dir, bag_format=values["bag_format"])
        self._refused = set()
        self._warn = ThrottledWarnings(self.get_logger(), WARN_THROTTLE_S).warn
        # Discovery runs on the steady clock: under use_sim_time a ROS-time timer would wait for a
        # /clock that may only start once this node records (a replay waiting for its subscriber).
        self.create_timer(values["discovery_period_s"], self._discover, clock=Clock(clock_type=ClockType.STEADY_TIME))
        self.get_logger().info(f"recording {', '.join(sorted(self._wanted)) if self._wanted else 'all topics'} "
                               f"to {self.recorder.path} ({values['bag_format']})")
        self._discover()

    def _discover(self):
        for topic, types in self.get_topic_names_and_types():
            if topic in self.recorder.counts or topic in self._refused:
                continue
            if self._wanted and topic not in self._wanted:
                continue
            if not self._wanted and topic in NOT_RECORDED_BY_DEFAULT:
                continue
            if len(types) != 1:
                self._warn(topic, f"{topic} is published with several types ({', '.join(types)}): not recorded")
                continue
            publishers = self.get_publishers_info_by_topic(topic)
            if not publishers:
                continue  # only subscribers so far: the type is known but nobody offers a QoS yet
            self._subscribe(topic, types[0], publishers)

    def _subscribe(self, topic, msgtype, publishers):
        try:
            msg_class = message_class(msgtype)
            self.recorder.add_topic(topic, msgtype, offered_qos=[qos_to_bag(publishers[0].qos_profile)],
                                    type_hash=str(publishers[0].topic_type_hash))
        except ValueError as error:
            self._refused.add(topic)
            self.get_logger().warning(str(error))
            return
        qos = subscription_qos([p.qos_profile for p in publishers], self._depth)
        self.create_subscription(msg_class, topic, lambda data, topic=topic: self._on_message(topic, data), qos,
                                 raw=True)
        self.get_logger().info(f"recording {topic} ({msgtype})")

    def _on_message(self, topic, data):
        try:
            self.recorder.write(topic, self.get_clock().now().nanoseconds, data)
        except BagError as error:
            self._warn("write", str(error))

    def close(self):
        """Finish the bag; return what it holds, in words (the node's logger may be gone by now)."""
        self.recorder.close()
        counts = self.recorder.counts
        return f"wrote {sum(counts.values())} messages on {len(counts)} topics to {self.recorder.path}"


def main(args=None):
    """init → spin → finish the bag → shutdown; Ctrl-C and SIGTERM end it cleanly. Returns the exit code."""
    rclpy.init(args=args)
    node = None
    code = 0
    try:
        node = RecorderNode()
        rclpy.spin(node)
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    except (ValueError, ParameterException, BagError) as error:
        rclpy.logging.get_logger(NODE_NAME).fatal(f"invalid configuration: {error}")
        code = 1
    finally:
        if node is not None:
            # The bag is finished first: SIGTERM may already have shut the context down, and a
            # second signal must not find it unwritten.
            try:
                summary = node.close()
            except BagError as error:
                summary, code = str(error), 1
            node.destroy_node()
            # After destroy_node: the node's logger would try to publish to a dead /rosout.
            logger = rclpy.logging.get_logger(NODE_NAME)
            (logger.fatal if code else logger.info)(summary)
        rclpy.try_shutdown()
    return code


if __name__ == "__main__":
    sys.exit(main())
