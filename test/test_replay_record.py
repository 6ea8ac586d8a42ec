"""Replay and recorder nodes: what a bag holds goes out on time and comes back into a new bag.

References (common practice of rosbag2 players and recorders, no numbered source): a player
publishes each stored message at its log time scaled by the speed factor, unchanged; a recorder
stores the serialised bytes it receives with the reception time as log time; the stored offered
QoS is what a player republishes with. Playback arithmetic is checked against the closed forms
in riskbound.logs.playback's docstring.
"""

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from rosbags.interfaces import QosDurability, QosReliability

from riskbound.logs import bag_io
from riskbound.logs.bag_io import BagWriter, clock_cdr, pose_array_cdr
from riskbound.logs.playback import BagPlayback, ClockTicks, PassTimeline, ReplaySettings
from riskbound.logs.recording import RawBagRecorder

START_NS = 50_000_000_000
FRAME_PERIOD_NS = 100_000_000
FRAMES = 20
# Latency of DDS delivery and of the recorder's clock (updated by /clock at 100 Hz) on a loaded
# 2-core machine: typical, and the worst single message (seen up to 0.16 s for the first messages
# while connections settle). Playing the 2 s bag without timing would put messages up to 1.9 s off.
LOG_TIME_TOLERANCE_S = 0.03
LOG_TIME_WORST_S = 0.3


def positions_at(k):
    return np.array([[1.0 + 0.1 * k, 2.0], [3.0, -1.0 - 0.05 * k]])


@pytest.fixture(scope="module")
def small_bag(tmp_path_factory):
    """2 s of /detections (best effort) and /crowd_truth (reliable) at 10 Hz, /clock at 100 Hz."""
    path = tmp_path_factory.mktemp("bags") / "small"
    topics = {t: bag_io.CROWD_TOPICS[t] for t in (bag_io.TOPIC_DETECTIONS, bag_io.TOPIC_TRUTH, bag_io.TOPIC_CLOCK)}
    with BagWriter(path, topics, custom_data={"walker_radius_m": 0.25}) as writer:
        for k in range(FRAMES):
            time_ns = START_NS + k * FRAME_PERIOD_NS
            for tick in range(10):
                writer.write(bag_io.TOPIC_CLOCK, time_ns + tick * 10_000_000, clock_cdr(time_ns + tick * 10_000_000))
            writer.write(bag_io.TOPIC_DETECTIONS, time_ns, pose_array_cdr(time_ns, "odom", positions_at(k), [0.1, 0.2]))
            # Shifted by 30 ms so that the order between the two topics is part of what is checked.
            writer.write(bag_io.TOPIC_TRUTH, time_ns + 30_000_000,
                         pose_array_cdr(time_ns + 30_000_000, "odom", positions_at(k), [0.0, 0.5]))
    return path


# --- playback arithmetic, no ROS --------------------------------------------------------------------

def test_window_topics_and_clock_exclusion(small_bag):
    playback = BagPlayback(ReplaySettings(bag=str(small_bag), skip_first_s=0.5, window_s=1.0))
    assert set(playback.topics) == {bag_io.TOPIC_DETECTIONS, bag_io.TOPIC_TRUTH}  # own /clock replaces the bag's
    messages = list(playback.messages())
    times = [t for t, _, _ in messages]
    assert times == sorted(times)
    assert times[0] == START_NS + 500_000_000 and times[-1] <= START_NS + 1_500_000_000
    assert sum(1 for _, topic, _ in messages if topic == bag_io.TOPIC_DETECTIONS) == 11  # frames 5..15
    assert playback.topics[bag_io.TOPIC_DETECTIONS].qos.reliability == QosReliability.BEST_EFFORT
    assert playback.pass_length_s == pytest.approx(1.0)
    with_clock = BagPlayback(ReplaySettings(bag=str(small_bag), drive_sim_time=False, only_topics=[bag_io.TOPIC_CLOCK]))
    assert list(with_clock.topics) == [bag_io.TOPIC_CLOCK] and len(list(with_clock.messages())) == 10 * FRAMES


