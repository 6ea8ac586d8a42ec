"""Linearised formulation: each obstacle constraint replaced by a half-plane about the previous plan.

For obstacle j at step k, take the linearisation point p̄_k (the previous plan shifted by the time
elapsed, or the zero-input rollout on a cold start) and the outward normal of the MPC's ellipse
there, n_jk ∝ A_jk (p̄_k − o_jk). The robot must stay on the far side of the half-plane

    n_jk·(p_k − ô_jk) ≥ s_jk(n_jk) + Φ⁻¹(1 − a)·√(n_jkᵀ Σ_jk n_jk)

with s(n) = Σᵢ |n·eᵢ| (hᵢ + r) the support of the grown obstacle box in direction n, Σ the relative
position covariance and a the MPC's per-constraint risk. A half-plane with that offset contains no
point of the box, and for a single linear constraint the Gaussian back-off is exact, so
P(p_k in box) ≤ P(n·(p_k − o) < s(n)) = a: the same chance constraint as the MPC's, made linear.

With the double integrator the cycle is a convex QP (solved with the dual active-set solver
DAQP shipped with CasADi; its `qrqp` returned infeasible points here);
with the unicycle the dynamics stay nonlinear and IPOPT solves the NLP. One linearisation per
control cycle (`passes` = 1) is the formulation as used in closed loop; more passes re-linearise
about the new plan within the same cycle (sequential convex programming) for open-loop use.
"""

import time
from dataclasses import dataclass

import casadi as ca
import numpy as np

from riskbound.planning.baselines.common import (FEASIBILITY_TOLERANCE, BaselinePlanner, PlanResult,
                                                 classify, plan_cost)
from riskbound.planning.obstacle_constraints import build_obstacle_constraints
from riskbound.risk.box import face_normals
from riskbound.risk.quantile import chance_constraint_backoff

# An unused slot: the half-plane x ≥ −10 km around the robot, never active.
UNUSED_OFFSET_M = -1.0e4
# Plans closer than this (largest position change) end the passes of one cycle.
PASS_CONVERGENCE_M = 1e-3
_CAPPED = {"Maximum_Iterations_Exceeded", "Maximum_WallTime_Exceeded", "Maximum_CpuTime_Exceeded",
           "DAQP_ITERATION_LIMIT"}
# DAQP reports its exit flag as a number (the EXIT_* constants of its C interface).
_DAQP_EXIT = {"1": "DAQP_OPTIMAL", "2": "DAQP_SOFT_OPTIMAL", "-1": "DAQP_INFEASIBLE", "-2": "DAQP_CYCLING",
              "-3": "DAQP_UNBOUNDED", "-4": "DAQP_ITERATION_LIMIT", "-5": "DAQP_NONCONVEX",
              "-6": "DAQP_OVERDETERMINED_INITIAL"}


@dataclass
class HalfPlaneConstraints:
    """Half-planes n·p ≥ c of one cycle: normals (M, N, 2), offsets (M, N) (in world coordinates),
    linearisation points (N, 2), used (M,), track_ids (M,), risk, considered, dropped, and the
    relative covariances (M, N, 2, 2) and grown half-extents (M, 2) the offsets were built from."""

    normals: np.ndarray
    offsets: np.ndarray
    points: np.ndarray
    used: np.ndarray
    track_ids: np.ndarray
    risk: float
    considered: int
    dropped: int
    centres: np.ndarray
    headings: np.ndarray
    covariances: np.ndarray
    grown_half_extents: np.ndarray


def half_planes(forecast, robot_position_covariances, robot_position, points, settings):
    """Prune and allocate risk as the MPC does; linearise every kept obstacle about `points` (N, 2)."""
    N, slots = settings.horizon_steps, settings.max_obstacles
    ellipses = build_obstacle_constraints(forecast, robot_position_covariances, robot_position, settings)
    n = ellipses.considered
    normals = np.tile([1.0, 0.0], (slots, N, 1))
    offsets = np.full((slots, N), UNUSED_OFFSET_M + float(robot_position[0]))
    centres = np.zeros((slots, N, 2))
    headings = np.zeros((slots, N))
    covariances = np.zeros((slots, N, 2, 2))
    grown = np.zeros((slots, 2))
    if n:
        index = {int(track): i for i, track in enumerate(forecast.track_ids)}
        kept = np.array([index[int(track)] for track in ellipses.track_ids[:n]])
        centres[:n] = forecast.positions[kept]
        headings[:n] = forecast.headings[kept]
        covariances[:n] = forecast.covariances[kept] + robot_position_covariances[None]
        grown[:n] = forecast.half_extents[kept] + settings.robot_radius_m
        d = np.asarray(points)[None, :, :] - centres[:n]
        gradient = np.einsum("jkab,jkb->jka", ellipses.shapes[:n], d)
        length = np.linalg.norm(gradient, axis=-1)
        # A linearisation point on the centre has no gradient: push away from the robot's position.
        fallback = np.asarray(robot_position)[None, None, :] - centres[:n]
        fallback_length = np.linalg.norm(fallback, axis=-1)
        fallback = np.where(fallback_length[..., None] > 1e-9,
                            fallback / np.maximum(fallback_length, 1e-300)[..., None], np.array([1.0, 0.0]))
        unit = np.where(length[..., None] > 1e-9, gradient / np.maximum(length, 1e-300)[..., None], fallback)
        normals[:n] = unit
        axes = face_normals(headings[:n])  # (n, N, 2, 2): rows along and across the heading
        support = np.sum(np.abs(np.einsum("jkic,jkc->jki", axes, unit)) * grown[:n, None, :], axis=-1)
        sigma = np.sqrt(np.maximum(np.einsum("jka,jkab,jkb->jk", unit, covariances[:n], unit), 0.0))
        offsets[:n] = np.einsum("jkc,jkc->jk", unit, centres[:n]) + support \
            + chance_constraint_backoff(ellipses.risk) * sigma
    return HalfPlaneConstraints(normals, offsets, np.asarray(points, dtype=float), ellipses.used.copy(),
                                ellipses.track_ids.copy(), ellipses.risk, n, ellipses.dropped, centres,
                                headings, covariances, grown)


