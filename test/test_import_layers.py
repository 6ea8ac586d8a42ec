"""Imports follow the data (README and DEVELOPERS.md, "Imports follow the data"): lower layers do
not import the planner or the ROS shell, nothing outside the ROS shell imports it or rclpy, and the
neutral modules import no ROS package. Read from the source with `ast`, imports inside functions
included. Also: no module is over 450 lines, so that each holds one concept (DEVELOPERS.md,
"Imports follow the data").
"""

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "riskbound"
LOWER_LAYERS = ("risk", "motion", "tracking", "supervision")
# Longest module, in lines: our own limit (issue 15), no source.
MAX_MODULE_LINES = 450
ROS_PACKAGES = {"rclpy", "builtin_interfaces", "rcl_interfaces", "lifecycle_msgs", "std_msgs", "geometry_msgs",
                "nav_msgs", "sensor_msgs", "visualization_msgs", "diagnostic_msgs", "trajectory_msgs",
                "rosgraph_msgs"}


def imports_of(path):
    """Every module name imported by the file at `path` (absolute imports)."""
    names = set()
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            names |= {alias.name for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level == 0:
            names.add(node.module)
    return names


def modules(*folders):
    roots = [PACKAGE / folder for folder in folders] if folders else [PACKAGE]
    return sorted(path for root in roots for path in root.rglob("*.py"))


def offenders(paths, forbidden):
    """{file: forbidden imports} for the files importing something `forbidden(name)` is true of."""
    found = {}
    for path in paths:
        bad = sorted(name for name in imports_of(path) if forbidden(name))
        if bad:
            found[path.relative_to(PACKAGE).as_posix()] = bad
    return found


def test_lower_layers_import_neither_the_planner_nor_the_ros_shell():
    assert offenders(modules(*LOWER_LAYERS),
                     lambda name: name.startswith(("riskbound.planning", "riskbound.ros"))) == {}


def test_nothing_outside_the_ros_shell_imports_it_or_a_ros_package():
    outside = [p for p in modules() if p.relative_to(PACKAGE).parts[0] != "ros"]
    found = offenders(outside, lambda name: name.startswith("riskbound.ros") or name.split(".")[0] in ROS_PACKAGES)
    assert found == {}


@pytest.mark.parametrize("module", ["settings_table.py", "forecast_schema.py"])
def test_the_neutral_modules_import_only_plain_python(module):
    names = imports_of(PACKAGE / module)
    assert not [name for name in names if name.split(".")[0] in ROS_PACKAGES or name.startswith("riskbound.ros")]
    assert not [name for name in names if name.startswith("riskbound.planning")]


def test_no_module_is_over_the_line_limit():
    lengths = {path.relative_to(PACKAGE).as_posix(): len(path.read_text().splitlines()) for path in modules()}
    assert {name: lines for name, lines in lengths.items() if lines > MAX_MODULE_LINES} == {}


def test_the_check_sees_an_import_inside_a_function(tmp_path):
    (tmp_path / "late.py").write_text("def f():\n    from riskbound.ros.switch import run\n")
    assert imports_of(tmp_path / "late.py") == {"riskbound.ros.switch"}
