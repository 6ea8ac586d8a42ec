"""Health state machine of the watchdog: healthy → degraded → stopped, with latching and hysteresis.

Every control cycle the watchdog asks `HealthMonitor.step(now_s)` whether the planner's latest
command may go to the robot. The monitor looks at what the node recorded since the last cycle
and finds the faults present now:

    stopping faults   solver_failure        the planner says its solve failed (status infeasible,
                                            no_plan_found, solver_failed or time_or_iteration_cap,
                                            at any level)
                      planner_inactive      the planner says it is not running its cycle: status
                                            unconfigured, inactive or finalized (a managed node
                                            outside its active state commands nothing)
                      planner_error         the planner reports level ERROR or STALE for another
                                            reason (stale or bad input, no goal, ...)
                      deadline_misses       `deadline_misses_to_stop` consecutive solves over the deadline
                      status_stale          no planner_status for longer than status_timeout_s
                      command_stale         no cmd_vel_plan for longer than command_timeout_s
                      odom_stale            odometry stamp older than odom_timeout_s
                      forecast_stale        forecast stamp older than forecast_timeout_s (if required)
                      command_invalid       the planned command holds NaN or Inf
                      command_out_of_limit  planned speed or turn rate above the configured limits
    degrading faults  deadline_miss         the latest solve took longer than the deadline
                      planner_warning       the planner reports level WARN (among them status
                                            least_violation: with infeasible_response
                                            least_violation the planner commands the plan that
                                            violates its obstacle constraints least; it goes to
                                            the robot, degraded, like any warned plan)

    healthy  ──degrading fault──► degraded   (the command still goes to the robot)
    healthy/degraded ──stopping fault──► stopped   (a stop goes to the robot; latched)
    degraded/stopped ──recovery_cycles consecutive fault-free cycles──► healthy
    stopped ──recovery_cycles consecutive cycles without a stopping fault──► degraded
             (only with resume_when_degraded: a planner that keeps warning, e.g. commanding
             least-violation plans, may then drive the robot out of a walker's way after a stop)

Status and command faults are also caught on arrival and held until the next cycle, so a NaN
command or a failure status that a good message replaces before the cycle still stops the robot.

A stop is latched: it holds even when the fault vanishes at once, until `recovery_cycles`
fault-free cycles in a row have passed (any fault restarts the count). The monitor starts stopped
(cause "startup") because nothing is known to be fresh yet. Every transition is logged with its
cause and kept in `transitions`.

Times are seconds on one clock chosen by the caller (the node's ROS clock).
"""

import logging
import math
from collections import deque
from dataclasses import dataclass

from riskbound.supervision.statistics import SolveTimeStatistics

logger = logging.getLogger(__name__)

HEALTHY, DEGRADED, STOPPED = "healthy", "degraded", "stopped"

# Levels as in diagnostic_msgs/DiagnosticStatus (a byte on the wire).
LEVEL_OK, LEVEL_WARN, LEVEL_ERROR, LEVEL_STALE = 0, 1, 2, 3

# Planner `status` values that mean no usable plan (riskbound.planning.mpc.PlanResult.status).
FAILED_PLAN_STATUSES = frozenset({"infeasible", "no_plan_found", "solver_failed", "time_or_iteration_cap"})
# Statuses of a cycle that ran the solver; others (no goal, goal reached, stale input, ...) carry
# no solve time worth counting. A status without a `status` key is taken as a solve.
SOLVE_STATUSES = FAILED_PLAN_STATUSES | {"solved", "feasible_not_converged", "least_violation", ""}
# Planner `status` values of a managed planner outside its active state (riskbound.ros.managed_node).
INACTIVE_PLANNER_STATUSES = frozenset({"unconfigured", "inactive", "finalized"})

# Absolute slack on the speed and turn-rate limits: the solver accepts constraint violations up to
# 1e-4 (IPOPT's constr_viol_tol), which must not stop the robot.
LIMIT_SLACK = 1e-3

TRANSITIONS_KEPT = 1000


@dataclass(frozen=True)
class PlannerStatus:
    """The parts of one planner_status message the watchdog uses (solve_ms None when not reported)."""

    level: int
    status: str = ""
    solve_ms: float = None
    reason: str = ""


