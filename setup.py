"""ament_python package `riskbound` (src layout). Builds with colcon on a full ROS 2 install and
installs with pip into a plain virtual environment (see README)."""

from glob import glob

from setuptools import find_packages, setup

PACKAGE = "riskbound"

setup(
    name=PACKAGE,
    version="0.1.0",
    package_dir={"": "src"},
    packages=find_packages("src"),
    data_files=[
        ("share/ament_index/resource_index/packages", ["resource/" + PACKAGE]),
        ("share/" + PACKAGE, ["package.xml"]),
        ("share/" + PACKAGE + "/launch", glob("launch/*.launch.xml")),
        ("share/" + PACKAGE + "/config", glob("config/*.yaml")),
    ],
    # ROS 2 packages (rclpy, message packages) come from the ROS install or, standalone, from
    # requirements.txt; only plain Python libraries are declared here so colcon builds stay clean.
    install_requires=["numpy", "scipy", "casadi", "filterpy", "transforms3d", "rosbags", "matplotlib", "PyYAML"],
    zip_safe=True,
    maintainer="riskbound developers",
    maintainer_email="riskbound@example.org",
    description="Risk-bounded local motion planning among moving people: tracker, chance-constrained MPC, watchdog.",
    license="Apache-2.0",
    python_requires=">=3.10",
    entry_points={
        "console_scripts": [
            "riskbound = riskbound.cli:main",
            "planner_node = riskbound.ros.planner_node:main",
            "watchdog_node = riskbound.ros.watchdog_node:main",
            "sim_robot_node = riskbound.ros.sim_robot_node:main",
            "tracker_node = riskbound.ros.tracker_node:main",
            "replay_node = riskbound.ros.replay_node:main",
            "recorder_node = riskbound.ros.recorder_node:main",
            "goal_node = riskbound.ros.goal_node:main",
        ],
    },
)
