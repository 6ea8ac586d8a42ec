"""Mixed-integer disjunctive formulation: exact for the inflated box, combinatorial (benchmark baseline).

Each obstacle j at step k is the deterministic-equivalent box of `riskbound.risk.box`: face pair i
(i = 1 along the heading, 2 across) with unit normal nᵢ sits at Hᵢ = hᵢ + r + Φ⁻¹(1 − a)·√(nᵢᵀ Σ nᵢ)
from the centre, with the same per-constraint risk a as the MPC (`build_obstacle_constraints`).
Outside the box means at least one of the four faces f = (i, ±) holds, a disjunction written with one
binary b_jkf per face and a big-M relaxation of the others:

    ±nᵢ·(p_k − o_jk) ≥ Hᵢ − M_jk (1 − b_jkf),      Σ_f b_jkf ≥ 1,     b_jkf ∈ {0, 1}

M_jk = max Hᵢ + ‖o_jk − p₀‖ + (v_max + a_max Δt) t_k + 1 m bounds |nᵢ·(p_k − o_jk)| + Hᵢ for any
position the robot can reach by step k, so a relaxed face never cuts off a reachable position.

With the double integrator every relaxation is a convex QP, so branch-and-bound returns the global
optimum over the inflated boxes: the reference optimum of the benchmark. With the unicycle the
relaxations are non-convex and the result is only a local optimum. The MINLP is solved with
bonmin (shipped with CasADi), NLP-based branch-and-bound, with its own time cap (`time_limit_s`).
"""

import contextlib
import os
import sys
import time
from dataclasses import dataclass

import casadi as ca
import numpy as np

from riskbound.planning.baselines.common import (FEASIBILITY_TOLERANCE, BaselinePlanner, PlanResult,
                                                 classify, plan_cost)
from riskbound.planning.obstacle_constraints import build_obstacle_constraints
from riskbound.risk.box import face_normals, inflated_half_extents

FACES = 4  # +n₁, −n₁, +n₂, −n₂
# Face f uses normal pair FACE_AXIS[f] with sign FACE_SIGN[f].
FACE_AXIS = np.array([0, 0, 1, 1])
FACE_SIGN = np.array([1.0, -1.0, 1.0, -1.0])
# Per (step, slot): o_x, o_y, cos ψ, sin ψ, H₁, H₂, M.
SLOT_PARAMETERS = 7
# An unused slot: faces pushed far inside so every row holds; its binaries are fixed to 1.
UNUSED_FACE_OFFSET_M = -1.0e4
_CONVERGED = {"SUCCESS"}
_CAPPED = {"LIMIT_EXCEEDED", "TIME_LIMIT", "MINLP_ERROR_TIME_LIMIT"}


@dataclass
class BoxConstraints:
    """Numbers of the disjunctive constraints of one cycle (for checks and plots).

    centres: (M, N, 2), headings: (M, N), inflated_half_extents: (M, N, 2) = (H₁, H₂),
    big_m: (M, N), used: (M,), track_ids: (M,), risk: per-constraint risk, considered, dropped,
    robot_position_covariances: (N, 2, 2) used in the back-off, faces: (M, N, 4) chosen binaries.
    """

    centres: np.ndarray
    headings: np.ndarray
    inflated_half_extents: np.ndarray
    big_m: np.ndarray
    used: np.ndarray
    track_ids: np.ndarray
    risk: float
    considered: int
    dropped: int
    robot_position_covariances: np.ndarray
    faces: np.ndarray = None


