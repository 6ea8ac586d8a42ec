"""Replay node: publishes a rosbag2 bag's topics on time, and /clock for use_sim_time.

Timing, window, repeat and clock rules are riskbound.logs.playback's (see there). Each topic is
published with the type named in the bag (resolved to the installed message class,
riskbound.ros.message_types) and the QoS the recorder stored for it; the stored CDR bytes go out
as they are through rclpy's serialised publish, so a message leaves exactly as it was recorded,
header stamps included. Topic names are the bag's (absolute); remap them with `-r /a:=/b`.

Playback runs on its own thread, so the node keeps answering parameter requests while it waits
for the next message. It starts once every topic in await_senders has a publisher and every
topic in await_listeners a subscriber (or await_timeout_s has passed), plus pause_before_s;
with exit_at_end it ends the process (code 0) after the window has been played, which a launch
file can use to end a whole run (on_exit="shutdown").

Parameters: riskbound.logs.playback.REPLAY_SPECS and LIST_SPECS (all read-only: restart to change).

Run: python -m riskbound.ros.replay_node --ros-args -p bag:=test/data/crowd_courtyard_40 -p speed:=1.0
"""

import sys
import threading
import time
import traceback

import rclpy
from builtin_interfaces.msg import Time
from rclpy.exceptions import ParameterException
from rclpy.executors import ExternalShutdownException
from rclpy.node import Node
from rclpy.qos import QoSProfile, ReliabilityPolicy
from rosgraph_msgs.msg import Clock

from riskbound.logs.bag_io import TOPIC_CLOCK, BagError
from riskbound.logs.playback import LIST_SPECS, REPLAY_SPECS, BagPlayback, ClockTicks, PassTimeline, ReplaySettings
from riskbound.ros.message_types import message_class, qos_from_bag
from riskbound.ros.setting_parameters import declare_settings
from riskbound.ros.string_list_parameter import declare_string_list

NODE_NAME = "replay"
WAIT_POLL_S = 0.1
CLOCK_LEAD_S = 0.05
# A late clock tick is useless, so best effort, newest only.
CLOCK_QOS = QoSProfile(depth=1, reliability=ReliabilityPolicy.BEST_EFFORT)


