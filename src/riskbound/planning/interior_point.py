"""The interior-point reference path: the full NLP with the ellipse constraints, solved by IPOPT.

The goal-tracking problem (cost, dynamics, limits) is riskbound.planning.problem's; this path adds,
for every step k = 1…N and obstacle slot j, the ellipse constraint

    (p_k − o_jk)ᵀ A_jk (p_k − o_jk) ≥ 1

Obstacle centres o_jk and shape matrices A_jk (which carry the risk-dependent inflation), the
reference and the weights are solver parameters, so a new risk level or new weights need no
rebuild; horizon, step, model, slot count and solver caps do.

With `infeasible_response: least_violation` the ellipse rows are softened with one slack s_jk ≥ 0
each, (p_k − o_jk)ᵀ A_jk (p_k − o_jk) + s_jk ≥ 1, and ρ Σ s_jk is added to the cost (an exact L1
penalty: for ρ above the largest constraint multiplier, a solution of the hard problem is a
solution of the soft one, Numerical Optimization, 2nd ed., 2006, Sec. 17.2, Theorem 17.3, value
from memory; see VIOLATION_PENALTY).
"""

from dataclasses import dataclass

import casadi as ca
import numpy as np

from riskbound.planning.buffered_function import BufferedFunction
from riskbound.planning.problem import (motion_row_bounds, pack_plan, shift_indices, tracking_problem, unpack_plan,
                                        variable_bounds, weight_values)

# IPOPT return statuses whose iterate we may use if it is also feasible.
CONVERGED = {"Solve_Succeeded", "Solved_To_Acceptable_Level"}
CAPPED = {"Maximum_Iterations_Exceeded", "Maximum_WallTime_Exceeded", "Maximum_CpuTime_Exceeded"}
# Largest constraint violation accepted in a returned plan (IPOPT's default constr_viol_tol).
FEASIBILITY_TOLERANCE = 1e-4
# ρ of the least_violation response, per unit of ellipse-row violation. The multipliers of the
# ellipse rows are the cost's sensitivity to pushing a plan out by one unit of dᵀAd: with the
# default weights and a goal 5 m away they reach 31 (test_mpc_obstacles), so 1e3 keeps the
# penalty exact with a wide margin.
VIOLATION_PENALTY = 1e3


@dataclass
class InteriorPointOutcome:
    states: np.ndarray
    inputs: np.ndarray
    status: str  # solved | feasible_not_converged | least_violation | time_or_iteration_cap | infeasible | solver_failed
    solver_status: str
    iterations: int
    max_violation: float
    multipliers: tuple  # (lam_x, lam_g) for the next warm start