def inflated_boxes(forecast, robot_position_covariances, robot_position, settings):
    """Prune and allocate risk as the MPC does, then return the inflated box of every kept obstacle."""
    N, slots = settings.horizon_steps, settings.max_obstacles
    ellipses = build_obstacle_constraints(forecast, robot_position_covariances, robot_position, settings)
    n = ellipses.considered
    centres = np.zeros((slots, N, 2))
    headings = np.zeros((slots, N))
    half = np.full((slots, N, 2), UNUSED_FACE_OFFSET_M)
    big_m = np.zeros((slots, N))
    if n:
        index = {int(track): i for i, track in enumerate(forecast.track_ids)}
        kept = np.array([index[int(track)] for track in ellipses.track_ids[:n]])
        centres[:n] = forecast.positions[kept]
        headings[:n] = forecast.headings[kept]
        covariance = forecast.covariances[kept] + robot_position_covariances[None]
        half[:n] = inflated_half_extents(forecast.half_extents[kept, None, :], headings[:n],
                                         settings.robot_radius_m, covariance, ellipses.risk)
        reach = (settings.max_speed_mps + settings.max_accel_mps2 * settings.step_s) * forecast.times
        distance = np.linalg.norm(centres[:n] - np.asarray(robot_position)[None, None, :], axis=-1)
        big_m[:n] = half[:n].max(axis=-1) + distance + reach[None, :] + 1.0
    return BoxConstraints(centres, headings, half, big_m, ellipses.used.copy(), ellipses.track_ids.copy(),
                          ellipses.risk, n, ellipses.dropped, robot_position_covariances)


def face_values(positions, boxes):
    """±nᵢ·(p_k − o_jk) − Hᵢ for every slot, step and face: (M, N, 4); ≥ 0 where the face holds."""
    d = np.asarray(positions)[None, :, :] - boxes.centres
    normals = face_normals(boxes.headings)  # (M, N, 2, 2)
    along = np.einsum("jkic,jkc->jki", normals, d)  # (M, N, 2)
    return FACE_SIGN * along[..., FACE_AXIS] - boxes.inflated_half_extents[..., FACE_AXIS]


@contextlib.contextmanager
def quiet_stdout():
    """Silence the process's standard output while bonmin runs.

    bonmin's branch-and-bound writes one line per node to file descriptor 1 whatever its log levels
    are set to; in a closed loop that is thousands of lines per cycle.
    """
    sys.stdout.flush()
    saved = os.dup(1)
    try:
        with open(os.devnull, "w") as sink:
            os.dup2(sink.fileno(), 1)
            yield
    finally:
        os.dup2(saved, 1)
        os.close(saved)


