"""The convex subproblem of the sequential QP path: one dense quadratic program per iteration.

About the rollout X̄ of the current inputs Ū, the predicted states are affine in the inputs,
X ≈ X̄ + J (U − Ū) with J = ∂X/∂U (riskbound.motion.robot_models.horizon_function; exact for the
double integrator). The states are eliminated (condensed): the decision variables are the inputs
U = [u₀ … u_{N−1}] and a few slacks, and the QP matrices are formed here with numpy from J, so the
QP solver sees a small dense problem (about 50 variables) and no symbolic work runs in the cycle.

Cost: the tracking cost of riskbound.planning.problem, written as ½XᵀQX + qᵀX + ½UᵀRU with Q, R
diagonal, plus the slack penalties. Rows, per step k = 1…N:

* the speed limit (the inscribed octagon for the double integrator, v_min ≤ v ≤ v_max for the
  unicycle);
* one half-plane per obstacle slot j, n_jkᵀ p_k + s_k ≥ b_jk: the tangent of the ellipse constraint
  at p̄_k. (p − o)ᵀA(p − o) is convex in p, so its tangent under-estimates it and a plan on the
  right side of the tangent is outside the ellipse: every plan the QP returns with s = 0 meets the
  ellipse constraints of that iteration (for the unicycle, up to the linearisation of the dynamics,
  which the caller checks on the exact rollout);
* K static half-planes, nᵀp_k + s_static ≥ b (walls and pillars; unused rows far away).

The slacks s ≥ 0 (one per step, shared by that step's obstacle rows, and one for the static rows)
carry an exact L1 penalty ρ (plus a small quadratic term that keeps the Hessian positive definite,
as the active-set solvers need), so the QP is always feasible: with positive slacks the plan is
the one whose deepest violation, summed over the steps, is least, so it leaves the ellipses as
early as it can. Obstacle and static rows come normalised (unit normals,
offsets in metres), so ρ is per metre.
"""

import ctypes
import os
from contextlib import contextmanager, redirect_stdout

import casadi as ca
import numpy as np

from riskbound.planning.buffered_function import BufferedFunction
from riskbound.planning.problem import SPEED_FACE_FACTOR, SPEED_FACE_NORMALS

# ρ per metre of obstacle-row violation: the multipliers of normalised obstacle rows are the cost's
# sensitivity to moving a plan by one metre, below 1e2 with the default weights and a goal 5 m away
# (test_mpc_obstacles), so 1e3 keeps the penalty exact with a wide margin.
OBSTACLE_PENALTY_PER_M = 1.0e3
# Walls come before people when both cannot be met: a plan through a wall is never the lesser evil.
STATIC_PENALTY_PER_M = 1.0e4
# Quadratic weight on the slacks [1/m²]: makes the Hessian positive definite; far below ρ, so the
# least-violation plan moves by less than a millimetre.
SLACK_CURVATURE = 1.0
# Finite stand-in for "no bound" (some QP solvers reject infinities).
NO_BOUND = 1.0e6
QP_SOLVERS = ("qpoases", "daqp", "piqp", "osqp")
_LIBC = ctypes.CDLL(None)
_SOLVER_OPTIONS = {
    "qpoases": {"printLevel": "none", "sparse": False, "nWSR": 2000},
    "daqp": {},
    "piqp": {},
    "osqp": {"osqp": {"verbose": False, "eps_abs": 1e-6, "eps_rel": 1e-6, "max_iter": 20000}},
}


