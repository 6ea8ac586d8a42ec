"""Fault injection on a real multi-process ROS graph (localhost DDS): simulated robot, planner, watchdog.

For each fault the robot's cmd_vel must become a stop within the staleness limit plus one control
period (issue 4's bound: the stale input is noticed at the first control cycle past its limit),
the watchdog must name the right cause, and normal commands must resume once the fault clears.
The bound is the watchdog's own arithmetic (WatchdogSettings.stop_bound_s); the latency is
measured from the injection to the stamp of the first stop command (see
riskbound.ros.fault_injection). Timing model: common practice, no source.
"""

import math
import time

import pytest
from rclpy.parameter import Parameter
from rclpy.parameter_client import AsyncParameterClient

from riskbound.ros.fault_injection import FAULTS, FaultGraph

# Faults that leave the graph running come first; killing the planner (and restarting it) last.
ORDER = ("nan_command", "solver_failure", "odom_stopped", "planner_hung", "planner_killed")


@pytest.fixture(scope="module")
def graph(tmp_path_factory):
    with FaultGraph(str(tmp_path_factory.mktemp("fault_graph")), startup_timeout_s=60.0) as running:
        yield running


def test_planned_commands_reach_cmd_vel_on_arrival(graph):
    # While healthy the watchdog forwards each cmd_vel_plan when it arrives rather than at its next
    # control cycle: measured from the planned command's arrival at the probe to the arrival of the
    # same velocity on cmd_vel. Waiting for the timer would give delays spread over a whole control
    # period (100 ms). The 30 ms median bound is common practice for a local DDS hop plus a Python
    # callback on a shared machine, no source.
    assert graph.wait_normal(30.0), graph.logs()
    since = time.time()
    time.sleep(3.0)
    probe = graph.probe
    planned = [(t, c) for t, c in list(probe.planned) if t >= since]
    forwarded = [(t, c) for t, _, c in list(probe.commands) if t >= since - 0.2]
    assert len(planned) >= 20, len(planned)
    delays = []
    for t, command in planned:
        later = [u for u, c in forwarded if u >= t - 0.005 and c == command]
        if later:
            delays.append(max(later[0] - t, 0.0))
    assert len(delays) >= 0.9 * len(planned), (len(delays), len(planned))
    delays.sort()
    median_ms = 1e3 * delays[len(delays) // 2]
    print(f"\nplanned → cmd_vel: median {median_ms:.1f} ms, max {1e3 * delays[-1]:.1f} ms over {len(delays)} commands")
    assert median_ms < 30.0


@pytest.mark.parametrize("fault", ORDER)
def test_fault_stops_the_robot_within_the_bound_and_recovers(graph, fault):
    result = graph.trial(fault)
    if not math.isnan(result.latency_s) and not result.cause_expected:
        # A stop for another reason came first (on a loaded machine a process can stall for a few
        # hundred ms), so this trial did not measure the injected fault: repeat it once.
        print(f"\n{fault}: first stop was for {result.cause!r}; repeating the trial")
        result = graph.trial(fault)
    print(f"\n{fault}: stop after {1e3 * result.latency_s:.0f} ms (bound {1e3 * result.bound_s:.0f} ms, "
          f"arrival {1e3 * result.arrival_latency_s:.0f} ms), cause {result.cause!r}, "
          f"normal commands {result.recovery_s:.2f} s after clearing")
    assert not math.isnan(result.latency_s), f"no stop on cmd_vel after {fault}\n" + graph.logs()
    assert result.latency_s >= 0.0
    assert result.within_bound, f"{fault}: stop after {result.latency_s:.3f} s > bound {result.bound_s:.3f} s"
    assert result.cause_expected, (f"{fault}: watchdog reported cause {result.cause!r}, expected "
                                   f"{sorted(FAULTS[fault].causes)}")
    assert not math.isnan(result.recovery_s), f"no normal command after clearing {fault}\n" + graph.logs()
    assert graph.wait_normal(5.0)


def test_watchdog_rejects_an_out_of_range_parameter_with_its_range(graph):
    node = graph.probe.node
    client = AsyncParameterClient(node, "watchdog")
    assert client.wait_for_services(timeout_sec=10.0)
    future = client.set_parameters([Parameter("recovery_cycles", value=0),
                                    Parameter("stop_mode", value="coast")])
    deadline = time.monotonic() + 10.0
    while not future.done() and time.monotonic() < deadline:
        time.sleep(0.05)
    results = future.result().results
    assert not results[0].successful and not results[1].successful
    assert "recovery_cycles" in results[0].reason
    assert "stop_mode" in results[1].reason and "'zero', 'ramp'" in results[1].reason