def planner_status_from_values(level, values, message=""):
    """PlannerStatus from a planner_status message's level and key/value pairs.

    Returns (status, problems): problems name what could not be used (a solve_ms that is not a
    finite number ≥ 0 is dropped, so it neither enters the statistics nor counts as a miss).
    solve_ms is None too when the cycle ran no solve (see SOLVE_STATUSES).
    """
    problems = []
    solve_ms = None
    if "solve_ms" in values and values.get("status", "") in SOLVE_STATUSES:
        try:
            solve_ms = float(values["solve_ms"])
        except ValueError:
            solve_ms = float("nan")
        if not (math.isfinite(solve_ms) and solve_ms >= 0.0):
            problems.append(f"planner_status solve_ms={values['solve_ms']!r} is not a finite number ≥ 0")
            solve_ms = None
    status = PlannerStatus(level=int(level), status=values.get("status", ""), solve_ms=solve_ms,
                           reason=values.get("reason", "") or message)
    return status, problems


@dataclass(frozen=True)
class Fault:
    code: str
    detail: str
    stops: bool


@dataclass(frozen=True)
class Transition:
    time_s: float
    previous: str
    current: str
    cause: str
    detail: str


@dataclass(frozen=True)
class Verdict:
    """Outcome of one control cycle: forward the planner's command or send a stop."""

    state: str
    forward: bool
    faults: tuple
    transition: Transition = None


def _joined(faults):
    return ", ".join(f.code for f in faults), "; ".join(f.detail for f in faults)


