"""Chance-constrained MPC: one planning cycle, with its risk accounting, warm start and fallbacks.

The problem: track the goal (riskbound.planning.problem) subject to the robot's dynamics and
limits and, for every step and constrained obstacle, the ellipse constraint
(p_k − o_jk)ᵀ A_jk (p_k − o_jk) ≥ 1 (riskbound.planning.obstacle_constraints). Two solve paths:

* sequential_qp (default, riskbound.planning.sequential_qp): convex QPs about the current iterate,
  a bounded number per cycle, every iterate meeting the linearised (inner) ellipse constraints;
* ipopt (riskbound.planning.interior_point): the full NLP, kept as the reference.

Every plan returned is charged with the risk bound of riskbound.risk.charge along the plan's own
robot covariance, over every forecast obstacle (constrained, dropped by the slot cap, or out of
reach). A plan is usable within the bound only if that charge is at most α (joint modes) or every
pair's is (per_constraint): the ellipses are how the plan keeps away, the charge is what is
certified (`risk_charged` in the result and the status).

Every cycle first checks whether the problem is shown infeasible (`_shown_infeasible`, a few array
operations); if so, `stop` returns at once and `least_violation` searches from one start only.
Otherwise a cycle that finds no certified plan from its first start (the shifted previous plan, or
the zero-input rollout on a cold start) retries from the braking trajectory and from coasting,
within the same deadline. Then:

* solved / feasible_not_converged: a certified plan (converged, or the iteration or time budget
  ended first); `start` says which start it came from;
* least_violation (only with `infeasible_response: least_violation`): no certified plan; the plan
  with the least violation of the obstacle rows is returned, WARN, outside the bound;
* infeasible: shown infeasible — every position the robot can reach is charged so much that no
  plan can meet the bound (a lower bound on the charge above α, see `_shown_infeasible`);
* no_plan_found: not shown infeasible, but no start gave a certified plan (a local failure);
* time_or_iteration_cap, solver_failed: the budget ran out, or the solver itself failed.
"""

import time
from dataclasses import dataclass, field

import numpy as np
from scipy.special import ndtr

from riskbound.motion.robot_models import make_robot_model
from riskbound.planning.interior_point import FEASIBILITY_TOLERANCE, VIOLATION_PENALTY, InteriorPointPath
from riskbound.planning.obstacle_constraints import build_obstacle_constraints
from riskbound.planning.problem import goal_reference, plan_cost, shift_indices
from riskbound.planning.sequential_qp import SequentialQP, charge_plan, reallocate_pairs
from riskbound.risk.box import face_normals

USABLE_STATUSES = ("solved", "feasible_not_converged", "least_violation")


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
    risk_per_constraint: float = float("nan")  # the uniform share (the smallest risk of any pair)
    min_margin_m: float = float("inf")
    max_violation: float = 0.0  # least_violation: largest obstacle-row violation (0: constraints met)
    risk_charged: float = float("nan")  # the bound charged to the plan (sum over pairs; per_constraint: largest pair)
    risk_static: float = 0.0  # part of risk_charged from the static half-planes
    start: str = ""  # shifted_plan | rollout | braking: where the returned plan's iterations started
    times: np.ndarray = field(default_factory=lambda: np.zeros(0))
    states: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    inputs: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    constraints: object = None


