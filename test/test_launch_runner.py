"""`riskbound launch`: the XML subset, and real node processes started, configured and stopped.

Reference for the file format (element and attribute names, substitutions, argument precedence,
`on_exit="shutdown"`, `--ros-args -r __node:= -r __ns:= --params-file -p -r`): the ROS 2
documentation, "Launch file different formats" (XML tab) and "ROS 2 command line arguments"
(design article) — common practice of the ROS 2 tooling, no numbered source. Process checks use
/proc and os.kill(pid, 0) only.
"""

import os
import re
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from riskbound.launching.xml_description import LaunchDescription, LaunchFileError, package_share

REPO = Path(__file__).resolve().parents[1]
STARTED = re.compile(r"^runner\s+│ started '([^']+)' \(pid (\d+)\)")


def write(path, text):
    path.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
    return path


def alive(pid):
    """True while the process exists and is not a zombie (read from /proc)."""
    try:
        os.kill(pid, 0)
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (ProcessLookupError, FileNotFoundError):
        return False
    return state != "Z"


def cli(*args, timeout_s=60):
    return subprocess.run([sys.executable, "-m", "riskbound.cli", *args], capture_output=True, text=True,
                          timeout=timeout_s, cwd=REPO)


class Runner:
    """`riskbound launch ...` in the background, its output collected line by line."""

    def __init__(self, *args, log_dir):
        self.process = subprocess.Popen(
            [sys.executable, "-m", "riskbound.cli", "launch", *args, "--log-dir", str(log_dir),
             "--sigint-timeout-s", "10"], stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, cwd=REPO,
            start_new_session=True)
        self.lines = []
        self.pids = {}

    def read_until(self, predicate, timeout_s):
        """Read output lines until predicate(line) is true; the matching line, or None at EOF/timeout."""
        deadline = time.monotonic() + timeout_s
        os.set_blocking(self.process.stdout.fileno(), False)
        while time.monotonic() < deadline:
            line = self.process.stdout.readline()
            if not line:
                if self.process.poll() is not None:
                    return None
                time.sleep(0.05)
                continue
            self.lines.append(line.rstrip("\n"))
            match = STARTED.match(line)
            if match:
                self.pids[match.group(1)] = int(match.group(2))
            if predicate(line):
                return line
        return None

    def finish(self, timeout_s):
        """Wait for the runner to end; the rest of its output is appended to lines."""
        os.set_blocking(self.process.stdout.fileno(), True)
        rest, _ = self.process.communicate(timeout=timeout_s)
        self.lines += rest.splitlines()
        for line in rest.splitlines():
            match = STARTED.match(line)
            if match:
                self.pids[match.group(1)] = int(match.group(2))
        return self.process.returncode

    def kill(self):
        if self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGKILL)
            self.process.wait(timeout=10)
        for pid in self.pids.values():
            if alive(pid):
                os.killpg(pid, signal.SIGKILL)

    @property
    def text(self):
        return "\n".join(self.lines)


def wait_gone(pids, timeout_s):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and any(alive(pid) for pid in pids):
        time.sleep(0.1)
    return [pid for pid in pids if alive(pid)]


# --- the XML subset, without processes ----------------------------------------------------------------

