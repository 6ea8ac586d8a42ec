"""Chance-constrained MPC: built once with CasADi, solved with IPOPT every control cycle.

The goal-tracking problem (cost, dynamics, limits) is riskbound.planning.problem's; this module adds,
for every step k = 1…N and obstacle slot j, the ellipse constraint

    (p_k − o_jk)ᵀ A_jk (p_k − o_jk) ≥ 1

r is the goal clipped to the robot's reach. Obstacle centres o_jk and shape matrices A_jk (which
carry the risk-dependent inflation), the reference and the weights are solver parameters, so a new
risk level or new weights need no rebuild; horizon, step, model, slot count and solver caps do.

When no plan meets every ellipse constraint (a walker's ellipse already covers every place the
robot can reach in one step), `infeasible_response` decides:

* stop (default): the cycle fails (status infeasible); the planner node sends no command and the
  watchdog stops the robot.
* least_violation: the ellipse rows are softened with one slack s_jk ≥ 0 each,
  (p_k − o_jk)ᵀ A_jk (p_k − o_jk) + s_jk ≥ 1, and ρ Σ s_jk is added to the cost (an exact L1
  penalty: for ρ above the largest constraint multiplier, a solution of the hard problem is a
  solution of the soft one, Numerical Optimization, 2nd ed., 2006, Sec. 17.2, Theorem 17.3, value
  from memory; see VIOLATION_PENALTY). Plans with every slack at zero are reported as before; a
  plan with a positive slack is the motion that leaves the ellipses with the least total
  violation, reported with status least_violation. The chance constraint does not hold for such
  a plan; the response is for robots among people who may not react to them, where standing still
  in a walker's path is the worse choice.
"""

import time
from dataclasses import dataclass, field

import casadi as ca
import numpy as np

from riskbound.motion.covariance import propagate_along_trajectory
from riskbound.motion.robot_models import make_robot_model
from riskbound.planning.buffered_function import BufferedFunction
from riskbound.planning.obstacle_constraints import build_obstacle_constraints
from riskbound.planning.problem import (motion_row_bounds, pack_plan, shift_indices, tracking_problem, unpack_plan,
                                        variable_bounds, weight_values)

# IPOPT return statuses whose iterate we may use if it is also feasible.
_CONVERGED = {"Solve_Succeeded", "Solved_To_Acceptable_Level"}
_CAPPED = {"Maximum_Iterations_Exceeded", "Maximum_WallTime_Exceeded", "Maximum_CpuTime_Exceeded"}
# Largest constraint violation accepted in a returned plan (IPOPT's default constr_viol_tol).
FEASIBILITY_TOLERANCE = 1e-4
# ρ of the least_violation response, per unit of ellipse-row violation. The multipliers of the
# ellipse rows are the cost's sensitivity to pushing a plan out by one unit of dᵀAd: with the
# default weights and a goal 5 m away they reach 31 (test_mpc_obstacles), so 1e3 keeps the
# penalty exact with a wide margin. Weights a hundred times the defaults could make a multiplier
# exceed ρ; the plan would then enter an ellipse although it need not, and is reported as
# least_violation all the same (the status is decided from the slacks, not assumed).
VIOLATION_PENALTY = 1e3


@dataclass
class PlanResult:
    """One planning cycle: the plan (when usable) and what happened."""

    success: bool
    status: str
    solver_status: str = ""
    solve_ms: float = 0.0
    iterations: int = 0
    cost: float = float("nan")
    obstacles_considered: int = 0
    obstacles_dropped: int = 0
    risk_per_constraint: float = float("nan")
    min_margin_m: float = float("inf")
    max_violation: float = 0.0  # least_violation: largest ellipse-row slack, 1 − dᵀAd (0: constraints met)
    times: np.ndarray = field(default_factory=lambda: np.zeros(0))
    states: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    inputs: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    constraints: object = None