class HealthMonitor:
    """Decides every control cycle whether the planner's command may reach the robot."""

    def __init__(self, settings, start_s=0.0):
        self.settings = settings
        self.statistics = SolveTimeStatistics(settings.statistics_window, settings.deadline_ms)
        self.state = STOPPED
        self.fault_free_cycles = 0
        self.stop_free_cycles = 0  # consecutive cycles without a stopping fault (resume_when_degraded)
        self.stops_total = 0
        self.transitions = deque(maxlen=TRANSITIONS_KEPT)
        self.last_stop = None
        self._status = None
        self._status_s = None
        self._consecutive_misses = 0
        self._command = None
        self._command_s = None
        self._odom_s = None
        self._forecast_s = None
        self._held = {}  # faults seen on arrival since the last cycle, by code
        self._record(start_s, None, STOPPED, "startup",
                     "no planner status, command or odometry received yet")

    def update_settings(self, settings):
        """Apply new settings from the next cycle on (the statistics window keeps its size)."""
        self.settings = settings
        self.statistics.set_deadline(settings.deadline_ms)

    def record_status(self, now_s, status):
        """A planner_status arrived at now_s."""
        self._status, self._status_s = status, now_s
        if status.solve_ms is not None:
            if self.statistics.add(status.solve_ms):
                self._consecutive_misses += 1
            else:
                self._consecutive_misses = 0
        self._hold(self._status_faults(status))

    def record_command(self, now_s, command):
        """A cmd_vel_plan arrived at now_s (a VelocityCommand in the body frame)."""
        self._command, self._command_s = command, now_s
        self._hold(self._command_faults(command))

    def _hold(self, faults):
        for fault in faults:
            self._held.setdefault(fault.code, fault)

    def record_odometry(self, now_s, stamp_s):
        """Odometry stamped stamp_s arrived at now_s (a stamp from the future counts as now)."""
        self._odom_s = min(stamp_s, now_s)

    def record_forecast(self, now_s, stamp_s):
        """An obstacle forecast stamped stamp_s arrived at now_s."""
        self._forecast_s = min(stamp_s, now_s)

    @property
    def command(self):
        """The latest planned command (None before the first)."""
        return self._command

    def ages(self, now_s):
        """Seconds since each input was last fresh (None: never received)."""
        def age(since):
            return None if since is None else now_s - since
        return {"status": age(self._status_s), "command": age(self._command_s),
                "odom": age(self._odom_s), "forecast": age(self._forecast_s)}

    def faults(self, now_s):
        """Faults present at now_s, stopping ones first."""
        s = self.settings
        found = []
        ages = self.ages(now_s)
        for name, code, topic, limit, needed in (
                ("status", "status_stale", "planner_status", s.status_timeout_s, True),
                ("command", "command_stale", "cmd_vel_plan", s.command_timeout_s, True),
                ("odom", "odom_stale", "odometry", s.odom_timeout_s, True),
                ("forecast", "forecast_stale", "obstacle_forecast", s.forecast_timeout_s, s.require_forecast)):
            if not needed:
                continue
            if ages[name] is None:
                found.append(Fault(code, f"no {topic} received yet", True))
            elif ages[name] > limit:
                found.append(Fault(code, f"{topic} is {ages[name]:.3f} s old (limit {limit:.3f} s)", True))
        found.extend(self._status_faults(self._status))
        found.extend(self._command_faults(self._command))
        codes = {f.code for f in found}
        found.extend(f for code, f in self._held.items() if code not in codes)
        return sorted(found, key=lambda f: not f.stops)

    def _status_faults(self, status):
        if status is None:
            return []
        found = []
        if status.status in INACTIVE_PLANNER_STATUSES:
            found.append(Fault("planner_inactive", f"planner is {status.status}, it sends no commands"
                               + (f": {status.reason}" if status.reason else ""), True))
        elif status.level >= LEVEL_ERROR or status.status in FAILED_PLAN_STATUSES:
            why = f": {status.reason}" if status.reason else ""
            code = "solver_failure" if status.status in FAILED_PLAN_STATUSES else "planner_error"
            found.append(Fault(code, f"planner reports status {status.status or '?'} at level {status.level}{why}",
                               True))
        elif status.level == LEVEL_WARN:
            found.append(Fault("planner_warning", f"planner warns: {status.reason or status.status}", False))
        if status.solve_ms is not None and status.solve_ms > self.settings.deadline_ms:
            detail = (f"solve took {status.solve_ms:.1f} ms (deadline {self.settings.deadline_ms:.1f} ms, "
                      f"{self._consecutive_misses} in a row)")
            if self._consecutive_misses >= self.settings.deadline_misses_to_stop:
                found.append(Fault("deadline_misses", detail, True))
            else:
                found.append(Fault("deadline_miss", detail, False))
        return found

    def _command_faults(self, command):
        if command is None:
            return []
        values = (command.linear_x, command.linear_y, command.angular_z)
        if not all(math.isfinite(v) for v in values):
            return [Fault("command_invalid", f"cmd_vel_plan is not finite: {values}", True)]
        speed = math.hypot(command.linear_x, command.linear_y)
        found = []
        if speed > self.settings.max_speed_mps + LIMIT_SLACK:
            found.append(Fault("command_out_of_limit", f"planned speed {speed:.3f} m/s exceeds "
                               f"max_speed_mps {self.settings.max_speed_mps:.3f}", True))
        if abs(command.angular_z) > self.settings.max_turn_rate_radps + LIMIT_SLACK:
            found.append(Fault("command_out_of_limit", f"planned turn rate {command.angular_z:.3f} rad/s "
                               f"exceeds max_turn_rate_radps {self.settings.max_turn_rate_radps:.3f}", True))
        return found

    def step(self, now_s):
        """One control cycle: update the state from the faults present now and say what to send."""
        faults = tuple(self.faults(now_s))
        self._held.clear()
        stopping = [f for f in faults if f.stops]
        transition = None
        if faults:
            self.fault_free_cycles = 0
        else:
            self.fault_free_cycles += 1
        self.stop_free_cycles = 0 if stopping else self.stop_free_cycles + 1
        recovery = self.settings.recovery_cycles
        if stopping and self.state != STOPPED:
            transition = self._record(now_s, self.state, STOPPED, *_joined(stopping))
        elif faults and self.state == HEALTHY:
            transition = self._record(now_s, HEALTHY, DEGRADED, *_joined(faults))
        elif not faults and self.state != HEALTHY and self.fault_free_cycles >= recovery:
            transition = self._record(now_s, self.state, HEALTHY, "recovered",
                                      f"{self.fault_free_cycles} consecutive fault-free cycles")
        elif (self.settings.resume_when_degraded and self.state == STOPPED and not stopping
              and self.stop_free_cycles >= recovery):
            transition = self._record(now_s, STOPPED, DEGRADED, "resumed_degraded",
                                      f"{self.stop_free_cycles} consecutive cycles without a stopping fault; "
                                      f"present: {_joined(faults)[1]}")
        return Verdict(self.state, self.state != STOPPED, faults, transition)

    def stop_now(self, now_s):
        """Between control cycles: stop at once if a stopping fault is present.

        Counts no cycle (recovery is decided by `step` alone); returns the Transition, or None when
        nothing changed. Checking this more often than `step` shortens the fault-to-stop latency
        from up to one control period to up to one check period.
        """
        if self.state == STOPPED:
            return None
        stopping = [f for f in self.faults(now_s) if f.stops]
        if not stopping:
            return None
        self.fault_free_cycles = self.stop_free_cycles = 0
        return self._record(now_s, self.state, STOPPED, *_joined(stopping))

    def _record(self, now_s, previous, current, cause, detail):
        transition = Transition(now_s, previous, current, cause, detail)
        self.transitions.append(transition)
        self.state = current
        if current == STOPPED:
            self.last_stop = transition
            self.stops_total += previous is not None
            logger.warning("%s → stopped at %.3f s: %s (%s)", previous or "start", now_s, cause, detail)
        else:
            logger.info("%s → %s at %.3f s: %s (%s)", previous, current, now_s, cause, detail)
        return transition