class LinearisedPlanner(BaselinePlanner):
    """Half-planes about the previous plan, one convex QP (or NLP for the unicycle) per pass."""

    def __init__(self, settings, passes=1):
        super().__init__(settings)
        if int(passes) != passes or not 1 <= passes <= 50:
            raise ValueError(f"passes={passes!r} is out of range: must be an integer in [1, 50]")
        self.passes = int(passes)
        self._build()

    def _build(self):
        s = self.settings
        N, M = s.horizon_steps, s.max_obstacles
        X, U, w, reference, weights, cost, step_rows = self._symbols()
        plane = ca.SX.sym("plane", 3, M * N)  # per (step, slot): n_x, n_y, c
        g = []
        for k in range(N):
            g.extend(step_rows[k])
            for j in range(M):
                col = plane[:, k * M + j]
                g.append(col[0] * X[k + 1][0] + col[1] * X[k + 1][1] - col[2])
        problem = {"x": w, "f": cost, "g": ca.vertcat(*g), "p": ca.vertcat(reference, weights, ca.vec(plane))}
        if self.model.name == "unicycle":
            self.solver_name = "ipopt"
            self._solver = ca.nlpsol("linearised", "ipopt", problem, {
                "print_time": False, "ipopt.print_level": 0, "ipopt.sb": "yes",
                "ipopt.max_iter": s.solver_max_iter, "ipopt.tol": s.solver_tolerance})
        else:
            self.solver_name = "daqp"
            self._solver = ca.qpsol("linearised", "daqp", problem, {"print_time": False, "error_on_fail": False})
        lower, upper = self._motion_row_bounds()
        self._lbg = np.tile(np.concatenate([lower, np.zeros(M)]), N)
        self._ubg = np.tile(np.concatenate([upper, np.full(M, np.inf)]), N)

    def _solve_cycle(self, x0, reference, forecast, robot_cov, guess_states, guess_inputs, started):
        s = self.settings
        N = s.horizon_steps
        lbx, ubx = self._variable_bounds(x0)
        states, inputs = guess_states, guess_inputs
        iterations = 0
        accepted = None  # (states, inputs, half-planes, status, solver status) of the last good pass
        for _ in range(self.passes):
            planes = half_planes(forecast, robot_cov, x0[0:2], states[1:, 0:2], s)
            column = np.concatenate([planes.normals, planes.offsets[..., None]], axis=-1)  # (M, N, 3)
            p = np.concatenate([reference, self._weights(), column.transpose(1, 0, 2).ravel()])
            solution = self._solver(x0=self._pack(states, inputs), p=p, lbx=lbx, ubx=ubx,
                                    lbg=self._lbg, ubg=self._ubg)
            stats = self._solver.stats()
            iterations += int(stats.get("iter_count", 0) or 0)
            w = np.asarray(solution["x"]).ravel()
            g = np.asarray(solution["g"]).ravel()
            finite = bool(np.all(np.isfinite(w)))
            feasible = finite and self.violation(w, g, lbx, ubx, self._lbg, self._ubg) <= FEASIBILITY_TOLERANCE
            solver_status = str(stats.get("return_status", "unknown"))
            solver_status = _DAQP_EXIT.get(solver_status, solver_status)
            # QP solvers word success differently (DAQP returns a number): trust their flag.
            converged = {solver_status} if stats.get("success", False) else set()
            status = classify(solver_status, converged, _CAPPED, feasible)
            if status not in ("solved", "feasible_not_converged"):
                break
            new_states, new_inputs = self._unpack(w)
            moved = np.max(np.abs(new_states[:, 0:2] - states[:, 0:2]))
            states, inputs = new_states, new_inputs
            accepted = (states, inputs, planes, status, solver_status)
            if moved < PASS_CONVERGENCE_M:
                break
        solve_ms = 1e3 * (time.perf_counter() - started)
        success = accepted is not None
        if success:
            states, inputs, planes, status, solver_status = accepted
        else:
            states, inputs = self._unpack(w) if finite else (guess_states, guess_inputs)
        margin = float("inf")
        if planes.considered and success:
            values = np.einsum("jkc,kc->jk", planes.normals, states[1:, 0:2]) - planes.offsets
            margin = float(values[: planes.considered].min())
        finite = bool(np.all(np.isfinite(states)))
        return PlanResult(
            success=success, status=status, solver_status=solver_status, solve_ms=solve_ms,
            iterations=iterations, cost=plan_cost(s, states, inputs, reference) if finite else float("nan"),
            obstacles_considered=planes.considered, obstacles_dropped=planes.dropped,
            risk_per_constraint=planes.risk, min_margin_m=margin, times=s.step_s * np.arange(N + 1),
            states=states, inputs=inputs, constraints=planes)
