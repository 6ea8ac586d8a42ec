"""`riskbound param`: value parsing, and the command against a small node in a real ROS graph.

The target node here is a stand-in with three declared parameters (so this file does not depend
on the planner); the planner's own parameters are exercised in test_planner_node.py.
"""

import subprocess
import sys
import threading
import time

import pytest
import rclpy
from rcl_interfaces.msg import FloatingPointRange, IntegerRange, ParameterDescriptor, ParameterType
from rclpy.executors import SingleThreadedExecutor

from riskbound.ros.param_client import parse_value

NODE = "param_client_target"


def run_cli(*args, timeout_s=30):
    return subprocess.run([sys.executable, "-m", "riskbound.cli", "param", *args], capture_output=True,
                          text=True, timeout=timeout_s)


@pytest.mark.parametrize("text, current_type, expected", [
    ("0.02", ParameterType.PARAMETER_DOUBLE, 0.02),
    ("1", ParameterType.PARAMETER_DOUBLE, 1.0),  # an integer typed for a double parameter
    ("1", ParameterType.PARAMETER_INTEGER, 1),
    ("1e-3", ParameterType.PARAMETER_DOUBLE, 0.001),  # YAML 1.1 alone would read a string
    ("true", ParameterType.PARAMETER_BOOL, True),
    ("joint", ParameterType.PARAMETER_STRING, "joint"),
    ("123", ParameterType.PARAMETER_STRING, "123"),  # a frame or name that looks like a number
    ("true", ParameterType.PARAMETER_STRING, "true"),
    ("2.5", None, 2.5),
    ("off", None, False),  # YAML 1.1 booleans, as yaml.safe_load reads them
])
def test_parse_value(text, current_type, expected):
    value = parse_value(text, current_type)
    assert value == expected and type(value) is type(expected)


def test_module_imports_without_rclpy():
    """`riskbound --help` must work where ROS is not installed: rclpy is imported only in run()."""
    code = "import sys, riskbound.ros.param_client; assert 'rclpy' not in sys.modules"
    assert subprocess.run([sys.executable, "-c", code], timeout=30).returncode == 0


@pytest.fixture(scope="module")
def target():
    rclpy.init()
    node = rclpy.create_node(NODE)
    node.declare_parameter("gain", 0.5, ParameterDescriptor(
        description="a gain", floating_point_range=[FloatingPointRange(from_value=0.0, to_value=1.0)]))
    node.declare_parameter("count", 3, ParameterDescriptor(
        description="a count", integer_range=[IntegerRange(from_value=1, to_value=10, step=1)]))
    node.declare_parameter("frame", "odom", ParameterDescriptor(description="a frame", read_only=True))
    executor = SingleThreadedExecutor()
    executor.add_node(node)
    thread = threading.Thread(target=executor.spin, daemon=True)
    thread.start()
    try:
        yield node
    finally:
        executor.shutdown(timeout_sec=2.0)
        node.destroy_node()
        rclpy.try_shutdown()


def test_get_and_list(target):
    done = run_cli("get", NODE, "gain")
    assert (done.returncode, done.stdout.strip()) == (0, "0.5"), done.stderr
    listed = run_cli("list", "/" + NODE)
    assert listed.returncode == 0, listed.stderr
    lines = {line.split()[0]: line for line in listed.stdout.splitlines()}
    assert "0.5" in lines["gain"] and "a gain" in lines["gain"]
    assert "odom" in lines["frame"] and "read-only" in lines["frame"]
    assert lines["count"].split()[1] == "3"


def test_set_coerces_an_integer_for_a_double(target):
    done = run_cli("set", NODE, "gain", "1")
    assert done.returncode == 0, done.stderr
    value = target.get_parameter("gain").value
    assert value == 1.0 and isinstance(value, float)


def test_rejections_print_a_reason_and_exit_1(target):
    out_of_range = run_cli("set", NODE, "count", "11")
    assert out_of_range.returncode == 1 and "count" in out_of_range.stderr and "10" in out_of_range.stderr
    wrong_type = run_cli("set", NODE, "count", "2.5")
    assert wrong_type.returncode == 1
    assert "count is an integer parameter, '2.5' is a double" in wrong_type.stderr
    read_only = run_cli("set", NODE, "frame", "map")
    assert read_only.returncode == 1 and "read-only" in read_only.stderr
    unknown = run_cli("get", NODE, "no_such_parameter")
    assert unknown.returncode == 1 and "no parameter 'no_such_parameter'" in unknown.stderr
    assert target.get_parameter("count").value == 3


def test_unavailable_node_exits_2_within_the_timeout():
    started = time.monotonic()
    done = run_cli("get", "no_such_node", "gain", "--timeout-s", "1")
    assert done.returncode == 2
    assert "/no_such_node: parameter services not available within 1 s" in done.stderr
    assert time.monotonic() - started < 20.0