def test_timeline_scales_by_the_speed_and_ticks_do_not_burst():
    timeline = PassTimeline(window_start_ns=START_NS, speed=2.0, start_wall_s=100.0)
    assert timeline.due_wall_s(START_NS + 3_000_000_000) == pytest.approx(101.5)
    assert timeline.bag_time_ns(101.5) == START_NS + 3_000_000_000
    assert timeline.bag_time_ns(99.0) == START_NS  # before the pass started: the window start
    ticks = ClockTicks(100.0, start_wall_s=0.0)
    ticks.advance(0.0)
    assert ticks.next_s == pytest.approx(0.01)
    ticks.advance(5.0)  # five seconds late: the next tick is now, not 500 ticks in a row
    assert ticks.next_s == pytest.approx(5.0)


@pytest.mark.parametrize("changes, words", [
    ({"bag": ""}, "bag='' is not allowed"),
    ({"speed": 0.0}, "speed=0.0 is out of range: must be in (0.0, 100.0]"),
    ({"sim_time_hz": 0.5}, "sim_time_hz=0.5 is out of range"),
    ({"only_topics": ["/detections", ""]}, "must be a list of non-empty topic names"),
])
def test_invalid_settings_name_the_parameter(changes, words):
    with pytest.raises(ValueError, match=words.replace("(", r"\(").replace("[", r"\[").replace("]", r"\]")):
        ReplaySettings(**{"bag": "x", **changes})


def test_unknown_topic_and_offset_beyond_the_end_are_refused(small_bag):
    with pytest.raises(ValueError, match=r"/odom not in .* \(it has /clock, /crowd_truth, /detections\)"):
        BagPlayback(ReplaySettings(bag=str(small_bag), only_topics=["/odom"]))
    with pytest.raises(ValueError, match="skip_first_s=5.0 is out of range: the bag lasts 1.990 s"):
        BagPlayback(ReplaySettings(bag=str(small_bag), skip_first_s=5.0))


def test_recorder_core_refuses_unknown_types_and_wrong_hashes(tmp_path):
    recorder = RawBagRecorder(tmp_path / "bag")
    with pytest.raises(ValueError, match="no definition in the Kilted type store"):
        recorder.add_topic("/x", "no_pkg/msg/Nothing")
    with pytest.raises(ValueError, match="live type hash RIHS01_00 .* differs"):
        recorder.add_topic("/y", "std_msgs/msg/String", type_hash="RIHS01_00")
    recorder.close()
    with pytest.raises(ValueError, match="already exists"):
        RawBagRecorder(tmp_path / "bag")


# --- replay → record on a live graph -------------------------------------------------------------------

def start_node(module, log_path, *ros_args):
    with open(log_path, "w") as log:
        return subprocess.Popen([sys.executable, "-m", f"riskbound.ros.{module}", "--ros-args", *ros_args],
                                stdout=log, stderr=subprocess.STDOUT, start_new_session=True)


def stop(process, signum=signal.SIGINT, timeout_s=20.0):
    if process.poll() is None:
        os.killpg(process.pid, signum)
        try:
            process.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(timeout=10)
    return process.returncode


def record_replay(small_bag, out, speed, use_sim_time, stop_signal):
    """Record while replaying small_bag; returns (recorder exit code, replay exit code, logs)."""
    topics = "[/detections, /crowd_truth]"
    recorder = start_node("recorder_node", out.with_suffix(".recorder.log"), "-p", f"bag_dir:={out}",
                          "-p", f"only_topics:={topics}", "-p", f"use_sim_time:={'true' if use_sim_time else 'false'}",
                          "-p", "discovery_period_s:=0.1")
    replay = None
    try:
        replay = start_node("replay_node", out.with_suffix(".replay.log"), "-p", f"bag:={small_bag}",
                            "-p", f"speed:={speed}", "-p", f"await_listeners:={topics}", "-p", "pause_before_s:=1.0",
                            "-p", "await_timeout_s:=30.0")
        replay_code = replay.wait(timeout=60)
        time.sleep(0.5)  # the last messages are on their way to the recorder
    finally:
        if replay is not None:
            stop(replay)
        recorder_code = stop(recorder, stop_signal)
    logs = out.with_suffix(".recorder.log").read_text() + out.with_suffix(".replay.log").read_text()
    return recorder_code, replay_code, logs