def test_arguments_substitutions_include_and_namespaces(tmp_path, monkeypatch):
    monkeypatch.setenv("RISKBOUND_TEST_FRAME", "map")
    params = write(tmp_path / "robot.yaml", "sim_robot:\n  ros__parameters:\n    rate_hz: 25.0\n")
    write(tmp_path / "inner.launch.xml", """
        <launch>
          <arg name="speed" default="1.0"/>
          <arg name="frame" default="odom"/>
          <node pkg="riskbound" exec="goal_node" name="goal_$(var tag)" namespace="inner">
            <param name="x" value="$(var speed)"/>
            <param name="frame_id" value="$(var frame)"/>
          </node>
        </launch>
        """)
    top = write(tmp_path / "top.launch.xml", """
        <launch>
          <arg name="params_file" default="$(dirname)/robot.yaml"/>
          <arg name="robot" default="r1" description="robot namespace"/>
          <arg name="with_goal" default="true"/>
          <let name="tag" value="$(var robot)_a"/>
          <!-- a comment between elements -->
          <group>
            <push-ros-namespace namespace="$(var robot)"/>
            <node pkg="riskbound" exec="sim_robot_node" name="sim_robot" output="screen" on_exit="shutdown"
                  args="--extra">
              <param from="$(var params_file)"/>
              <param name="initial_x" value="2.5"/>
              <param name="frame_id" value="$(env RISKBOUND_TEST_FRAME odom)"/>
              <remap from="cmd_vel" to="/$(var robot)/safe_cmd_vel"/>
              <env name="RISKBOUND_TEST_MARK" value="1"/>
            </node>
            <include file="inner.launch.xml" if="$(var with_goal)">
              <arg name="speed" value="0.5"/>
            </include>
          </group>
          <node pkg="riskbound" exec="goal_node" name="skipped" unless="$(var with_goal)"/>
          <node pkg="riskbound" exec="recorder_node" name="recorder" namespace="/abs">
            <param name="bag_dir" value=""/>
          </node>
        </launch>
        """)
    description = LaunchDescription(top, {"robot": "r2", "frame": "base"})
    sim, goal, recorder = description.nodes
    assert (sim.name, sim.namespace, sim.output, sim.on_exit_shutdown) == ("sim_robot", "/r2", "screen", True)
    assert sim.ros_arguments() == ["--ros-args", "-r", "__node:=sim_robot", "-r", "__ns:=/r2", "--params-file",
                                   str(params), "-p", "initial_x:=2.5", "-p", "frame_id:=map",
                                   "-r", "cmd_vel:=/r2/safe_cmd_vel"]
    assert sim.arguments == ["--extra"] and sim.environment == {"RISKBOUND_TEST_MARK": "1"}
    # The include's own argument value wins over its default; the including scope's variables
    # (tag, and frame given on the command line) are seen inside it; namespaces nest.
    assert (goal.name, goal.namespace, goal.output, goal.on_exit_shutdown) == ("goal_r2_a", "/r2/inner", "log", False)
    assert goal.parameters == [("value", "x", "0.5"), ("value", "frame_id", "base")]
    # An empty value is passed as YAML's empty string: rcl refuses `name:=` with nothing after it.
    assert recorder.namespace == "/abs" and recorder.ros_arguments()[-2:] == ["-p", "bag_dir:=''"]
    assert [n.name for n in LaunchDescription(top, {"with_goal": "false"}).nodes] == ["sim_robot", "skipped",
                                                                                        "recorder"]


@pytest.mark.parametrize("body, arguments, words", [
    ('<arg name="bag"/>', {}, "argument 'bag' is required"),
    ('<arg name="bag" default="x"/>', {"bags": "y"}, "no argument named bags"),
    ('<executable cmd="ls"/>', {}, "<executable>: element not supported"),
    ('<node pkg="riskbound" exec="goal_node" respawn="true"/>', {}, "attribute respawn not supported"),
    ('<node pkg="riskbound" exec="goal_node" name="$(var missing)"/>', {}, "$(var missing) is not defined"),
    ('<node pkg="riskbound" exec="goal_node" name="$(anon x)"/>', {}, "$(anon x) is not supported"),
    ('<node pkg="riskbound" exec="goal_node"><param from="no_such.yaml"/></node>', {}, "does not exist"),
    ('<node pkg="riskbound" exec="goal_node" output="loud"/>', {}, "output='loud' is not supported"),
    ('<group if="maybe"/>', {}, "'maybe' is not a boolean"),
])
def test_unsupported_or_wrong_files_are_refused_with_a_reason(tmp_path, body, arguments, words):
    path = write(tmp_path / "bad.launch.xml", f"<launch>{body}</launch>")
    with pytest.raises(LaunchFileError, match=re.escape(words)):
        LaunchDescription(path, arguments)


def test_command_line_errors_exit_2_before_anything_starts(tmp_path):
    done = cli("launch", "crowd_replay.launch.xml")
    assert done.returncode == 2 and "argument 'bag' is required: give bag:=VALUE" in done.stderr
    missing = write(tmp_path / "missing.launch.xml",
                    '<launch><node pkg="riskbound" exec="no_such_node" name="x"/></launch>')
    done = cli("launch", str(missing))
    assert done.returncode == 2 and "executable not found" in done.stderr
    assert "riskbound.ros.no_such_node" in done.stderr
    done = cli("launch", "stack.launch.xml", "params_file=/tmp/x.yaml")
    assert done.returncode == 2 and "not of the form name:=value" in done.stderr


def test_package_files_resolve_and_print_their_commands():
    """The package's own launch files parse in the standalone install; find-pkg-share finds the tree."""
    assert (package_share("riskbound") / "launch" / "stack.launch.xml").is_file()
    done = cli("launch", "crowd_replay.launch.xml", "bag:=test/data/crowd_courtyard_40", "speed:=0.5", "--dry-run")
    assert done.returncode == 0, done.stderr
    commands = dict(line.split(": ", 1) for line in done.stdout.splitlines())
    assert set(commands) == {"tracker", "planner", "watchdog", "sim_robot", "goal_publisher", "recorder", "replay"}
    assert f"--params-file {REPO / 'config' / 'drone.yaml'}" in commands["planner"]
    assert "-p use_sim_time:=true" in commands["planner"] and "-m riskbound.ros.planner_node" in commands["planner"]
    assert "-p speed:=0.5" in commands["replay"]
    shown = cli("launch", "stack.launch.xml", "--arguments")
    assert shown.returncode == 0
    assert "params_file (default: '$(find-pkg-share riskbound)/config/drone.yaml')" in shown.stdout