def _time_msg(time_ns):
    return Time(sec=time_ns // 1_000_000_000, nanosec=time_ns % 1_000_000_000)


class ReplayNode(Node):
    def __init__(self, **kwargs):
        super().__init__(NODE_NAME, **kwargs)
        if self.get_parameter("use_sim_time").value:
            raise ValueError("use_sim_time=True is not allowed for the replay node: it is the clock source")
        values = declare_settings(self, REPLAY_SPECS)
        for name, description in LIST_SPECS.items():
            values[name] = declare_string_list(self, name, description)
        self.settings = ReplaySettings(**values)
        self.playback = BagPlayback(self.settings)
        self._topic_publishers = {}
        for topic in self.playback.topics.values():
            try:
                self._topic_publishers[topic.name] = self.create_publisher(message_class(topic.msgtype), topic.name,
                                                                     qos_from_bag(topic.qos))
            except ValueError as error:
                self.get_logger().warning(f"{topic.name} ({topic.count} messages) is not replayed: {error}")
        self._clock_pub = self.create_publisher(Clock, TOPIC_CLOCK, CLOCK_QOS) if self.settings.drive_sim_time else None
        self._stop = threading.Event()
        self.finished = threading.Event()
        self.failure = None
        self.messages_published = 0
        s, p = self.settings, self.playback
        self.get_logger().info(
            f"replaying {s.bag}: {len(self._topic_publishers)} topics, {p.pass_length_s:.1f} s from "
            f"+{s.skip_first_s} s at speed {s.speed}{', repeating' if s.repeat else ''}"
            f"{', publishing /clock at %g Hz' % s.sim_time_hz if s.drive_sim_time else ''}")
        self._thread = threading.Thread(target=self._run, name="replay", daemon=True)
        self._thread.start()

    def stop(self):
        self._stop.set()
        self._thread.join(timeout=2.0)

    # --- playback thread --------------------------------------------------------------------------

    def _run(self):
        try:
            self._wait_for_graph()
            if self._stop.wait(self.settings.pause_before_s):
                return
            while not self._stop.is_set():
                self._play_pass()
                if not self.settings.repeat or self._stop.is_set():
                    break
                self.get_logger().info("end of the window: starting again from its start (repeat)")
            if not self._stop.is_set():
                self.get_logger().info(f"done: {self.messages_published} messages published")
        except BagError as error:
            self.failure = str(error)
        except Exception:  # noqa: BLE001 - reported by main() as a failure instead of a silent thread death
            if self.context.ok():
                self.failure = "playback failed:\n" + traceback.format_exc()
        finally:
            self.finished.set()

    def _wait_for_graph(self):
        """Until every topic of await_senders has a publisher and every topic of
        await_listeners a subscriber, or await_timeout_s."""
        s = self.settings
        wanted = [(t, "publisher", self.count_publishers) for t in s.await_senders] + [
            (t, "subscriber", self.count_subscribers) for t in s.await_listeners]
        if not wanted:
            return
        started = time.monotonic()
        self.get_logger().info("waiting for " + ", ".join(f"a {what} on {topic}" for topic, what, _ in wanted))
        while not self._stop.is_set():
            missing = [f"{what} on {topic}" for topic, what, count in wanted if count(topic) == 0]
            if not missing:
                self.get_logger().info(f"graph ready after {time.monotonic() - started:.1f} s: starting playback")
                return
            if time.monotonic() - started >= s.await_timeout_s:
                self.get_logger().warning(f"no {', '.join(missing)} after await_timeout_s={s.await_timeout_s}: "
                                          "starting playback anyway")
                return
            self._stop.wait(WAIT_POLL_S)

    def _play_pass(self):
        # The clock goes out first and alone, so that subscribers under use_sim_time know the start
        # time before the first message arrives (DDS does not order deliveries across topics).
        self._publish_clock(self.playback.window_start_ns)
        if self._clock_pub is not None and self._stop.wait(CLOCK_LEAD_S):
            return
        timeline = PassTimeline(self.playback.window_start_ns, self.settings.speed, time.monotonic())
        ticks = ClockTicks(self.settings.sim_time_hz, timeline.start_wall_s)
        for time_ns, topic, data in self.playback.messages():
            if not self._wait_until(timeline.due_wall_s(time_ns), timeline, ticks):
                return
            publisher = self._topic_publishers.get(topic)
            if publisher is not None:
                publisher.publish(data)
                self.messages_published += 1
        end_wall_s = timeline.due_wall_s(self.playback.window_end_ns)
        self._wait_until(end_wall_s, timeline, ticks)
        self._publish_clock(self.playback.window_end_ns)

    def _wait_until(self, due_s, timeline, ticks):
        """Sleep until wall time due_s, sending the clock ticks that fall before it; False when stopped."""
        while not self._stop.is_set():
            now_s = time.monotonic()
            if self._clock_pub is not None and ticks.next_s <= due_s:
                if ticks.next_s > now_s and self._stop.wait(ticks.next_s - now_s):
                    return False
                now_s = time.monotonic()
                self._publish_clock(timeline.bag_time_ns(min(now_s, due_s)))
                ticks.advance(now_s)
                continue
            if due_s <= now_s:
                return True
            if self._stop.wait(due_s - now_s):
                return False
        return False

    def _publish_clock(self, time_ns):
        if self._clock_pub is not None and self.context.ok():
            self._clock_pub.publish(Clock(clock=_time_msg(time_ns)))


def main(args=None):
    """init → spin until the bag is played (exit_at_end) or Ctrl-C/SIGTERM → shutdown. Returns the exit code."""
    rclpy.init(args=args)
    node = None
    code = 0
    try:
        node = ReplayNode()
        while rclpy.ok():
            rclpy.spin_once(node, timeout_sec=0.1)
            if node.finished.is_set() and (node.failure or node.settings.exit_at_end):
                break
        if node.failure:
            node.get_logger().fatal(node.failure)
            code = 1
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    except (ValueError, ParameterException, BagError) as error:
        rclpy.logging.get_logger(NODE_NAME).fatal(f"invalid configuration: {error}")
        code = 1
    finally:
        if node is not None:
            node.stop()
            node.destroy_node()
        rclpy.try_shutdown()
    return code


if __name__ == "__main__":
    sys.exit(main())