class ChanceConstrainedMPC:
    """Build the problem once for a settings set; call `solve` every cycle."""

    def __init__(self, settings):
        self.settings = settings
        self.model = make_robot_model(settings.robot_model)
        self.soft = settings.infeasible_response == "least_violation"
        self._build()
        self._previous = None

    def _build(self):
        s, model = self.settings, self.model
        N, M = s.horizon_steps, s.max_obstacles
        X, U, w, reference, weights, cost, step_rows = tracking_problem(s, model)
        obstacle = ca.SX.sym("obstacle", 5, M * N)  # per (step, slot): o_x, o_y, A₁₁, A₁₂, A₂₂
        # Slack of every ellipse row (column k·M + j), appended to w; none unless least_violation.
        slack = ca.SX.sym("slack", M * N if self.soft else 0)
        g = []
        for k in range(N):
            g.extend(step_rows[k])
            for j in range(M):
                col = obstacle[:, k * M + j]
                d = X[k + 1][0:2] - col[0:2]
                q = col[2] * d[0] ** 2 + 2 * col[3] * d[0] * d[1] + col[4] * d[1] ** 2
                g.append(q + slack[k * M + j] if self.soft else q)
        if self.soft:
            w = ca.vertcat(w, slack)
            cost += VIOLATION_PENALTY * ca.sum1(slack)
        self._slack_count = slack.shape[0]
        self._plan_size = w.shape[0] - self._slack_count
        p = ca.vertcat(reference, weights, ca.vec(obstacle))
        g = ca.vertcat(*g)
        common = {
            "print_time": False,
            "ipopt.print_level": 0,
            "ipopt.sb": "yes",
            "ipopt.max_iter": s.solver_max_iter,
            "ipopt.max_wall_time": s.deadline_s,
            "ipopt.tol": s.solver_tolerance,
            "ipopt.acceptable_tol": max(10 * s.solver_tolerance, 1e-6),
            "ipopt.acceptable_iter": 3,
            "ipopt.mu_strategy": "monotone",
        }
        # From a shifted previous solution the barrier starts small and the iterate is not pushed
        # away from its bounds, so IPOPT stays near the old optimum: a few iterations per cycle.
        warm = dict(common, **{
            "ipopt.warm_start_init_point": "yes",
            "ipopt.mu_init": 1e-4,
            "ipopt.warm_start_bound_push": 1e-9,
            "ipopt.warm_start_slack_bound_push": 1e-9,
            "ipopt.warm_start_mult_bound_push": 1e-9,
        })
        nlp = {"x": w, "f": cost, "g": g, "p": p}
        self._cold_solver = BufferedFunction(ca.nlpsol("chance_constrained_mpc_cold", "ipopt", nlp, common))
        self._warm_solver = BufferedFunction(ca.nlpsol("chance_constrained_mpc_warm", "ipopt", nlp, warm))
        self._row = g.shape[0] // N  # constraint rows per step: dynamics, speed, obstacle slots

    # --- bounds and parameters -------------------------------------------------------------------

    def _bounds(self, x0):
        s, model = self.settings, self.model
        lbx, ubx = variable_bounds(s, model, x0)
        motion_lower, motion_upper = motion_row_bounds(s, model)
        row_lower = np.concatenate([motion_lower, np.ones(s.max_obstacles)])
        row_upper = np.concatenate([motion_upper, np.full(s.max_obstacles, np.inf)])
        if self.soft:
            lbx = np.concatenate([lbx, np.zeros(self._slack_count)])
            ubx = np.concatenate([ubx, np.full(self._slack_count, np.inf)])
        return lbx, ubx, np.tile(row_lower, s.horizon_steps), np.tile(row_upper, s.horizon_steps)

    def _reference(self, position, goal):
        s = self.settings
        reach = s.goal_reach_m if s.goal_reach_m > 0.0 else s.max_speed_mps * s.horizon_steps * s.step_s
        offset = np.asarray(goal, dtype=float) - position
        distance = np.linalg.norm(offset)
        return position + offset * min(1.0, reach / distance) if distance > 0.0 else position.copy()

    # --- warm start ------------------------------------------------------------------------------

    def _unpack(self, w):
        return unpack_plan(w, self.model.state_dim, self.model.input_dim, self.settings.horizon_steps)

    @staticmethod
    def _pack(states, inputs):
        return pack_plan(states, inputs)

    def _initial_guess(self, x0, elapsed_s):
        """Shifted previous solution (states, inputs, multipliers) or a zero-input rollout.

        Returns (states, inputs, lam_x, lam_g, previous track ids, slack multipliers (N, M)); the
        last four are None for a cold start.
        """
        N, dt = self.settings.horizon_steps, self.settings.step_s
        if self._previous is None:
            inputs = np.zeros((N, self.model.input_dim))
            return self.model.rollout(x0, inputs, dt), inputs, None, None, None, None
        states, inputs, lam_x, lam_g, ids = self._previous
        idx, step_idx = shift_indices(N, elapsed_s, dt)
        states = states[idx].copy()
        inputs = inputs[step_idx].copy()
        states[0] = x0
        lam_states, lam_inputs = self._unpack(lam_x)
        lam_slack = lam_x[self._plan_size:].reshape(N, -1)[step_idx]
        lam_x = self._pack(lam_states[idx], lam_inputs[step_idx])
        lam_g = lam_g.reshape(N, self._row)[step_idx].ravel()
        return states, inputs, lam_x, lam_g, ids, lam_slack

    def reset(self):
        """Forget the warm start (after a failure, a goal change or a jump in odometry)."""
        self._previous = None

    # --- the cycle -------------------------------------------------------------------------------

    def solve(self, x0, P0, goal, forecast, elapsed_s=None):
        """Plan from state x0 (covariance P0) to `goal` among `forecast` obstacles.

        forecast: ObstacleForecast whose `times` are exactly k·Δt, k = 1…N, counted from the moment
            of x0: resample at those instants (`forecast.resampled(k·Δt + offset)` with offset = state
            stamp − forecast stamp) and set `times` back to k·Δt before calling.
        elapsed_s: time since the previous solve (for the warm-start shift); default one step
        """
        s, model = self.settings, self.model
        N, dt, M = s.horizon_steps, s.step_s, s.max_obstacles
        x0 = np.asarray(x0, dtype=float)
        goal = np.asarray(goal, dtype=float)
        reason = None
        if x0.shape != (model.state_dim,) or not np.all(np.isfinite(x0)):
            reason = "bad_input: robot state is missing, NaN or Inf"
        elif np.shape(P0) != (model.state_dim, model.state_dim) or not np.all(np.isfinite(P0)):
            reason = f"bad_input: robot covariance must be a finite {model.state_dim}×{model.state_dim} matrix"
        elif np.min(np.linalg.eigvalsh(0.5 * (np.asarray(P0) + np.asarray(P0).T))) < -1e-9:
            reason = "bad_input: robot covariance is not positive semi-definite"
        elif goal.shape != (2,) or not np.all(np.isfinite(goal)):
            reason = "bad_input: goal is NaN or Inf"
        elif len(forecast.times) != N or not np.allclose(forecast.times, dt * np.arange(1, N + 1)):
            reason = "bad_input: forecast is not on the planner grid"
        else:
            problems = forecast.problems()
            if problems:
                reason = "bad_input: " + "; ".join(problems)
        if reason:
            return PlanResult(False, reason)

        started = time.perf_counter()
        elapsed_s = dt if elapsed_s is None else elapsed_s
        guess_states, guess_inputs, lam_x, lam_g, previous_ids, lam_slack = self._initial_guess(x0, elapsed_s)
        robot_cov = propagate_along_trajectory(model, guess_states, guess_inputs, dt, P0,
                                               s.robot_accel_noise, s.robot_turn_noise)[1:, 0:2, 0:2]
        constraints = build_obstacle_constraints(forecast, robot_cov, x0[0:2], s)
        shapes = constraints.shapes
        obstacle = np.stack([constraints.centres[..., 0], constraints.centres[..., 1], shapes[..., 0, 0],
                             shapes[..., 0, 1], shapes[..., 1, 1]], axis=-1)  # (M, N, 5)
        obstacle = obstacle.transpose(1, 0, 2).reshape(N * M, 5)  # column k·M + j
        reference = self._reference(x0[0:2], goal)
        p = np.concatenate([reference, weight_values(s), obstacle.ravel()])
        lbx, ubx, lbg, ubg = self._bounds(x0)
        guess = self._pack(guess_states, guess_inputs)
        if self.soft:
            # Each slack starts at the violation of the guess (zero where the guess is clear).
            d = guess_states[None, 1:, 0:2] - constraints.centres
            q = np.einsum("jki,jkil,jkl->kj", d, shapes, d)  # (N, M), column order k·M + j
            guess = np.concatenate([guess, np.maximum(1.0 - q, 0.0).ravel()])
        args = {"x0": guess, "p": p, "lbx": lbx, "ubx": ubx, "lbg": lbg, "ubg": ubg}
        if lam_x is not None:
            lam_g = lam_g.reshape(N, self._row).copy()
            same_obstacle = constraints.track_ids == previous_ids
            obstacle_cols = lam_g[:, self._row - M:]
            obstacle_cols[:, ~same_obstacle] = 0.0
            if self.soft:
                lam_slack = lam_slack.copy()
                lam_slack[:, ~same_obstacle] = 0.0
                lam_x = np.concatenate([lam_x, lam_slack.ravel()])
            args["lam_x0"], args["lam_g0"] = lam_x, lam_g.ravel()

        solver = self._cold_solver if lam_x is None else self._warm_solver
        solution = solver(**args)
        solve_ms = 1e3 * (time.perf_counter() - started)
        stats = solver.stats()
        solver_status = stats.get("return_status", "unknown")
        w = solution["x"].copy()
        g = solution["g"]
        violation = max(np.max(lbg - g, initial=0.0), np.max(g - ubg, initial=0.0),
                        np.max(lbx - w, initial=0.0), np.max(w - ubx, initial=0.0))
        finite = np.all(np.isfinite(w))
        feasible = finite and violation <= FEASIBILITY_TOLERANCE
        # Largest softened ellipse violation (least_violation only): the plan enters an ellipse.
        softened = float(np.max(w[self._plan_size:], initial=0.0)) if finite else float("nan")
        if solver_status in _CONVERGED and feasible:
            status = "solved"
        elif solver_status in _CAPPED and feasible:
            status = "feasible_not_converged"
        elif solver_status in _CAPPED:
            status = "time_or_iteration_cap"
        elif "Infeasible" in solver_status:
            status = "infeasible"
        else:
            status = "solver_failed"
        if status in ("solved", "feasible_not_converged") and softened > FEASIBILITY_TOLERANCE:
            status = "least_violation"  # a usable motion, but it enters at least one ellipse
        success = status in ("solved", "feasible_not_converged", "least_violation")

        states, inputs = self._unpack(w)
        result = PlanResult(
            success=success, status=status, solver_status=solver_status, solve_ms=solve_ms,
            iterations=int(stats.get("iter_count", 0)),
            cost=float(solution["f"][0]) - VIOLATION_PENALTY * float(np.sum(w[self._plan_size:])),
            max_violation=softened,
            obstacles_considered=constraints.considered, obstacles_dropped=constraints.dropped,
            risk_per_constraint=constraints.risk,
            min_margin_m=self._min_margin(states, constraints) if finite else float("nan"),
            times=dt * np.arange(N + 1), states=states, inputs=inputs, constraints=constraints)
        if success:
            self._previous = (states, inputs, solution["lam_x"].copy(), solution["lam_g"].copy(),
                              constraints.track_ids.copy())
        else:
            # A failed cycle's iterate, or the last good plan shifted past it, often runs through the
            # obstacle that made the cycle fail: measured in closed loop, restarting cold from the
            # zero-input rollout fails far fewer of the following cycles.
            self.reset()
        return result

    @staticmethod
    def _min_margin(states, constraints):
        """Smallest distance [m] from a planned position to an obstacle ellipse, along the ray from its centre.

        Negative inside an ellipse. +inf when no obstacle is considered.
        """
        if constraints.considered == 0:
            return float("inf")
        n = constraints.considered
        d = states[None, 1:, 0:2] - constraints.centres[:n]
        q = np.einsum("jki,jkil,jkl->jk", d, constraints.shapes[:n], d)
        distance = np.linalg.norm(d, axis=-1)
        margin = distance * (1.0 - 1.0 / np.sqrt(np.maximum(q, 1e-300)))
        # At the centre itself the ray is undefined: the depth is at least the smallest semi-axis.
        at_centre = distance < 1e-9
        margin[at_centre] = -constraints.semi_axes[:n].min(axis=-1)[at_centre]
        return float(np.min(margin))