class InteriorPointPath:
    """Builds the NLP once; `solve` runs IPOPT warm (with multipliers) or cold."""

    def __init__(self, settings, model, soft):
        self.settings, self.model, self.soft = settings, model, soft
        s = settings
        N, M = s.horizon_steps, s.max_obstacles
        X, U, w, reference, weights, cost, step_rows = tracking_problem(s, model)
        obstacle = ca.SX.sym("obstacle", 5, M * N)  # per (step, slot): o_x, o_y, A₁₁, A₁₂, A₂₂
        slack = ca.SX.sym("slack", M * N if soft else 0)
        g = []
        for k in range(N):
            g.extend(step_rows[k])
            for j in range(M):
                col = obstacle[:, k * M + j]
                d = X[k + 1][0:2] - col[0:2]
                q = col[2] * d[0] ** 2 + 2 * col[3] * d[0] * d[1] + col[4] * d[1] ** 2
                g.append(q + slack[k * M + j] if soft else q)
        if soft:
            w = ca.vertcat(w, slack)
            cost += VIOLATION_PENALTY * ca.sum1(slack)
        self._slack_count = slack.shape[0]
        self._plan_size = w.shape[0] - self._slack_count
        p = ca.vertcat(reference, weights, ca.vec(obstacle))
        g = ca.vertcat(*g)
        common = {
            "print_time": False, "ipopt.print_level": 0, "ipopt.sb": "yes",
            "ipopt.max_iter": s.solver_max_iter, "ipopt.max_wall_time": s.deadline_s,
            "ipopt.tol": s.solver_tolerance, "ipopt.acceptable_tol": max(10 * s.solver_tolerance, 1e-6),
            "ipopt.acceptable_iter": 3, "ipopt.mu_strategy": "monotone",
        }
        # From a shifted previous solution the barrier starts small and the iterate is not pushed
        # away from its bounds, so IPOPT stays near the old optimum: a few iterations per cycle.
        warm = dict(common, **{
            "ipopt.warm_start_init_point": "yes", "ipopt.mu_init": 1e-4,
            "ipopt.warm_start_bound_push": 1e-9, "ipopt.warm_start_slack_bound_push": 1e-9,
            "ipopt.warm_start_mult_bound_push": 1e-9,
        })
        nlp = {"x": w, "f": cost, "g": g, "p": p}
        self._cold = BufferedFunction(ca.nlpsol("chance_constrained_mpc_cold", "ipopt", nlp, common))
        self._warm = BufferedFunction(ca.nlpsol("chance_constrained_mpc_warm", "ipopt", nlp, warm))
        self._row = g.shape[0] // N  # constraint rows per step: dynamics, speed, obstacle slots

    def shifted_multipliers(self, multipliers, elapsed_s):
        """The previous cycle's multipliers moved forward like the plan."""
        N, dt = self.settings.horizon_steps, self.settings.step_s
        lam_x, lam_g = multipliers
        idx, step_idx = shift_indices(N, elapsed_s, dt)
        lam_states, lam_inputs = unpack_plan(lam_x, self.model.state_dim, self.model.input_dim, N)
        lam_slack = lam_x[self._plan_size:].reshape(N, -1)[step_idx]
        return (pack_plan(lam_states[idx], lam_inputs[step_idx]), lam_g.reshape(N, self._row)[step_idx].ravel(),
                lam_slack)

    def solve(self, x0, reference, constraints, guess_states, guess_inputs, warm=None, same_obstacle=None):
        """One IPOPT solve. warm: (lam_x, lam_g, lam_slack) shifted, or None for a cold start;
        same_obstacle (M,) bool: slots holding the same track as last cycle keep their multipliers."""
        s, model = self.settings, self.model
        N, M = s.horizon_steps, s.max_obstacles
        shapes = constraints.shapes
        obstacle = np.stack([constraints.centres[..., 0], constraints.centres[..., 1], shapes[..., 0, 0],
                             shapes[..., 0, 1], shapes[..., 1, 1]], axis=-1)  # (M, N, 5)
        obstacle = obstacle.transpose(1, 0, 2).reshape(N * M, 5)  # column k·M + j
        p = np.concatenate([reference, weight_values(s), obstacle.ravel()])
        lbx, ubx = variable_bounds(s, model, x0)
        motion_lower, motion_upper = motion_row_bounds(s, model)
        lbg = np.tile(np.concatenate([motion_lower, np.ones(M)]), N)
        ubg = np.tile(np.concatenate([motion_upper, np.full(M, np.inf)]), N)
        guess = pack_plan(guess_states, guess_inputs)
        if self.soft:
            lbx = np.concatenate([lbx, np.zeros(self._slack_count)])
            ubx = np.concatenate([ubx, np.full(self._slack_count, np.inf)])
            # Each slack starts at the violation of the guess (zero where the guess is clear).
            d = guess_states[None, 1:, 0:2] - constraints.centres
            q = np.einsum("jki,jkil,jkl->kj", d, shapes, d)  # (N, M), column order k·M + j
            guess = np.concatenate([guess, np.maximum(1.0 - q, 0.0).ravel()])
        args = {"x0": guess, "p": p, "lbx": lbx, "ubx": ubx, "lbg": lbg, "ubg": ubg}
        if warm is not None:
            lam_x, lam_g, lam_slack = warm
            lam_g = lam_g.reshape(N, self._row).copy()
            lam_g[:, self._row - M:][:, ~same_obstacle] = 0.0
            if self.soft:
                lam_slack = lam_slack.copy()
                lam_slack[:, ~same_obstacle] = 0.0
                lam_x = np.concatenate([lam_x, lam_slack.ravel()])
            args["lam_x0"], args["lam_g0"] = lam_x, lam_g.ravel()
        solver = self._cold if warm is None else self._warm
        solution = solver(**args)
        stats = solver.stats()
        solver_status = stats.get("return_status", "unknown")
        w = solution["x"].copy()
        g = solution["g"]
        violation = max(np.max(lbg - g, initial=0.0), np.max(g - ubg, initial=0.0),
                        np.max(lbx - w, initial=0.0), np.max(w - ubx, initial=0.0))
        finite = bool(np.all(np.isfinite(w)))
        feasible = finite and violation <= FEASIBILITY_TOLERANCE
        softened = float(np.max(w[self._plan_size:], initial=0.0)) if finite else float("nan")
        if solver_status in CONVERGED and feasible:
            status = "solved"
        elif solver_status in CAPPED and feasible:
            status = "feasible_not_converged"
        elif solver_status in CAPPED:
            status = "time_or_iteration_cap"
        elif "Infeasible" in solver_status:
            status = "infeasible"
        else:
            status = "solver_failed"
        if status in ("solved", "feasible_not_converged") and softened > FEASIBILITY_TOLERANCE:
            status = "least_violation"  # a usable motion, but it enters at least one ellipse
        states, inputs = unpack_plan(w, model.state_dim, model.input_dim, N)
        return InteriorPointOutcome(states, inputs, status, solver_status, int(stats.get("iter_count", 0)), softened,
                                    (solution["lam_x"].copy(), solution["lam_g"].copy()))
