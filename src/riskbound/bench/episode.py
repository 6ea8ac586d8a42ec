"""Closed-loop episode of the planner core against a scripted crowd (no ROS graph).

The robot applies the first input of each plan for one control period; on a failed solve it
brakes at its acceleration limit, as the watchdog's ramp stop would.
"""

from dataclasses import dataclass, field

import numpy as np

from riskbound.bench.scripted_crowd import ScriptedCrowd
from riskbound.clearance import disc_box_clearance
from riskbound.planning.mpc import ChanceConstrainedMPC


@dataclass
class EpisodeLog:
    robot_states: list = field(default_factory=list)
    walker_positions: list = field(default_factory=list)
    walker_headings: list = field(default_factory=list)
    results: list = field(default_factory=list)
    clearances: list = field(default_factory=list)
    reached_goal: bool = False
    cycles: int = 0

    @property
    def solve_ms(self):
        return np.array([r.solve_ms for r in self.results])

    @property
    def min_clearance_m(self):
        return float(np.min(self.clearances)) if self.clearances else float("inf")

    @property
    def collisions(self):
        return int(np.sum(np.asarray(self.clearances) < 0.0))

    @property
    def failures(self):
        return sum(1 for r in self.results if not r.success)


def braking_state(model, state, max_accel, dt):
    """State after one period of braking at the acceleration limit (the stop fallback)."""
    x = np.array(state, dtype=float)
    if model.name == "unicycle":
        v = x[3]
        u = np.array([-np.sign(v) * min(abs(v) / dt, max_accel), 0.0])
    else:
        v = x[2:4]
        speed = np.linalg.norm(v)
        u = -v / speed * min(speed / dt, max_accel) if speed > 0 else np.zeros(2)
    return model.step(x, u, dt)


def run_episode(settings, scenario, max_cycles=400, goal_tolerance_m=0.3, mpc=None, on_cycle=None):
    """Run one crossing. Returns an EpisodeLog. `on_cycle(k)` is called after each cycle (progress)."""
    mpc = mpc or ChanceConstrainedMPC(settings)
    mpc.reset()
    crowd = ScriptedCrowd(scenario)
    model = mpc.model
    dt_control = 1.0 / settings.control_rate_hz
    grid = settings.step_s * np.arange(1, settings.horizon_steps + 1)
    start, goal = np.asarray(scenario.start, dtype=float), np.asarray(scenario.goal, dtype=float)
    heading = np.arctan2(*(goal - start)[::-1])
    state = np.array([*start, 0.0, 0.0]) if model.name == "double_integrator" else np.array([*start, heading, 0.0])
    P0 = np.diag([0.02**2, 0.02**2, 0.05**2, 0.05**2])
    log = EpisodeLog()
    for k in range(max_cycles):
        result = mpc.solve(state, P0, goal, crowd.forecast(grid), elapsed_s=dt_control)
        log.results.append(result)
        log.robot_states.append(state.copy())
        log.walker_positions.append(crowd.positions.copy())
        log.walker_headings.append(crowd.headings.copy())
        if result.success:
            state = model.step(state, result.inputs[0], dt_control)
        else:
            state = braking_state(model, state, settings.max_accel_mps2, dt_control)
        crowd.advance(dt_control)
        clearance = disc_box_clearance(state[:2], settings.robot_radius_m, crowd.positions, crowd.headings,
                                       crowd.half_extents)
        log.clearances.append(float(clearance.min()) if len(clearance) else float("inf"))
        log.cycles = k + 1
        if on_cycle:
            on_cycle(k)
        if np.linalg.norm(state[:2] - goal) < goal_tolerance_m:
            log.reached_goal = True
            log.robot_states.append(state.copy())
            break
    return log
