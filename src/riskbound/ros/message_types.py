"""ROS type names ↔ installed message classes and QoS profiles, for the nodes that move serialised
messages (replay, recorder) without knowing the types in advance.

A type name as stored in bags and reported by the graph, `pkg/msg/Name`, is the class `Name` of
the Python module `pkg.msg` that the message package installs; no introspection package is needed.
QoS profiles are converted between rclpy and the plain records rosbags stores in bag metadata.
"""

import importlib

from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rosbags.interfaces import Qos, QosDurability, QosHistory, QosLiveliness, QosReliability, QosTime

# What a replayed topic gets when the bag stored no offered QoS (rosbag2's own fallback is the
# same: reliable, volatile, keep last 10).
DEFAULT_QOS = QoSProfile(depth=10, reliability=ReliabilityPolicy.RELIABLE, durability=DurabilityPolicy.VOLATILE)

_NO_TIME = QosTime(0, 0)


def message_class(msgtype):
    """The installed class of `pkg/msg/Name`; ValueError saying which package or name is missing."""
    parts = msgtype.split("/")
    if len(parts) != 3 or parts[1] != "msg" or not all(parts):
        raise ValueError(f"message type {msgtype!r} is not of the form pkg/msg/Name")
    package, _, name = parts
    try:
        module = importlib.import_module(f"{package}.msg")
    except ImportError:
        raise ValueError(f"message type {msgtype}: package {package!r} is not installed "
                         f"(pip install ros-{package.replace('_', '-')})") from None
    try:
        return getattr(module, name)
    except AttributeError:
        raise ValueError(f"message type {msgtype}: {package} has no message {name!r}") from None


def qos_from_bag(qos):
    """rclpy QoSProfile for a rosbags Qos stored in bag metadata (None → DEFAULT_QOS).

    History, depth, reliability and durability are carried over; deadline, lifespan and liveliness
    are left at their defaults: a replay has no use for them.
    """
    if qos is None:
        return DEFAULT_QOS
    reliability = (ReliabilityPolicy.BEST_EFFORT if qos.reliability == QosReliability.BEST_EFFORT
                   else ReliabilityPolicy.RELIABLE)
    durability = (DurabilityPolicy.TRANSIENT_LOCAL if qos.durability == QosDurability.TRANSIENT_LOCAL
                  else DurabilityPolicy.VOLATILE)
    history = HistoryPolicy.KEEP_ALL if qos.history == QosHistory.KEEP_ALL else HistoryPolicy.KEEP_LAST
    depth = int(qos.depth) if qos.depth > 0 else DEFAULT_QOS.depth
    return QoSProfile(history=history, depth=depth, reliability=reliability, durability=durability)


def qos_to_bag(profile):
    """rosbags Qos for an rclpy QoSProfile (a publisher's offered profile), to store in a bag."""
    reliability = (QosReliability.BEST_EFFORT if profile.reliability == ReliabilityPolicy.BEST_EFFORT
                   else QosReliability.RELIABLE)
    durability = (QosDurability.TRANSIENT_LOCAL if profile.durability == DurabilityPolicy.TRANSIENT_LOCAL
                  else QosDurability.VOLATILE)
    history = QosHistory.KEEP_ALL if profile.history == HistoryPolicy.KEEP_ALL else QosHistory.KEEP_LAST
    return Qos(history, int(profile.depth), reliability, durability, _NO_TIME, _NO_TIME,
               QosLiveliness.AUTOMATIC, _NO_TIME, False)


def subscription_qos(offered, depth):
    """The QoS to record a topic with, given its publishers' offered profiles (rclpy QoSProfile).

    Reliable only if every publisher is reliable and transient-local only if every publisher is
    (a stricter request would not match the others); keep-last `depth` so bursts are not lost.
    """
    reliable = bool(offered) and all(p.reliability == ReliabilityPolicy.RELIABLE for p in offered)
    latched = bool(offered) and all(p.durability == DurabilityPolicy.TRANSIENT_LOCAL for p in offered)
    return QoSProfile(depth=depth,
                      reliability=ReliabilityPolicy.RELIABLE if reliable else ReliabilityPolicy.BEST_EFFORT,
                      durability=DurabilityPolicy.TRANSIENT_LOCAL if latched else DurabilityPolicy.VOLATILE)
