"""The checkout builds with colcon, the standard ROS 2 build tool, and runs from its install space.

A copy of the checkout is built in a temporary colcon workspace with the pinned colcon packages
of requirements.txt (colcon-core, colcon-ros, colcon-python-setup-py, ros-ament-package). The
install space is then used as a robot would use it: `install/setup.sh` sourced, the package found
through the ament index, the planner node started from `lib/riskbound` on a live graph.
"""

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import rclpy
from rclpy.parameter_client import AsyncParameterClient

from node_helpers import stop_process_group, wait_for

REPO = Path(__file__).resolve().parents[1]
PACKAGE = "riskbound"
# What the build does not need: version control, environments, earlier build output, tests.
NOT_COPIED = shutil.ignore_patterns(".git", ".venv", "out", "build", "install", "log", "test", "__pycache__",
                                    "*.egg-info", ".pytest_cache")


def node_executables():
    """Every node of the package: the modules riskbound/ros/*_node.py that define main()."""
    names = []
    for module in sorted((REPO / "src" / PACKAGE / "ros").glob("*_node.py")):
        if re.search(r"^def main\(", module.read_text(), re.MULTILINE):
            names.append(module.stem)
    return names


def environment_of(setup_script):
    """The environment a shell has after sourcing a colcon setup script (on top of ours)."""
    dump = subprocess.run(["sh", "-c", f'. "{setup_script}" && env -0'], capture_output=True, check=True,
                          timeout=60, env=os.environ.copy()).stdout
    return dict(item.split("=", 1) for item in dump.decode().split("\0") if "=" in item)


@pytest.fixture(scope="module")
def install_space(tmp_path_factory):
    workspace = tmp_path_factory.mktemp("colcon_ws")
    shutil.copytree(REPO, workspace / "src" / PACKAGE, ignore=NOT_COPIED)
    colcon = Path(sys.executable).parent / "colcon"
    assert colcon.exists(), f"{colcon} is missing: colcon-core is pinned in requirements.txt (make install)"
    done = subprocess.run([str(colcon), "build"], cwd=workspace, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, f"colcon build failed:\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}"
    return workspace / "install"


@pytest.fixture(scope="module")
def installed_env(install_space):
    env = environment_of(install_space / "setup.sh")
    # Every child that opens a ROS context stays on this machine, in this run's domain (conftest).
    env["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
    env["ROS_DOMAIN_ID"] = os.environ["ROS_DOMAIN_ID"]
    return env


def run_python(env, code):
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True,
                          timeout=60).stdout.strip()


def test_the_ament_index_finds_the_package_in_the_install_space(install_space, installed_env):
    found = run_python(installed_env, "from ament_index_python.packages import get_package_prefix, "
                       "get_package_share_directory as share; "
                       f"print(get_package_prefix('{PACKAGE}')); print(share('{PACKAGE}'))").splitlines()
    assert found == [str(install_space / PACKAGE), str(install_space / PACKAGE / "share" / PACKAGE)]
    imported = run_python(installed_env, f"import {PACKAGE}; print({PACKAGE}.__file__)")
    assert Path(imported).is_relative_to(install_space), f"{PACKAGE} was imported from {imported}"


def test_every_launch_file_config_and_package_manifest_is_installed(install_space):
    share = install_space / PACKAGE / "share" / PACKAGE
    for folder, pattern in (("launch", "*.launch.xml"), ("config", "*.yaml")):
        expected = sorted(p.name for p in (REPO / folder).glob(pattern))
        assert expected, f"no {pattern} in {folder}/"
        assert sorted(p.name for p in (share / folder).iterdir()) == expected
    assert (share / "package.xml").read_bytes() == (REPO / "package.xml").read_bytes()


def test_every_node_executable_is_in_lib_and_every_launched_one_exists(install_space):
    lib = install_space / PACKAGE / "lib" / PACKAGE
    nodes = node_executables()
    assert "planner_node" in nodes and "watchdog_node" in nodes and "tracker_node" in nodes
    for name in nodes + [PACKAGE]:
        assert os.access(lib / name, os.X_OK), f"{lib / name} is missing or not executable"
    launched = set()
    for launch_file in (REPO / "launch").glob("*.launch.xml"):
        launched |= set(re.findall(r'pkg="riskbound"\s+exec="([^"]+)"', launch_file.read_text()))
    assert launched and launched <= set(nodes)


def test_the_installed_planner_answers_a_parameter_read(install_space, installed_env, tmp_path):
    executable = install_space / PACKAGE / "lib" / PACKAGE / "planner_node"
    log_path = tmp_path / "planner.log"
    rclpy.init()
    node = None
    with open(log_path, "w") as log:
        process = subprocess.Popen([str(executable), "--ros-args", "-r", "__node:=installed_planner",
                                    "-p", "risk_level:=0.03"],
                                   stdout=log, stderr=subprocess.STDOUT, env=installed_env, start_new_session=True)
    try:
        node = rclpy.create_node("colcon_test_reader")
        client = AsyncParameterClient(node, "/installed_planner")

        def service_up():
            rclpy.spin_once(node, timeout_sec=0.1)
            assert process.poll() is None, f"the planner ended early:\n{log_path.read_text()[-2000:]}"
            return client.services_are_ready()

        wait_for(service_up, 60.0, "the installed planner's parameter services")
        future = client.get_parameters(["risk_level", "horizon_steps"])
        rclpy.spin_until_future_complete(node, future, timeout_sec=10.0)
        assert future.done(), "no answer to the parameter read within 10 s"
        risk_level, horizon_steps = future.result().values
        assert risk_level.double_value == pytest.approx(0.03)
        assert horizon_steps.integer_value == 20
    finally:
        stop_process_group(process)
        if node is not None:
            node.destroy_node()
        rclpy.try_shutdown()
    assert process.returncode is not None