class MixedIntegerPlanner(BaselinePlanner):
    """One binary per obstacle face and step; solved to optimality (up to `time_limit_s`) by bonmin."""

    solver_name = "bonmin"

    def __init__(self, settings, time_limit_s=120.0):
        super().__init__(settings)
        if not time_limit_s > 0.0:
            raise ValueError(f"time_limit_s={time_limit_s!r} must be positive")
        self.time_limit_s = float(time_limit_s)
        self._build()

    def _build(self):
        s = self.settings
        N, M = s.horizon_steps, s.max_obstacles
        X, U, w, reference, weights, cost, step_rows = self._symbols()
        b = ca.SX.sym("b", FACES * M * N)  # index (k·M + j)·4 + f
        slot = ca.SX.sym("slot", SLOT_PARAMETERS, M * N)
        g = []
        for k in range(N):
            g.extend(step_rows[k])
            for j in range(M):
                col = slot[:, k * M + j]
                d = X[k + 1][0:2] - col[0:2]
                along = col[2] * d[0] + col[3] * d[1]
                across = -col[3] * d[0] + col[2] * d[1]
                base = (k * M + j) * FACES
                g.append(along - col[4] + col[6] * (1 - b[base]))
                g.append(-along - col[4] + col[6] * (1 - b[base + 1]))
                g.append(across - col[5] + col[6] * (1 - b[base + 2]))
                g.append(-across - col[5] + col[6] * (1 - b[base + 3]))
                g.append(ca.sum1(b[base: base + FACES]))
        nlp = {"x": ca.vertcat(w, b), "f": cost, "g": ca.vertcat(*g),
               "p": ca.vertcat(reference, weights, ca.vec(slot))}
        # bonmin returns no row values through CasADi; the feasibility check evaluates them itself.
        self._rows = ca.Function("mixed_integer_rows", [nlp["x"], nlp["p"]], [nlp["g"]])
        self._n_w = w.shape[0]
        self._n_b = b.shape[0]
        options = {
            "discrete": [False] * self._n_w + [True] * self._n_b,
            "print_time": False,
            "bonmin.algorithm": "B-BB",
            "bonmin.time_limit": self.time_limit_s,
            "bonmin.print_level": 0,
            "bonmin.bb_log_level": 0,
            "bonmin.nlp_log_level": 0,
            "bonmin.fp_log_level": 0,
            "bonmin.lp_log_level": 0,
            "bonmin.milp_log_level": 0,
            "bonmin.oa_log_level": 0,
            "bonmin.nlp_log_at_root": 0,
            "bonmin.allowable_gap": 1e-6,
            "bonmin.allowable_fraction_gap": 1e-6,
            "bonmin.integer_tolerance": 1e-6,
            "bonmin.tol": s.solver_tolerance * 1e-2,
        }
        self._solver = ca.nlpsol("mixed_integer_disjunctive", "bonmin", nlp, options)
        lower, upper = self._motion_row_bounds()
        self._lbg = np.tile(np.concatenate([lower, np.tile([0.0, 0.0, 0.0, 0.0, 1.0], M)]), N)
        self._ubg = np.tile(np.concatenate([upper, np.full(5 * M, np.inf)]), N)

    def _solve_cycle(self, x0, reference, forecast, robot_cov, guess_states, guess_inputs, started):
        s = self.settings
        N, M = s.horizon_steps, s.max_obstacles
        boxes = inflated_boxes(forecast, robot_cov, x0[0:2], s)
        slot = np.stack([boxes.centres[..., 0], boxes.centres[..., 1], np.cos(boxes.headings),
                         np.sin(boxes.headings), boxes.inflated_half_extents[..., 0],
                         boxes.inflated_half_extents[..., 1], boxes.big_m], axis=-1)  # (M, N, 7)
        p = np.concatenate([reference, self._weights(), slot.transpose(1, 0, 2).ravel()])
        lbx_w, ubx_w = self._variable_bounds(x0)
        lbb, ubb = np.zeros((N, M, FACES)), np.ones((N, M, FACES))
        lbb[:, ~boxes.used, :] = 1.0  # unused slots: nothing to branch on
        # Start every binary at the face the guess satisfies best, so bonmin has an incumbent path.
        guess_faces = face_values(guess_states[1:, 0:2], boxes)  # (M, N, 4)
        b0 = (guess_faces == guess_faces.max(axis=-1, keepdims=True)).astype(float).transpose(1, 0, 2)
        b0[:, ~boxes.used, :] = 1.0
        lbx = np.concatenate([lbx_w, lbb.ravel()])
        ubx = np.concatenate([ubx_w, ubb.ravel()])
        x_init = np.concatenate([self._pack(guess_states, guess_inputs), b0.ravel()])
        with quiet_stdout():
            solution = self._solver(x0=x_init, p=p, lbx=lbx, ubx=ubx, lbg=self._lbg, ubg=self._ubg)
        solve_ms = 1e3 * (time.perf_counter() - started)
        stats = self._solver.stats()
        solver_status = str(stats.get("return_status", "unknown"))
        x = np.asarray(solution["x"]).ravel()
        g = np.asarray(self._rows(x, p)).ravel()
        finite = bool(np.all(np.isfinite(x)))
        feasible = finite and self.violation(x, g, lbx, ubx, self._lbg, self._ubg) <= FEASIBILITY_TOLERANCE
        status = classify(solver_status, _CONVERGED, _CAPPED, feasible)
        states, inputs = self._unpack(x[: self._n_w])
        boxes.faces = np.round(x[self._n_w:]).reshape(N, M, FACES).transpose(1, 0, 2)
        margin = float("inf")
        if boxes.considered and finite:
            margin = float(face_values(states[1:, 0:2], boxes)[: boxes.considered].max(axis=-1).min())
        return PlanResult(
            success=status in ("solved", "feasible_not_converged"), status=status,
            solver_status=solver_status, solve_ms=solve_ms, iterations=int(stats.get("iter_count", 0) or 0),
            cost=plan_cost(s, states, inputs, reference) if finite else float("nan"),
            obstacles_considered=boxes.considered, obstacles_dropped=boxes.dropped,
            risk_per_constraint=boxes.risk, min_margin_m=margin, times=s.step_s * np.arange(N + 1),
            states=states, inputs=inputs, constraints=boxes)
