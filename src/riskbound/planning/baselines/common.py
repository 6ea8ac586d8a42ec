"""What every benchmark baseline shares with the chance-constrained MPC: cost, dynamics, bounds, cycle.

The baselines differ from `riskbound.planning.mpc` only in how an obstacle enters the problem, so
everything else follows the MPC's conventions exactly (see its module docstring):

    w = [x₀, u₀, x₁, u₁, …, x_{N−1}, u_{N−1}, x_N]   (extra variables, if any, appended after)
    cost = Σ_{k<N} [ w_g ‖p_k − r‖² + w_s ‖v_k‖² + w_a a_k² (+ w_ω ω_k²) ] + w_T ‖p_N − r‖² + w_s ‖v_N‖²
    rows per step k: x_{k+1} − f(x_k, u_k) = 0, the octagon speed limit (double integrator),
                     then the method's obstacle rows

with r the goal clipped to the robot's reach, the same input and speed bounds, the same robot
covariance (propagated along the initial guess) and the same pruning and risk allocation
(`build_obstacle_constraints`). `plan_cost` evaluates the cost of any plan numerically so that
every method is scored by one function.
"""

import time

import numpy as np

from riskbound.motion.covariance import propagate_along_trajectory
from riskbound.motion.robot_models import make_robot_model
from riskbound.planning.mpc import FEASIBILITY_TOLERANCE, PlanResult
from riskbound.planning.problem import (goal_reference, motion_row_bounds, pack_plan, plan_cost, shift_indices,
                                        tracking_problem, unpack_plan, variable_bounds, weight_values)


def forecast_problem(forecast, settings):
    """Reason `forecast` cannot be planned with (None when fine): the MPC's grid and sanity checks."""
    N, dt = settings.horizon_steps, settings.step_s
    if len(forecast.times) != N or not np.allclose(forecast.times, dt * np.arange(1, N + 1)):
        return "bad_input: forecast is not on the planner grid"
    problems = forecast.problems()
    return "bad_input: " + "; ".join(problems) if problems else None


class BaselinePlanner:
    """Shared skeleton of a baseline: validation, warm start, robot covariance, reference, bounds.

    A subclass builds its solver from `_symbols()` (decision variables, cost, dynamics and speed rows)
    plus its own obstacle rows, and implements `_solve_cycle`, which returns a `PlanResult` whose
    `constraints` holds the obstacle numbers it used.
    """

    solver_name = ""

    def __init__(self, settings):
        self.settings = settings
        self.model = make_robot_model(settings.robot_model)
        self._previous = None

    # --- symbolic pieces -------------------------------------------------------------------------

    def _symbols(self):
        """Decision variables, cost and per-step dynamics/speed rows: the MPC's own problem."""
        return tracking_problem(self.settings, self.model)

    # --- numbers ---------------------------------------------------------------------------------

    def _weights(self):
        return weight_values(self.settings)

    def _variable_bounds(self, x0):
        """Bounds on w (states and inputs) as in the MPC: x₀ fixed, input limits, unicycle speed."""
        return variable_bounds(self.settings, self.model, x0)

    def _motion_row_bounds(self):
        """Lower and upper bounds of one step's dynamics and speed rows."""
        return motion_row_bounds(self.settings, self.model)

    def _unpack(self, w):
        return unpack_plan(w, self.model.state_dim, self.model.input_dim, self.settings.horizon_steps)

    @staticmethod
    def _pack(states, inputs):
        return pack_plan(states, inputs)

    def _initial_guess(self, x0, elapsed_s):
        """Shifted previous plan, or the zero-input rollout (what the MPC starts from)."""
        N, dt = self.settings.horizon_steps, self.settings.step_s
        if self._previous is None:
            inputs = np.zeros((N, self.model.input_dim))
            return self.model.rollout(x0, inputs, dt), inputs
        states, inputs = self._previous
        state_idx, step_idx = shift_indices(N, elapsed_s, dt)
        states = states[state_idx].copy()
        inputs = inputs[step_idx].copy()
        states[0] = x0
        return states, inputs

    def reset(self):
        """Forget the previous plan."""
        self._previous = None

    def robot_position_covariances(self, guess_states, guess_inputs, P0):
        """(N, 2, 2) robot position covariance at steps 1…N along the guess (as the MPC does)."""
        s = self.settings
        covariances = propagate_along_trajectory(self.model, guess_states, guess_inputs, s.step_s, P0,
                                                 s.robot_accel_noise, s.robot_turn_noise)
        return covariances[1:, 0:2, 0:2]

    def _check_inputs(self, x0, P0, goal, forecast):
        if x0.shape != (self.model.state_dim,) or not np.all(np.isfinite(x0)):
            return "bad_input: robot state is missing, NaN or Inf"
        if not np.all(np.isfinite(P0)):
            return "bad_input: robot covariance is NaN or Inf"
        if goal.shape != (2,) or not np.all(np.isfinite(goal)):
            return "bad_input: goal is NaN or Inf"
        return forecast_problem(forecast, self.settings)

    def solve(self, x0, P0, goal, forecast, elapsed_s=None):
        """Plan from x0 (covariance P0) to `goal` among `forecast` obstacles; same contract as the MPC."""
        x0 = np.asarray(x0, dtype=float)
        goal = np.asarray(goal, dtype=float)
        reason = self._check_inputs(x0, np.asarray(P0, dtype=float), goal, forecast)
        if reason:
            return PlanResult(False, reason)
        started = time.perf_counter()
        elapsed_s = self.settings.step_s if elapsed_s is None else elapsed_s
        guess_states, guess_inputs = self._initial_guess(x0, elapsed_s)
        robot_cov = self.robot_position_covariances(guess_states, guess_inputs, P0)
        reference = goal_reference(self.settings, x0[0:2], goal)
        result = self._solve_cycle(x0, reference, forecast, robot_cov, guess_states, guess_inputs, started)
        self._previous = (result.states.copy(), result.inputs.copy()) if result.success else None
        return result

    def _solve_cycle(self, x0, reference, forecast, robot_cov, guess_states, guess_inputs, started):
        raise NotImplementedError

    @staticmethod
    def violation(w, g, lbx, ubx, lbg, ubg):
        """Largest bound or row violation of a returned point."""
        return max(np.max(lbg - g, initial=0.0), np.max(g - ubg, initial=0.0),
                   np.max(lbx - w, initial=0.0), np.max(w - ubx, initial=0.0))


def classify(solver_status, converged, capped, feasible):
    """The MPC's status words from a solver's return status and a feasibility check."""
    if solver_status in converged and feasible:
        return "solved"
    if solver_status in capped and feasible:
        return "feasible_not_converged"
    if solver_status in capped:
        return "time_or_iteration_cap"
    if "nfeasible" in solver_status or "INFEASIBLE" in solver_status:
        return "infeasible"
    return "solver_failed"


__all__ = ["BaselinePlanner", "FEASIBILITY_TOLERANCE", "PlanResult", "classify", "forecast_problem",
           "goal_reference", "plan_cost"]
