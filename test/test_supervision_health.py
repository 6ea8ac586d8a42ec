"""Health state machine: every trigger, latching, recovery with hysteresis, transition records.

The expected behaviour is the specification of issue 4 (stop within one control cycle of a fault
being present, K consecutive fault-free cycles to recover); staleness arithmetic is common
practice, no source.
"""

import logging
import math

import pytest

from riskbound.motion.robot_models import VelocityCommand
from riskbound.supervision.health import (DEGRADED, HEALTHY, LEVEL_ERROR, LEVEL_OK, LEVEL_STALE, LEVEL_WARN,
                                          STOPPED, HealthMonitor, PlannerStatus, planner_status_from_values)
from riskbound.supervision.settings import WatchdogSettings

PERIOD = 0.1
GOOD_COMMAND = VelocityCommand(0.8, 0.1, 0.2)
GOOD_STATUS = PlannerStatus(level=LEVEL_OK, status="solved", solve_ms=20.0)


class Clocked:
    """A monitor fed like the node feeds it: every input fresh each cycle unless told otherwise."""

    def __init__(self, **settings):
        self.settings = WatchdogSettings(**settings)
        self.t = 0.0
        self.monitor = HealthMonitor(self.settings, start_s=self.t)

    def cycle(self, status=GOOD_STATUS, command=GOOD_COMMAND, odom=True, forecast=True, send_status=True,
              send_command=True):
        self.t += PERIOD
        if send_status:
            self.monitor.record_status(self.t - 0.01, status)
        if send_command:
            self.monitor.record_command(self.t - 0.01, command)
        if odom:
            self.monitor.record_odometry(self.t - 0.005, self.t - 0.02)
        if forecast:
            self.monitor.record_forecast(self.t - 0.005, self.t - 0.05)
        return self.monitor.step(self.t)

    def run_healthy(self):
        for _ in range(self.settings.recovery_cycles):
            verdict = self.cycle()
        assert verdict.state == HEALTHY and verdict.forward
        return verdict


def test_starts_stopped_and_needs_k_fault_free_cycles():
    clocked = Clocked(recovery_cycles=4)
    verdict = clocked.monitor.step(0.05)
    assert verdict.state == STOPPED and not verdict.forward
    assert {f.code for f in verdict.faults} == {"status_stale", "command_stale", "odom_stale", "forecast_stale"}
    assert clocked.monitor.last_stop.cause == "startup"
    for _ in range(3):
        assert clocked.cycle().state == STOPPED
    verdict = clocked.cycle()
    assert verdict.state == HEALTHY and verdict.forward
    assert verdict.transition.previous == STOPPED and verdict.transition.cause == "recovered"


def _stop_cause(clocked, **cycle_kwargs):
    clocked.run_healthy()
    verdict = clocked.cycle(**cycle_kwargs)
    assert verdict.state == STOPPED and not verdict.forward
    assert verdict.transition is not None and verdict.transition.previous == HEALTHY
    return verdict.transition.cause


@pytest.mark.parametrize("status, cause", [
    (PlannerStatus(level=LEVEL_ERROR, status="infeasible", solve_ms=30.0, reason="no feasible plan"),
     "solver_failure"),
    (PlannerStatus(level=LEVEL_OK, status="solver_failed", solve_ms=30.0), "solver_failure"),
    (PlannerStatus(level=LEVEL_WARN, status="time_or_iteration_cap", solve_ms=79.0), "solver_failure"),
    (PlannerStatus(level=LEVEL_ERROR, status="stale_odometry", solve_ms=None), "planner_error"),
    (PlannerStatus(level=LEVEL_STALE, status="", solve_ms=None), "planner_error"),
    (PlannerStatus(level=LEVEL_ERROR, status="inactive", reason="planner inactive: no commands"), "planner_inactive"),
    (PlannerStatus(level=LEVEL_OK, status="unconfigured"), "planner_inactive"),
    (PlannerStatus(level=LEVEL_ERROR, status="finalized"), "planner_inactive"),
])
def test_planner_failure_stops_in_the_same_cycle(status, cause):
    assert _stop_cause(Clocked(), status=status) == cause


def test_an_inactive_planner_is_named_as_the_stop_cause_while_it_stays_inactive():
    clocked = Clocked()
    clocked.run_healthy()
    inactive = PlannerStatus(level=LEVEL_ERROR, status="inactive", reason="planner inactive: no commands")
    clocked.cycle(status=inactive)
    # The deactivated planner sends nothing more: its last status keeps naming the cause.
    verdict = clocked.cycle(send_status=False, send_command=False)
    assert verdict.state == STOPPED
    detail = {f.code: f.detail for f in verdict.faults}["planner_inactive"]
    assert detail == "planner is inactive, it sends no commands: planner inactive: no commands"