# --- real processes -------------------------------------------------------------------------------------

def test_arguments_and_parameter_files_reach_the_nodes_and_ctrl_c_stops_all(tmp_path):
    # A key without namespace would mean /sim_robot only; /**/ matches the node in any namespace.
    params = write(tmp_path / "robot.yaml", """
        /**/sim_robot:
          ros__parameters:
            max_accel_mps2: 2.25
            command_timeout_s: 0.75
        """)
    launch = write(tmp_path / "two.launch.xml", """
        <launch>
          <arg name="params_file"/>
          <arg name="start_x" default="0.0"/>
          <node pkg="riskbound" exec="sim_robot_node" name="sim_robot" namespace="lr_test">
            <param from="$(var params_file)"/>
            <param name="initial_x" value="$(var start_x)"/>
          </node>
          <node pkg="riskbound" exec="goal_node" name="goal_lr_test" output="screen">
            <param name="x" value="4.5"/>
          </node>
        </launch>
        """)
    runner = Runner(str(launch), f"params_file:={params}", "start_x:=3.25", log_dir=tmp_path / "logs")
    try:
        assert runner.read_until(lambda line: "goal (4.5, 0.0)" in line, 60.0), runner.text
        node = "/lr_test/sim_robot"
        values = [cli("tune", node, name, "--timeout-s", "20").stdout.strip()
                  for name in ("max_accel_mps2", "command_timeout_s", "initial_x", "rate_hz")]
        assert values == ["2.25", "0.75", "3.25", "50.0"]  # file, file, launch argument, node default
        assert set(runner.pids) == {"sim_robot", "goal_lr_test"}
        # output="screen" is echoed after the node's name, padded to the longest name, and a bar.
        assert re.search(r"^goal_lr_test │ \[INFO\]", runner.text, re.MULTILINE), runner.text
        os.killpg(runner.process.pid, signal.SIGINT)
        code = runner.finish(30.0)
        assert code == 0, runner.text
        assert "SIGINT received: stopping all nodes" in runner.text
        assert wait_gone(runner.pids.values(), 5.0) == []
        assert (tmp_path / "logs" / "sim_robot.log").is_file()
    finally:
        runner.kill()


def test_a_failing_node_stops_the_launch_with_its_reason(tmp_path):
    launch = write(tmp_path / "fail.launch.xml", """
        <launch>
          <node pkg="riskbound" exec="goal_node" name="healthy"/>
          <node pkg="riskbound" exec="sim_robot_node" name="broken">
            <param name="rate_hz" value="0.5"/>
          </node>
        </launch>
        """)
    runner = Runner(str(launch), log_dir=tmp_path / "logs")
    try:
        code = runner.finish(90.0)
        assert code == 1, runner.text
        assert re.search(r"ERROR: node 'broken' exited with code 1 (while starting|after)", runner.text), runner.text
        # Its own reason is shown (output="log" is not echoed otherwise): rclpy's range check on the
        # declared descriptor names the parameter and its range.
        assert "rate_hz out of range Min: 1.0, Max: 1000.0, value: 0.5" in runner.text, runner.text
        assert set(runner.pids) == {"healthy", "broken"}
        assert wait_gone(runner.pids.values(), 5.0) == []
    finally:
        runner.kill()


def test_on_exit_shutdown_ends_the_launch_and_a_killed_runner_leaves_no_node(tmp_path):
    """A node with on_exit="shutdown" ending ends the launch (exit 0); a runner killed outright
    (SIGKILL, no clean-up) still leaves no node behind: the kernel sends each its parent-death signal."""
    launch = write(tmp_path / "short.launch.xml", """
        <launch>
          <arg name="end" default="true"/>
          <node pkg="riskbound" exec="sim_robot_node" name="sim_robot_a"/>
          <node pkg="riskbound" exec="goal_node" name="goal_a" on_exit="shutdown">
            <param name="exit_on_arrival" value="$(var end)"/>
            <param name="linger_s" value="0.0"/>
          </node>
        </launch>
        """)
    # The simulated robot sits at the origin, which is the default goal: arrival at once.
    runner = Runner(str(launch), log_dir=tmp_path / "logs_a")
    try:
        assert runner.finish(90.0) == 0, runner.text
        assert "'goal_a' has on_exit=\"shutdown\": stopping the launch" in runner.text
        assert wait_gone(runner.pids.values(), 5.0) == []
    finally:
        runner.kill()

    runner = Runner(str(launch), "end:=false", log_dir=tmp_path / "logs_b")
    try:
        assert runner.read_until(lambda line: "started 'goal_a'" in line, 60.0), runner.text
        pids = dict(runner.pids)
        time.sleep(1.0)
        assert all(alive(pid) for pid in pids.values())
        os.killpg(runner.process.pid, signal.SIGKILL)
        runner.process.wait(timeout=10)
        assert wait_gone(pids.values(), 15.0) == [], f"left running: {pids}"
    finally:
        runner.kill()
