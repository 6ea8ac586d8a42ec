"""The goal-tracking optimal control problem shared by the MPC and the benchmark baselines.

Decision vector, step by step: w = [x₀, u₀, x₁, u₁, …, x_{N−1}, u_{N−1}, x_N].

    cost = Σ_{k<N} [ w_g ‖p_k − r‖² + w_s ‖v_k‖² + w_a a_k² (+ w_ω ω_k²) ] + w_T ‖p_N − r‖² + w_s ‖v_N‖²

Per step k the rows are the dynamics x_{k+1} − f(x_k, u_k) = 0 and, for the double integrator, the
speed limit: the regular octagon inscribed in the disc ‖v‖ ≤ v_max, written as
|nᵢ·v| ≤ v_max cos(π/8) for four face normals. Linear rows keep the KKT system free of the
curvature that a quadratic ‖v‖² ≤ v_max² row adds, and the inscribed octagon never exceeds v_max.
Obstacle rows are each formulation's own and are appended after these.
"""

import casadi as ca
import numpy as np

SPEED_FACE_NORMALS = np.array([[np.cos(a), np.sin(a)] for a in np.arange(4) * np.pi / 4])
SPEED_FACE_FACTOR = np.cos(np.pi / 8)


def tracking_problem(settings, model):
    """Symbols and rows: (X, U, w, reference, weights, cost, step_rows), step_rows[k] a list of row blocks.

    reference (2) and weights (5: goal, terminal, speed, accel, turn) are symbols to be made
    parameters of the solver, so tuning them needs no rebuild.
    """
    N, n, m, dt = settings.horizon_steps, model.state_dim, model.input_dim, settings.step_s
    X = [ca.SX.sym(f"x{k}", n) for k in range(N + 1)]
    U = [ca.SX.sym(f"u{k}", m) for k in range(N)]
    reference = ca.SX.sym("reference", 2)
    weights = ca.SX.sym("weights", 5)
    w_goal, w_terminal, w_speed, w_accel, w_turn = (weights[i] for i in range(5))
    unicycle = model.name == "unicycle"

    def speed_sq(x):
        return x[3] ** 2 if unicycle else ca.sumsqr(x[2:4])

    def input_cost(u):
        return w_accel * u[0] ** 2 + w_turn * u[1] ** 2 if unicycle else w_accel * ca.sumsqr(u)

    cost = 0
    step_rows = []
    for k in range(N):
        cost += w_goal * ca.sumsqr(X[k][0:2] - reference) + w_speed * speed_sq(X[k]) + input_cost(U[k])
        rows = [X[k + 1] - model.discrete_step(X[k], U[k], dt)]
        if not unicycle:
            rows.append(ca.mtimes(SPEED_FACE_NORMALS, X[k + 1][2:4]))
        step_rows.append(rows)
    cost += w_terminal * ca.sumsqr(X[N][0:2] - reference) + w_speed * speed_sq(X[N])
    w = ca.vertcat(*[ca.vertcat(X[k], U[k]) for k in range(N)], X[N])
    return X, U, w, reference, weights, cost, step_rows


def weight_values(settings):
    """Numbers for the `weights` symbol, in its order."""
    return [settings.weight_goal, settings.weight_terminal, settings.weight_speed, settings.weight_accel,
            settings.weight_turn]


def variable_bounds(settings, model, x0):
    """Bounds (lbx, ubx) on w: x₀ fixed, input limits (per axis for the double integrator: motor or
    tilt limits act per axis on most platforms), the unicycle's forward-speed range."""
    N, n, m = settings.horizon_steps, model.state_dim, model.input_dim
    lbx = np.full((N + 1) * (n + m) - m, -np.inf)
    ubx = np.full_like(lbx, np.inf)
    lbx[:n] = ubx[:n] = x0
    steps = np.arange(N)
    inputs = steps * (n + m) + n  # index of the first input of every step
    if model.name == "unicycle":
        lbx[(steps + 1) * (n + m) + 3], ubx[(steps + 1) * (n + m) + 3] = settings.min_speed_mps, settings.max_speed_mps
        lbx[inputs], ubx[inputs] = -settings.max_accel_mps2, settings.max_accel_mps2
        lbx[inputs + 1], ubx[inputs + 1] = -settings.max_turn_rate_radps, settings.max_turn_rate_radps
    else:
        for axis in range(m):
            lbx[inputs + axis], ubx[inputs + axis] = -settings.max_accel_mps2, settings.max_accel_mps2
    return lbx, ubx


def motion_row_bounds(settings, model):
    """Lower and upper bounds of one step's dynamics and speed rows."""
    n = model.state_dim
    if model.name == "unicycle":
        return np.zeros(n), np.zeros(n)
    face_speed = settings.max_speed_mps * SPEED_FACE_FACTOR
    rows = len(SPEED_FACE_NORMALS)
    return (np.concatenate([np.zeros(n), np.full(rows, -face_speed)]),
            np.concatenate([np.zeros(n), np.full(rows, face_speed)]))


def pack_plan(states, inputs):
    """w from states (N+1, n) and inputs (N, m), in the step-by-step order above."""
    return np.concatenate([np.hstack([states[:-1], inputs]).ravel(), states[-1]])


def unpack_plan(w, state_dim, input_dim, steps):
    """States (N+1, n) and inputs (N, m) from the first (N+1)·n + N·m entries of w."""
    w = np.asarray(w, dtype=float).ravel()
    n, m, N = state_dim, input_dim, steps
    body = w[: N * (n + m)].reshape(N, n + m)
    states = np.vstack([body[:, :n], w[N * (n + m): N * (n + m) + n].reshape(1, n)])
    return states, body[:, n:]


def shift_indices(steps, elapsed_s, step_s):
    """Indices that move a plan forward by the elapsed time (whole steps, the last one held).

    Returns (state_indices (N+1,), step_indices (N,)) to take from the previous states and inputs.
    """
    shift = int(np.clip(round(elapsed_s / step_s), 0, steps))
    return (np.minimum(np.arange(steps + 1) + shift, steps), np.minimum(np.arange(steps) + shift, steps - 1))


def goal_reference(settings, position, goal):
    """The goal clipped to the robot's reach from `position` (the MPC's reference r)."""
    s = settings
    reach = s.goal_reach_m if s.goal_reach_m > 0.0 else s.max_speed_mps * s.horizon_steps * s.step_s
    position = np.asarray(position, dtype=float)
    offset = np.asarray(goal, dtype=float) - position
    distance = np.linalg.norm(offset)
    return position + offset * min(1.0, reach / distance) if distance > 0.0 else position.copy()


def plan_cost(settings, states, inputs, reference):
    """Cost of a plan (states (N+1, n), inputs (N, m)) under the MPC's objective, numerically."""
    s = settings
    states = np.asarray(states, dtype=float)
    inputs = np.asarray(inputs, dtype=float)
    position_error = np.sum((states[:, 0:2] - np.asarray(reference)[None, :]) ** 2, axis=1)
    if s.robot_model == "unicycle":
        speed_sq = states[:, 3] ** 2
        input_cost = s.weight_accel * inputs[:, 0] ** 2 + s.weight_turn * inputs[:, 1] ** 2
    else:
        speed_sq = np.sum(states[:, 2:4] ** 2, axis=1)
        input_cost = s.weight_accel * np.sum(inputs**2, axis=1)
    stage = s.weight_goal * position_error[:-1] + s.weight_speed * speed_sq[:-1] + input_cost
    return float(np.sum(stage) + s.weight_terminal * position_error[-1] + s.weight_speed * speed_sq[-1])