def test_replayed_and_recorded_bag_has_the_same_messages_order_and_times(small_bag, tmp_path):
    out = tmp_path / "recorded"
    recorder_code, replay_code, logs = record_replay(small_bag, out, 1.0, True, signal.SIGTERM)
    assert (recorder_code, replay_code) == (0, 0), logs
    wanted = (bag_io.TOPIC_DETECTIONS, bag_io.TOPIC_TRUTH)
    original = {topic: [(t, bytes(d)) for top, _, t, d in bag_io.read_raw(small_bag, [topic])] for topic in wanted}
    recorded = {topic: [(t, bytes(d)) for top, _, t, d in bag_io.read_raw(out, [topic])] for topic in wanted}
    # Per topic: the same bytes in the same order. Across topics a recorder keeps the order of
    # reception, which DDS does not tie to the order of publication; the log times below bound it.
    for topic in wanted:
        assert [d for _, d in recorded[topic]] == [d for _, d in original[topic]], topic
    # Simulated time: the recorder's clock is the replay's /clock, so log times are the bag's.
    offsets_s = np.array([r[0] - o[0] for topic in wanted for r, o in zip(recorded[topic], original[topic])]) * 1e-9
    print(f"recorded − original log time: median {np.median(offsets_s) * 1e3:.1f} ms, "
          f"largest {np.max(np.abs(offsets_s)) * 1e3:.1f} ms over {len(offsets_s)} messages")
    assert np.median(np.abs(offsets_s)) <= LOG_TIME_TOLERANCE_S, offsets_s
    assert np.max(np.abs(offsets_s)) <= LOG_TIME_WORST_S, offsets_s
    info = bag_io.bag_topics(out)
    assert info == {bag_io.TOPIC_DETECTIONS: ("geometry_msgs/msg/PoseArray", FRAMES),
                    bag_io.TOPIC_TRUTH: ("geometry_msgs/msg/PoseArray", FRAMES)}
    # The replay offered each topic's stored QoS; the recorder stored what was offered.
    with bag_io.open_bag(out) as reader:
        offered = {c.topic: c.ext.offered_qos_profiles[0] for c in reader.connections}
    assert offered[bag_io.TOPIC_DETECTIONS].reliability == QosReliability.BEST_EFFORT
    assert offered[bag_io.TOPIC_TRUTH].reliability == QosReliability.RELIABLE
    assert offered[bag_io.TOPIC_TRUTH].durability == QosDurability.VOLATILE


def test_speed_factor_on_wall_time_and_sigint_closes_the_bag(small_bag, tmp_path):
    out = tmp_path / "fast"
    recorder_code, replay_code, logs = record_replay(small_bag, out, 2.0, False, signal.SIGINT)
    assert (recorder_code, replay_code) == (0, 0), logs
    times = np.array([t for topic, _, t, _ in bag_io.read_raw(out, [bag_io.TOPIC_DETECTIONS])]) * 1e-9
    assert len(times) == FRAMES
    # Wall-time log times: five frame periods of 0.1 s played at twice the speed take 0.25 s. The
    # median over all five-frame spans is robust to one late delivery (a first message can be
    # delayed by 0.1 s while the connection settles on a loaded machine).
    assert np.median(times[5:] - times[:-5]) == pytest.approx(0.25, abs=0.03)
    assert times[-1] - times[0] == pytest.approx(0.95, abs=0.2)


def test_unreadable_bag_ends_the_replay_with_a_reason(tmp_path):
    broken = tmp_path / "broken"
    broken.mkdir()
    (broken / "metadata.yaml").write_text("rosbag2_bagfile_information: {version: 9}\n")
    (broken / "broken.mcap").write_bytes(b"\x89MCAP0\r\n" + b"\x00" * 64)
    replay = start_node("replay_node", tmp_path / "replay.log", "-p", f"bag:={broken}")
    try:
        assert replay.wait(timeout=30) == 1
    finally:
        stop(replay)
    text = (tmp_path / "replay.log").read_text()
    assert f"invalid configuration: {broken}: not a readable rosbag2 bag" in text, text
    assert "Traceback" not in text
