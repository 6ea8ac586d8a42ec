"""Test-wide safety: DDS discovery stays on this machine and every run gets its own domain id.

Set at import time, before any test imports rclpy, so pytest run by hand is as safe as `make test`.
Child processes started by tests inherit both variables.
"""

import os
import random

os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
os.environ.setdefault("ROS_DOMAIN_ID", str(random.randint(1, 101)))
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


import pytest  # noqa: E402


@pytest.fixture(autouse=True, scope="session")
def localhost_dds():
    """Refuse to run if something in the session widened DDS discovery beyond this machine."""
    assert os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] == "LOCALHOST"
    yield os.environ["ROS_DOMAIN_ID"]