@pytest.mark.parametrize("command, cause", [
    (VelocityCommand(float("nan"), 0.0, 0.0), "command_invalid"),
    (VelocityCommand(0.0, 0.0, float("inf")), "command_invalid"),
    (VelocityCommand(1.0, 0.8, 0.0), "command_out_of_limit"),   # ‖v‖ = 1.28 > 1.2
    (VelocityCommand(0.5, 0.0, -1.6), "command_out_of_limit"),  # |ω| = 1.6 > 1.5
])
def test_bad_commands_stop_in_the_same_cycle(command, cause):
    assert _stop_cause(Clocked(max_speed_mps=1.2, max_turn_rate_radps=1.5), command=command) == cause


def test_a_bad_command_replaced_before_the_cycle_still_stops():
    clocked = Clocked()
    clocked.run_healthy()
    clocked.monitor.record_command(clocked.t + 0.02, VelocityCommand(float("nan"), 0.0, 0.0))
    clocked.monitor.record_status(clocked.t + 0.03, PlannerStatus(level=LEVEL_ERROR, status="infeasible"))
    verdict = clocked.cycle()  # good command and status arrive before the cycle
    assert verdict.state == STOPPED
    assert verdict.transition.cause == "command_invalid, solver_failure"
    # Held faults count for one cycle only: the next fault-free cycle starts the recovery count.
    assert clocked.cycle().faults == ()


def test_command_at_the_limit_passes():
    clocked = Clocked(max_speed_mps=1.2, max_turn_rate_radps=1.5)
    clocked.run_healthy()
    at_limit = VelocityCommand(1.2 * math.cos(0.3), 1.2 * math.sin(0.3), -1.5)
    assert clocked.cycle(command=at_limit).state == HEALTHY


@pytest.mark.parametrize("silenced, cause, limit_name", [
    ("send_status", "status_stale", "status_timeout_s"),
    ("send_command", "command_stale", "command_timeout_s"),
    ("odom", "odom_stale", "odom_timeout_s"),
    ("forecast", "forecast_stale", "forecast_timeout_s"),
])
def test_stale_input_stops_at_the_first_cycle_past_its_limit(silenced, cause, limit_name):
    clocked = Clocked(status_timeout_s=0.3, command_timeout_s=0.25, odom_timeout_s=0.35, forecast_timeout_s=0.5)
    clocked.run_healthy()
    last_fresh = clocked.t  # the silenced input was last recorded in this cycle, slightly earlier
    while True:
        verdict = clocked.cycle(**{silenced: False})
        if verdict.state == STOPPED:
            break
        assert verdict.state == HEALTHY
    limit = getattr(clocked.settings, limit_name)
    age_at_stop = verdict.faults[0].detail
    assert verdict.transition.cause == cause, age_at_stop
    # Stopped in the first cycle whose time is past last-fresh + limit: within limit + one period.
    assert clocked.t - PERIOD <= last_fresh + limit + PERIOD
    assert clocked.t - last_fresh <= clocked.settings.stop_bound_s(limit) + 1e-9


def test_stale_forecast_is_ignored_when_not_required():
    clocked = Clocked(require_forecast=False, recovery_cycles=2)
    for _ in range(20):
        verdict = clocked.cycle(forecast=False)
    assert verdict.state == HEALTHY


def test_odometry_stamped_in_the_past_is_stale_even_when_it_just_arrived():
    clocked = Clocked(odom_timeout_s=0.3)
    clocked.run_healthy()
    clocked.t += PERIOD
    clocked.monitor.record_status(clocked.t, GOOD_STATUS)
    clocked.monitor.record_command(clocked.t, GOOD_COMMAND)
    clocked.monitor.record_forecast(clocked.t, clocked.t)
    clocked.monitor.record_odometry(clocked.t, clocked.t - 0.5)  # delayed by 0.5 s on its way
    verdict = clocked.monitor.step(clocked.t)
    assert verdict.state == STOPPED and verdict.transition.cause == "odom_stale"


def test_stamp_from_the_future_counts_as_arrival_time():
    clocked = Clocked(odom_timeout_s=0.3)
    clocked.run_healthy()
    clocked.monitor.record_odometry(clocked.t, clocked.t + 100.0)
    for _ in range(3):
        assert clocked.cycle(odom=False).state == HEALTHY
    assert clocked.cycle(odom=False).state == STOPPED