class ChanceConstrainedMPC:
    """Build the problem once for a settings set; call `solve` every cycle."""

    def __init__(self, settings):
        self.model = make_robot_model(settings.robot_model)
        self.soft = settings.infeasible_response == "least_violation"
        self._sqp = SequentialQP(settings, self.model)
        self._ipopt = InteriorPointPath(settings, self.model, self.soft) if settings.solver == "ipopt" else None
        self.settings = settings
        self._previous = None  # (states, inputs, ipopt multipliers or None, slot track ids)
        self.pair_risks = {}  # track id → (N,) risk carried by iterative allocation
        self._multipliers = None  # the interior-point path's last multipliers

    @property
    def settings(self):
        return self._settings

    @settings.setter
    def settings(self, settings):
        """New numbers (risk level, weights, limits) for the next solve; structural changes need a new MPC."""
        self._settings = settings
        self._sqp.settings = self._sqp.subproblem.settings = settings
        if self._ipopt is not None:
            self._ipopt.settings = settings

    def reset(self):
        """Forget the warm start and the carried risk split (after a failure, a goal change or a jump in odometry)."""
        self._previous = None
        self.pair_risks = {}

    # --- the cycle -------------------------------------------------------------------------------

    def solve(self, x0, P0, goal, forecast, elapsed_s=None, static_world=None):
        """Plan from state x0 (covariance P0) to `goal` among `forecast` obstacles.

        forecast: ObstacleForecast whose `times` are exactly k·Δt, k = 1…N, counted from the moment
            of x0: resample at those instants (`forecast.resampled(k·Δt + offset)` with offset = state
            stamp − forecast stamp) and set `times` back to k·Δt before calling.
        elapsed_s: time since the previous solve (for the warm-start shift); default one step
        static_world: optional object with `halfplanes(points (N, 2), count)` → normals (N, K, 2),
            offsets (N, K) that keep the robot disc off walls and pillars (riskbound.world.corridor)
        """
        s, model = self.settings, self.model
        N, dt = s.horizon_steps, s.step_s
        x0 = np.asarray(x0, dtype=float)
        goal = np.asarray(goal, dtype=float)
        reason = _input_problem(model, x0, P0, goal, forecast, N, dt)
        if reason:
            return PlanResult(False, reason)
        started = time.perf_counter()
        elapsed_s = dt if elapsed_s is None else elapsed_s
        P0 = 0.5 * (np.asarray(P0, dtype=float) + np.asarray(P0, dtype=float).T)
        self._shift_pair_risks(forecast, elapsed_s)
        reference = goal_reference(s, x0[0:2], goal)
        if self._ipopt is not None:
            result = self._solve_interior_point(x0, P0, reference, forecast, elapsed_s, static_world, started)
        else:
            result = self._solve_sequential(x0, P0, reference, forecast, elapsed_s, static_world, started)
        result.solve_ms = 1e3 * (time.perf_counter() - started)
        result.times = dt * np.arange(N + 1)
        if result.success:
            self._previous = (result.states, result.inputs, self._multipliers,
                              result.constraints.track_ids.copy())
        else:
            # A failed cycle's iterate often runs through the obstacle that made it fail: restart
            # from the rollout (and the uniform split) next cycle.
            self.reset()
        return result

    def _solve_sequential(self, x0, P0, reference, forecast, elapsed_s, static_world, started):
        s = self.settings
        # Starts in order: the shifted plan (warm) or the zero-input rollout, i.e. holding the
        # current velocity, with people left out of the first iterate (cold); then the braking
        # trajectory; then, after a warm start failed, holding the velocity, which is often the
        # way out of the path of someone walking at the robot.
        coasting = np.zeros((s.horizon_steps, self.model.input_dim))
        braking = _braking_inputs(self.model, x0, s)
        if self._previous is not None:
            starts = [("shifted_plan", self._shifted_inputs(elapsed_s)), ("braking", braking), ("rollout", coasting)]
        else:
            starts = [("rollout", coasting), ("braking", braking)]
        # What is shown not to exist is not searched for (the check costs a rollout and a few
        # array operations): no solve at all under `stop`, one start for the least-violation plan.
        shown = self._shown_infeasible(x0, P0, forecast)
        if shown and not self.soft:
            return PlanResult(False, "infeasible", start="")
        least, least_start, iterations, failures, status = None, "", 0, 0, ""
        for attempt, (start, inputs) in enumerate(starts):
            if attempt == 1 and shown:
                break
            # A retry does not trust the carried split. For `joint` it starts from the loosest one,
            # α on every pair (the smallest ellipses), and iterative allocation takes risk back
            # until the charge fits: from the side where a plan exists, which the uniform split
            # (the largest ellipses) may have closed off.
            if attempt == 0:
                risks = self.pair_risks
            elif s.risk_allocation == "joint":
                risks = {int(track): np.full(s.horizon_steps, s.risk_level) for track in forecast.track_ids}
            else:
                risks = {}
            # A warm start continues the split carried from the last cycle: one pass. A cold start
            # (or the retry) begins from the uniform split and may take several.
            passes = 1 if start == "shifted_plan" else s.allocation_passes
            # Retries get half the iterations each: they bound the cycle's worst case, and a start
            # that leads anywhere has a plan within the bound after a few.
            outcome = self._sqp.search(x0, P0, reference, forecast, inputs, risks, s.risk_level, static_world,
                                       started, s.deadline_s, passes, free_first=start == "rollout",
                                       iterations_cap=None if attempt == 0 else max(s.qp_iterations // 2, 1))
            iterations += outcome.iterations
            failures += outcome.qp_failures
            status = outcome.solver_status
            if attempt > 0:
                self.pair_risks = risks
            if outcome.best is not None:
                plan = outcome.best
                return self._result(True, "solved" if outcome.converged else "feasible_not_converged", plan,
                                    status, iterations, start)
            if outcome.least_violating is not None and (
                    least is None or outcome.least_violating.violation < least.violation):
                least, least_start = outcome.least_violating, start
            if time.perf_counter() - started > s.deadline_s:
                break
        if self.soft and least is not None:
            return self._result(True, "least_violation", least, status, iterations, least_start)
        if least is None:
            verdict = "solver_failed" if failures else "time_or_iteration_cap"
        elif shown:
            verdict = "infeasible"
        elif time.perf_counter() - started > s.deadline_s:
            verdict = "time_or_iteration_cap"
        else:
            verdict = "no_plan_found"
        if least is None:
            return PlanResult(False, verdict, solver_status=status, iterations=iterations)
        return self._result(False, verdict, least, status, iterations, least_start)

    def _solve_interior_point(self, x0, P0, reference, forecast, elapsed_s, static_world, started):
        s, model = self.settings, self.model
        N = s.horizon_steps
        if self._previous is not None:
            states, inputs = self._shifted_plan(x0, elapsed_s)
            warm = self._ipopt.shifted_multipliers(self._previous[2], elapsed_s)
            start = "shifted_plan"
        else:
            inputs = np.zeros((N, model.input_dim))
            states, warm, start = model.rollout(x0, inputs, s.step_s), None, "rollout"
        iterations, risks = 0, self.pair_risks
        # Build the ellipses along the guess's covariance, then again along the returned plan's while
        # the plan's own covariance is larger than the one its ellipses were built with; a plan over
        # the bound is solved again after a reallocation step, and at last with the uniform split.
        for attempt in range(4):
            position_cov = self._sqp.robot_covariances(states, inputs, P0)[1:, 0:2, 0:2]
            constraints = build_obstacle_constraints(forecast, position_cov, x0[0:2], s, risks)
            same = constraints.track_ids == self._previous[3] if warm is not None else None
            outcome = self._ipopt.solve(x0, reference, constraints, states, inputs, warm, same)
            iterations += outcome.iterations
            if outcome.status not in USABLE_STATUSES:
                break
            plan_cov = self._sqp.robot_covariances(outcome.states, outcome.inputs, P0)[1:, 0:2, 0:2]
            charge = charge_plan(outcome.states, plan_cov, forecast, constraints, None, s)
            certified = (charge.largest_pair if s.risk_allocation == "per_constraint" else charge.total) \
                <= s.risk_level
            grown = np.any(np.linalg.eigvalsh(plan_cov - position_cov) > 1e-12)
            if certified and not grown:
                break
            if not certified and risks:
                if attempt < 2 and s.risk_allocation == "joint" and constraints.considered:
                    reallocate_pairs(risks, constraints, charge, outcome.states, s.risk_level)
                else:
                    risks = {}
            elif not grown:
                break
            states, inputs, warm = outcome.states, outcome.inputs, None
        status = outcome.status
        plan_cov = self._sqp.robot_covariances(outcome.states, outcome.inputs, P0)[1:, 0:2, 0:2]
        charge = charge_plan(outcome.states, plan_cov, forecast, constraints, None, s)
        if s.risk_allocation == "joint" and constraints.considered and np.all(np.isfinite(outcome.states)):
            reallocate_pairs(self.pair_risks, constraints, charge, outcome.states, s.risk_level)
        certified = (charge.largest_pair if s.risk_allocation == "per_constraint" else charge.total) <= s.risk_level
        if status in ("solved", "feasible_not_converged") and not certified:
            status = "least_violation" if self.soft else "no_plan_found"
        success = status in USABLE_STATUSES
        result = PlanResult(
            success=success, status=status, solver_status=outcome.solver_status, iterations=iterations,
            cost=plan_cost(s, outcome.states, outcome.inputs, reference) if np.all(np.isfinite(outcome.states))
            else float("nan"),
            obstacles_considered=constraints.considered, obstacles_dropped=constraints.dropped,
            risk_per_constraint=constraints.risk, max_violation=outcome.max_violation,
            min_margin_m=_min_margin(outcome.states, constraints) if np.all(np.isfinite(outcome.states))
            else float("nan"),
            risk_charged=charge.largest_pair if s.risk_allocation == "per_constraint" else charge.total,
            start=start, states=outcome.states, inputs=outcome.inputs, constraints=constraints)
        self._multipliers = outcome.multipliers
        return result

    def _result(self, success, status, candidate, solver_status, iterations, start):
        s = self.settings
        charged = (candidate.charge.largest_pair if s.risk_allocation == "per_constraint"
                   else candidate.charge.total)
        return PlanResult(
            success=success, status=status, solver_status=solver_status, iterations=iterations,
            cost=candidate.cost, obstacles_considered=candidate.constraints.considered,
            obstacles_dropped=candidate.constraints.dropped, risk_per_constraint=candidate.constraints.risk,
            min_margin_m=_min_margin(candidate.states, candidate.constraints),
            max_violation=candidate.obstacle_slack_m if status == "least_violation" else 0.0,
            risk_charged=charged, risk_static=candidate.charge.static, start=start,
            states=candidate.states, inputs=candidate.inputs, constraints=candidate.constraints)

    # --- warm start ------------------------------------------------------------------------------

    def _shifted_inputs(self, elapsed_s):
        _, step_idx = shift_indices(self.settings.horizon_steps, elapsed_s, self.settings.step_s)
        return self._previous[1][step_idx].copy()

    def _shifted_plan(self, x0, elapsed_s):
        s = self.settings
        idx, step_idx = shift_indices(s.horizon_steps, elapsed_s, s.step_s)
        states = self._previous[0][idx].copy()
        states[0] = x0
        return states, self._previous[1][step_idx].copy()

    def _shift_pair_risks(self, forecast, elapsed_s):
        """Move the carried risks forward like the plan; forget tracks no longer forecast."""
        if not self.pair_risks:
            return
        _, step_idx = shift_indices(self.settings.horizon_steps, elapsed_s, self.settings.step_s)
        present = set(int(t) for t in forecast.track_ids)
        self.pair_risks = {track: risks[step_idx] for track, risks in self.pair_risks.items() if track in present}

    # --- shown infeasible ------------------------------------------------------------------------

    def _shown_infeasible(self, x0, P0, forecast):
        """True when no plan the robot can fly has a charge within the bound.

        Reachable positions at step k lie in a disc: for the double integrator centred on
        p₀ + v₀t_k with radius √2·½a_max t_k² (the per-axis acceleration box; the speed limit only
        shrinks it), for the unicycle centred on p₀ with the distance it can cover. A slab's
        probability Φ((h − μ)/σ) − Φ((−h − μ)/σ) falls as |μ| grows, and over the disc
        |μ| ≤ |n·(c − o)| + ρ, so every reachable position is charged at least that value for
        the pair; summed over pairs (joint) or for one pair (per_constraint), a lower bound
        above α shows that no plan meets the bound. σ comes from the robot covariance along the
        braking trajectory: the same for every plan of the double integrator, the linearised
        estimate for the unicycle.
        """
        s, model = self.settings, self.model
        if forecast.track_count == 0:
            return False
        t = forecast.times
        if model.name == "unicycle":
            centre = np.tile(x0[0:2], (len(t), 1))
            speeds = np.minimum(s.max_speed_mps, abs(x0[3]) + s.max_accel_mps2 * t)
            radius = np.cumsum(speeds) * s.step_s
        else:
            centre = x0[0:2][None, :] + x0[2:4][None, :] * t[:, None]
            radius = np.sqrt(2.0) * 0.5 * s.max_accel_mps2 * t**2
        inputs = _braking_inputs(model, x0, s)
        states, _ = self._sqp.rollout(x0, inputs)
        position_cov = self._sqp.robot_covariances(states, inputs, P0)[1:, 0:2, 0:2]
        normals = face_normals(forecast.headings)  # (J, N, 2, 2)
        grown = forecast.half_extents[:, None, :] + s.robot_radius_m  # (J, 1, 2)
        farthest = np.abs(np.einsum("jkic,jkc->jki", normals, centre[None] - forecast.positions)) + radius[None, :, None]
        covariance = forecast.covariances + position_cov[None]
        sigma = np.maximum(np.sqrt(np.einsum("jkic,jkcd,jkid->jki", normals, covariance, normals)), 1e-12)
        slab = ndtr((grown - farthest) / sigma) - ndtr((-grown - farthest) / sigma)
        lower = np.min(slab, axis=-1)  # (J, N): the least charge of any reachable position
        if s.risk_allocation == "per_constraint":
            return bool(np.any(lower > s.risk_level))
        return bool(lower.sum() > s.risk_level)


def _input_problem(model, x0, P0, goal, forecast, N, dt):
    """Reason the inputs cannot be planned with, or None."""
    if x0.shape != (model.state_dim,) or not np.all(np.isfinite(x0)):
        return "bad_input: robot state is missing, NaN or Inf"
    if np.shape(P0) != (model.state_dim, model.state_dim) or not np.all(np.isfinite(P0)):
        return f"bad_input: robot covariance must be a finite {model.state_dim}×{model.state_dim} matrix"
    if np.min(np.linalg.eigvalsh(0.5 * (np.asarray(P0) + np.asarray(P0).T))) < -1e-9:
        return "bad_input: robot covariance is not positive semi-definite"
    if goal.shape != (2,) or not np.all(np.isfinite(goal)):
        return "bad_input: goal is NaN or Inf"
    if len(forecast.times) != N or not np.allclose(forecast.times, dt * np.arange(1, N + 1)):
        return "bad_input: forecast is not on the planner grid"
    problems = forecast.problems()
    return "bad_input: " + "; ".join(problems) if problems else None


def _braking_inputs(model, x0, settings):
    """Inputs that brake at the acceleration limit, then hold still: the retry's start."""
    N, dt, a = settings.horizon_steps, settings.step_s, settings.max_accel_mps2
    inputs = np.zeros((N, model.input_dim))
    if model.name == "unicycle":
        v = x0[3]
        for k in range(N):
            inputs[k, 0] = -np.sign(v) * min(abs(v) / dt, a)
            v += inputs[k, 0] * dt
    else:
        v = x0[2:4].copy()
        for k in range(N):
            speed = np.linalg.norm(v)
            step = min(speed / dt, a)
            inputs[k] = -v / speed * step if speed > 0.0 else 0.0
            v = v + inputs[k] * dt
    return inputs


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


__all__ = ["FEASIBILITY_TOLERANCE", "USABLE_STATUSES", "VIOLATION_PENALTY", "ChanceConstrainedMPC", "PlanResult"]
