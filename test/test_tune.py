"""`riskbound tune`: reading values against the setting's type, and the command against a small
node in a real ROS graph.

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

from riskbound.ros.tune import Rejected, value_from_text

NODE = "tune_target"


def run_cli(*args, timeout_s=30):
    return subprocess.run([sys.executable, "-m", "riskbound.cli", "tune", *args], capture_output=True,
                          text=True, timeout=timeout_s)


# The expected values follow the rules in riskbound.ros.tune's docstring (our own grammar).
@pytest.mark.parametrize("text, current_type, expected", [
    ("0.02", ParameterType.PARAMETER_DOUBLE, 0.02),
    ("1", ParameterType.PARAMETER_DOUBLE, 1.0),  # an integer typed for a double setting
    ("1e-3", ParameterType.PARAMETER_DOUBLE, 0.001),
    ("1", ParameterType.PARAMETER_INTEGER, 1),
    ("true", ParameterType.PARAMETER_BOOL, True),
    ("False", ParameterType.PARAMETER_BOOL, False),
    ("joint", ParameterType.PARAMETER_STRING, "joint"),
    ("123", ParameterType.PARAMETER_STRING, "123"),  # a frame or name that looks like a number
    ("true", ParameterType.PARAMETER_STRING, "true"),
    ("0.5,1,2.5", ParameterType.PARAMETER_DOUBLE_ARRAY, [0.5, 1.0, 2.5]),
    ("", ParameterType.PARAMETER_STRING_ARRAY, []),
])
def test_value_from_text(text, current_type, expected):
    value = value_from_text("x", text, current_type)
    assert value == expected and type(value) is type(expected)


@pytest.mark.parametrize("text, current_type, reason", [
    ("2.5", ParameterType.PARAMETER_INTEGER, "x is an integer setting, '2.5' is not an integer"),
    ("off", ParameterType.PARAMETER_BOOL, "x is a bool setting, 'off' is not true or false"),
    ("fast", ParameterType.PARAMETER_DOUBLE, "x is a double setting, 'fast' is not a number"),
    ("1,a", ParameterType.PARAMETER_INTEGER_ARRAY, "'a' is not an integer"),
])
def test_value_that_does_not_fit_the_type_is_rejected(text, current_type, reason):
    with pytest.raises(Rejected, match=reason):
        value_from_text("x", text, current_type)


def test_module_imports_without_rclpy():
    """`riskbound --help` must work where ROS is not installed: rclpy is imported only in run()."""
    code = "import sys, riskbound.ros.tune; assert 'rclpy' not in sys.modules"
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


def test_value_and_table(target):
    done = run_cli(NODE, "gain")
    assert (done.returncode, done.stdout.strip()) == (0, "0.5"), done.stderr
    both = run_cli(NODE, "gain", "count")
    assert both.returncode == 0 and both.stdout.split() == ["gain", "0.5", "count", "3"], both.stderr
    table = run_cli("/" + NODE)
    assert table.returncode == 0, table.stderr
    lines = {line.split()[0]: line for line in table.stdout.splitlines()}
    assert lines["setting"].split()[:4] == ["setting", "value", "range", "read-only"]
    assert lines["gain"].split()[:4] == ["gain", "0.5", "[0,", "1]"] and "a gain" in lines["gain"]
    assert "odom" in lines["frame"] and " yes " in lines["frame"]
    assert lines["count"].split()[1] == "3"


def test_apply_coerces_an_integer_for_a_double(target):
    done = run_cli(NODE, "gain=1")
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "gain = 1.0"
    value = target.get_parameter("gain").value
    assert value == 1.0 and isinstance(value, float)


def test_apply_in_order_and_stop_at_the_first_rejection(target):
    done = run_cli(NODE, "gain=0.25", "count=11", "gain=0.75")
    assert done.returncode == 1
    assert "count" in done.stderr and "10" in done.stderr and "not applied: gain" in done.stderr
    assert target.get_parameter("gain").value == 0.25 and target.get_parameter("count").value == 3


def test_rejections_print_a_reason_and_exit_1(target):
    wrong_type = run_cli(NODE, "count=2.5")
    assert wrong_type.returncode == 1
    assert "count is an integer setting, '2.5' is not an integer" in wrong_type.stderr
    read_only = run_cli(NODE, "frame=map")
    assert read_only.returncode == 1 and "read-only" in read_only.stderr
    unknown = run_cli(NODE, "no_such_setting")
    assert unknown.returncode == 1 and "no setting 'no_such_setting'" in unknown.stderr
    mixed = run_cli(NODE, "gain", "count=2")
    assert mixed.returncode == 1 and "not both" in mixed.stderr
    assert target.get_parameter("count").value == 3


def test_unavailable_node_exits_2_within_the_timeout():
    started = time.monotonic()
    done = run_cli("no_such_node", "gain", "--timeout-s", "1")
    assert done.returncode == 2
    assert "/no_such_node: parameter services not available within 1 s" in done.stderr
    assert time.monotonic() - started < 20.0