def test_one_deadline_miss_degrades_and_consecutive_misses_stop():
    clocked = Clocked(deadline_ms=80.0, deadline_misses_to_stop=3, recovery_cycles=3)
    clocked.run_healthy()
    late = PlannerStatus(level=LEVEL_OK, status="solved", solve_ms=95.0)
    verdict = clocked.cycle(status=late)
    assert verdict.state == DEGRADED and verdict.forward
    assert verdict.transition.cause == "deadline_miss"
    assert clocked.cycle(status=late).state == DEGRADED
    verdict = clocked.cycle(status=late)
    assert verdict.state == STOPPED and verdict.transition.cause == "deadline_misses"
    assert verdict.transition.previous == DEGRADED
    summary = clocked.monitor.statistics.summary()
    assert summary.deadline_misses == 3 and summary.max_ms == 95.0


def test_degraded_recovers_after_k_fault_free_cycles():
    clocked = Clocked(recovery_cycles=3)
    clocked.run_healthy()
    warning = PlannerStatus(level=LEVEL_WARN, status="solved", solve_ms=20.0, reason="obstacles dropped")
    verdict = clocked.cycle(status=warning)
    assert verdict.state == DEGRADED and verdict.forward and verdict.transition.cause == "planner_warning"
    assert clocked.cycle().state == DEGRADED
    assert clocked.cycle().state == DEGRADED
    verdict = clocked.cycle()
    assert verdict.state == HEALTHY and verdict.transition.previous == DEGRADED


def test_least_violation_plan_goes_to_the_robot_degraded_and_its_solve_time_counts():
    # infeasible_response least_violation: the planner commands the plan that violates its obstacle
    # constraints least, at level WARN; the watchdog passes it degraded and counts its solve time.
    clocked = Clocked(recovery_cycles=2)
    clocked.run_healthy()
    status, problems = planner_status_from_values(LEVEL_WARN, {"solve_ms": "31.0", "status": "least_violation",
                                                               "reason": "no plan meets every obstacle constraint"})
    assert problems == [] and status.solve_ms == 31.0
    verdict = clocked.cycle(status=status)
    assert verdict.state == DEGRADED and verdict.forward and verdict.transition.cause == "planner_warning"
    assert clocked.monitor.statistics.summary().max_ms == 31.0
    # The same plan reported at level ERROR (a planner without that response) stops the robot.
    verdict = clocked.cycle(status=PlannerStatus(level=LEVEL_ERROR, status="infeasible", solve_ms=31.0))
    assert verdict.state == STOPPED and not verdict.forward


@pytest.mark.parametrize("resume_when_degraded", [False, True])
def test_warned_plans_after_a_stop_resume_the_robot_only_when_configured(resume_when_degraded):
    # A planner commanding least-violation plans (WARN) after a stop: by default a warning is a fault
    # and the stop holds; with resume_when_degraded, recovery_cycles cycles without a stopping fault
    # resume the robot as degraded, and fault-free cycles then make it healthy.
    k = 3
    clocked = Clocked(recovery_cycles=k, resume_when_degraded=resume_when_degraded)
    clocked.run_healthy()
    assert clocked.cycle(status=PlannerStatus(level=LEVEL_ERROR, status="infeasible", solve_ms=20.0)).state == STOPPED
    escaping = PlannerStatus(level=LEVEL_WARN, status="least_violation", solve_ms=20.0, reason="no plan meets ...")
    states = [clocked.cycle(status=escaping).state for _ in range(2 * k)]
    if not resume_when_degraded:
        assert states == [STOPPED] * (2 * k)
        return
    assert states[:k - 1] == [STOPPED] * (k - 1) and set(states[k - 1:]) == {DEGRADED}
    resumed = clocked.monitor.transitions[-1]
    assert (resumed.previous, resumed.current, resumed.cause) == (STOPPED, DEGRADED, "resumed_degraded")
    # A stopping fault in the middle restarts the count.
    assert clocked.cycle(status=PlannerStatus(level=LEVEL_ERROR, status="infeasible", solve_ms=20.0)).state == STOPPED
    assert [clocked.cycle(status=escaping).state for _ in range(k)] == [STOPPED] * (k - 1) + [DEGRADED]
    verdicts = [clocked.cycle() for _ in range(k)]
    assert verdicts[-1].state == HEALTHY and all(v.forward for v in verdicts)


def test_stop_is_latched_and_any_fault_restarts_the_recovery_count():
    k = 5
    clocked = Clocked(recovery_cycles=k)
    clocked.run_healthy()
    assert clocked.cycle(command=VelocityCommand(float("nan"), 0.0, 0.0)).state == STOPPED
    # The fault is gone at once, but the stop holds for K − 1 more cycles...
    for _ in range(k - 2):
        verdict = clocked.cycle()
        assert verdict.state == STOPPED and not verdict.forward and verdict.faults == ()
    # ...a degrading fault during recovery restarts the count and does not release the stop...
    late = PlannerStatus(level=LEVEL_OK, status="solved", solve_ms=90.0)
    assert clocked.cycle(status=late).state == STOPPED
    for _ in range(k - 1):
        assert clocked.cycle().state == STOPPED
    # ...and the K-th consecutive fault-free cycle releases it.
    verdict = clocked.cycle()
    assert verdict.state == HEALTHY and verdict.forward
    assert clocked.monitor.last_stop.cause == "command_invalid"
    assert clocked.monitor.stops_total == 1


