"""Helpers shared by the tests that run nodes as processes on a live graph."""

import os
import signal
import subprocess
import time


def wait_for(predicate, timeout_s, what):
    """Poll `predicate` every 50 ms until it returns something truthy (returned), or fail naming `what`."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        result = predicate()
        if result:
            return result
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


def stop_process_group(process, signum=signal.SIGTERM, timeout_s=10.0):
    """Send `signum` to the process group of a process started with start_new_session=True, then
    SIGKILL if it has not ended within timeout_s: nothing a test started survives it."""
    if process.poll() is not None:
        return
    os.killpg(process.pid, signum)
    try:
        process.wait(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        os.killpg(process.pid, signal.SIGKILL)
        process.wait(timeout=timeout_s)