class ConvexSubproblem:
    """The dense QP of one iteration; `solve` forms its matrices from a linearisation and solves it."""

    def __init__(self, settings, model, static_planes):
        self.settings, self.model = settings, model
        s = settings
        N, M, K = s.horizon_steps, s.max_obstacles, static_planes
        m = model.input_dim
        self.static_planes = K
        self._unicycle = model.name == "unicycle"
        inputs, slacks = N * m, N + 1
        self._speed_rows = 1 if self._unicycle else len(SPEED_FACE_NORMALS)
        rows = N * (self._speed_rows + M + K)
        self._shape = (rows, inputs + slacks)
        self._make_solver()
        # Diagonal of Q (state weights, per stacked state x₁ … x_N) and R (inputs) as multiples of the
        # weights; filled in `solve` from the weights in force.
        self._H = np.zeros((inputs + slacks, inputs + slacks))
        self._A = np.zeros((rows, inputs + slacks))
        slack_index = inputs + np.arange(N)
        self._H[slack_index, slack_index] = 2.0 * SLACK_CURVATURE
        self._H[-1, -1] = 2.0 * SLACK_CURVATURE
        self._g = np.zeros(inputs + slacks)
        self._g[slack_index] = OBSTACLE_PENALTY_PER_M
        self._g[-1] = STATIC_PENALTY_PER_M
        # Row layout: step-major, [speed rows, obstacle rows, static rows] per step.
        per_step = self._speed_rows + M + K
        self._speed_index = (np.arange(N)[:, None] * per_step + np.arange(self._speed_rows)[None, :])
        self._obstacle_index = (np.arange(N)[:, None] * per_step + self._speed_rows + np.arange(M)[None, :])
        self._static_index = (np.arange(N)[:, None] * per_step + self._speed_rows + M + np.arange(K)[None, :])
        for k in range(N):
            self._A[self._obstacle_index[k], inputs + k] = 1.0
        self._A[self._static_index.ravel(), -1] = 1.0
        self._uba = np.full(rows, NO_BOUND)
        self._lba = np.zeros(rows)
        self._slack_lower = np.zeros(slacks)
        self._slack_upper = np.full(slacks, NO_BOUND)

    def _make_solver(self):
        rows, columns = self._shape
        with _quiet_stdout():
            conic = ca.conic("convex_subproblem", self.settings.qp_solver,
                             {"h": ca.Sparsity.dense(columns, columns), "a": ca.Sparsity.dense(rows, columns)},
                             dict(_SOLVER_OPTIONS[self.settings.qp_solver], print_time=False, error_on_fail=False))
        self._solver = BufferedFunction(conic)
        self._first_call = True  # the QP library prints its banner on the first solve

    def solve(self, x0, states, jacobian, inputs, reference, weights, obstacle_rows, static_rows, input_lower,
              input_upper):
        """Solve one QP. Returns (ok, solver status, inputs (N, m), largest obstacle slack, static slack).

        states: (N+1, n) rollout X̄ of `inputs` Ū (N, m); jacobian: J (n·N × m·N)
        obstacle_rows: (N, M, 3) and static_rows: (N, K, 3): n_x, n_y, b per row
        input_lower/upper: (N, m) input bounds of this iteration (limits ∩ trust region)
        """
        s = self.settings
        N = s.horizon_steps
        n, m = self.model.state_dim, self.model.input_dim
        w_goal, w_terminal, w_speed, w_accel, w_turn = weights
        # State weights of x₁ … x_N (x₀ is fixed and adds a constant).
        position_weight = np.full(N, w_goal)
        position_weight[-1] = w_terminal
        q_diag = np.zeros((N, n))
        q_diag[:, 0:2] = 2.0 * position_weight[:, None]
        if self._unicycle:
            q_diag[:, 3] = 2.0 * w_speed
            r_diag = np.tile([2.0 * w_accel, 2.0 * w_turn], N)
        else:
            q_diag[:, 2:4] = 2.0 * w_speed
            r_diag = np.full(N * m, 2.0 * w_accel)
        q_lin = np.zeros((N, n))
        q_lin[:, 0:2] = -2.0 * position_weight[:, None] * np.asarray(reference)[None, :]
        future = states[1:].ravel()
        U0 = inputs.ravel()
        offset = future - jacobian @ U0  # X = offset + J U
        Qd, ql = q_diag.ravel(), q_lin.ravel()
        nu = N * m
        self._H[:nu, :nu] = jacobian.T @ (Qd[:, None] * jacobian) + np.diag(r_diag)
        self._g[:nu] = jacobian.T @ (Qd * offset + ql)

        J3 = jacobian.reshape(N, n, nu)  # rows of x_k (k = 1…N)
        X3 = offset.reshape(N, n)
        if self._unicycle:
            speed_rows = J3[:, 3:4, :]
            speed_offset = X3[:, 3:4]
        else:
            speed_rows = np.einsum("fc,kcu->kfu", SPEED_FACE_NORMALS, J3[:, 2:4, :])
            speed_offset = X3[:, 2:4] @ SPEED_FACE_NORMALS.T
        if self._unicycle:
            speed_lower, speed_upper = s.min_speed_mps, s.max_speed_mps
        else:
            speed_lower, speed_upper = -s.max_speed_mps * SPEED_FACE_FACTOR, s.max_speed_mps * SPEED_FACE_FACTOR
        A, lba, uba = self._A, self._lba, self._uba
        A[self._speed_index, :nu] = speed_rows
        lba[self._speed_index] = speed_lower - speed_offset
        uba[self._speed_index] = speed_upper - speed_offset
        Jp, Xp = J3[:, 0:2, :], X3[:, 0:2]
        A[self._obstacle_index, :nu] = np.einsum("kjc,kcu->kju", obstacle_rows[..., 0:2], Jp)
        lba[self._obstacle_index] = obstacle_rows[..., 2] - np.einsum("kjc,kc->kj", obstacle_rows[..., 0:2], Xp)
        if self.static_planes:
            A[self._static_index, :nu] = np.einsum("kic,kcu->kiu", static_rows[..., 0:2], Jp)
            lba[self._static_index] = static_rows[..., 2] - np.einsum("kic,kc->ki", static_rows[..., 0:2], Xp)
        arguments = dict(h=self._H, g=self._g, a=A, lba=lba, uba=uba,
                         lbx=np.concatenate([np.ravel(input_lower), self._slack_lower]),
                         ubx=np.concatenate([np.ravel(input_upper), self._slack_upper]))
        if self._first_call:
            self._first_call = False
            with _quiet_stdout():
                out = self._solver(**arguments)
        else:
            out = self._solver(**arguments)
        stats = self._solver.stats()
        x = out["x"]
        ok = bool(stats.get("success", False)) and bool(np.all(np.isfinite(x)))
        status = str(stats.get("return_status", "unknown"))
        if not ok:
            # The active-set solver starts each QP from the last one's working set (a hot start);
            # after a failure that state is unusable and every later QP would fail too. A fresh
            # solver (about a millisecond to build) starts clean for the next call.
            self._make_solver()
        return (ok, status, x[:nu].reshape(N, m).copy(), float(np.max(x[nu: nu + N], initial=0.0)),
                float(x[-1]))


def input_limits(settings, model):
    """Per-step input bounds (lower, upper), each (N, m): per-axis acceleration, or acceleration and turn rate."""
    N = settings.horizon_steps
    if model.name == "unicycle":
        upper = np.array([settings.max_accel_mps2, settings.max_turn_rate_radps])
    else:
        upper = np.full(model.input_dim, settings.max_accel_mps2)
    return np.tile(-upper, (N, 1)), np.tile(upper, (N, 1))


@contextmanager
def _quiet_stdout():
    """Silence the QP library's start-up banner (written through CasADi to Python's stdout, or to fd 1)."""
    try:
        fd = os.dup(1)
    except OSError:
        yield
        return
    try:
        with open(os.devnull, "w") as devnull, redirect_stdout(devnull):
            os.dup2(devnull.fileno(), 1)
            yield
            _LIBC.fflush(None)  # C's stdout buffer still holds the banner: flush it to /dev/null
    finally:
        os.dup2(fd, 1)
        os.close(fd)