def test_every_transition_is_recorded_and_logged(caplog):
    clocked = Clocked(recovery_cycles=2)
    with caplog.at_level(logging.INFO, logger="riskbound.supervision.health"):
        clocked.run_healthy()
        clocked.cycle(status=PlannerStatus(level=LEVEL_WARN, status="solved", solve_ms=10.0, reason="w"))
        clocked.cycle(send_status=False, status=None)
        for _ in range(5):
            clocked.cycle(send_status=False)
        clocked.run_healthy()
    path = [(t.previous, t.current, t.cause) for t in clocked.monitor.transitions]
    assert path == [(None, STOPPED, "startup"), (STOPPED, HEALTHY, "recovered"),
                    (HEALTHY, DEGRADED, "planner_warning"), (DEGRADED, STOPPED, "status_stale"),
                    (STOPPED, HEALTHY, "recovered")]
    logged = [r.getMessage() for r in caplog.records]
    assert len(logged) == len(path)
    assert "startup" in logged[0] and caplog.records[0].levelno == logging.WARNING
    assert "degraded → stopped" in logged[3] and "status_stale" in logged[3] and "planner_status" in logged[3]
    assert caplog.records[3].levelno == logging.WARNING and caplog.records[4].levelno == logging.INFO


def test_planner_status_values_are_parsed_and_bad_solve_times_dropped():
    status, problems = planner_status_from_values(
        LEVEL_OK, {"solve_ms": "42.5", "iterations": "12", "solver_status": "Solve_Succeeded",
                   "status": "solved", "reason": ""}, message="ok")
    assert status == PlannerStatus(level=LEVEL_OK, status="solved", solve_ms=42.5, reason="ok")
    assert problems == []
    status, problems = planner_status_from_values(LEVEL_ERROR, {"solve_ms": "nan", "status": "infeasible",
                                                                "reason": "obstacle on the robot"})
    assert status.solve_ms is None and status.reason == "obstacle on the robot"
    assert len(problems) == 1 and "solve_ms" in problems[0]
    assert planner_status_from_values(LEVEL_OK, {"solve_ms": "fast"})[0].solve_ms is None
    assert planner_status_from_values(LEVEL_OK, {"solve_ms": "12"})[0].solve_ms == 12.0
    # A cycle that ran no solve (goal reached, stale input) adds no solve time.
    assert planner_status_from_values(LEVEL_OK, {"solve_ms": "0", "status": "goal_reached"})[0].solve_ms is None
    assert planner_status_from_values(LEVEL_ERROR, {"solve_ms": "0", "status": "stale_odometry"})[0].solve_ms is None


def test_new_settings_apply_from_the_next_cycle():
    clocked = Clocked()
    clocked.run_healthy()
    clocked.monitor.update_settings(clocked.settings.with_changes(max_speed_mps=0.5))
    assert clocked.cycle().transition.cause == "command_out_of_limit"


def test_checks_between_cycles_stop_early_without_counting_recovery_cycles():
    clocked = Clocked(status_timeout_s=0.3, recovery_cycles=3)
    clocked.run_healthy()
    last_status = clocked.t - 0.01
    clocked.monitor.record_command(clocked.t, GOOD_COMMAND)
    check_period = 0.02
    t = clocked.t
    transition = None
    while transition is None:  # the planner has gone quiet; odometry and forecast stay fresh
        t += check_period
        clocked.monitor.record_odometry(t, t)
        clocked.monitor.record_forecast(t, t)
        clocked.monitor.record_command(t, GOOD_COMMAND)
        transition = clocked.monitor.stop_now(t)
    # Stopped at the first check past the limit: within limit + one check period.
    assert transition.cause == "status_stale" and clocked.monitor.state == STOPPED
    assert 0.3 < t - last_status <= 0.3 + check_period + 1e-9
    assert clocked.monitor.stop_now(t + check_period) is None  # already stopped: nothing new
    assert clocked.monitor.fault_free_cycles == 0
    for _ in range(2):
        assert clocked.cycle().state == STOPPED
    assert clocked.cycle().state == HEALTHY


def test_checks_between_cycles_leave_degrading_faults_to_the_cycle():
    clocked = Clocked()
    clocked.run_healthy()
    clocked.monitor.record_status(clocked.t + 0.01, PlannerStatus(level=LEVEL_WARN, status="solved", solve_ms=5.0))
    assert clocked.monitor.stop_now(clocked.t + 0.02) is None
    assert clocked.monitor.state == HEALTHY
