"""The sequential QP path: convex subproblems about the current iterate, a bounded number per cycle.

Each iteration, about the current iterate (x̄, ū) (the rollout of its inputs, so it obeys the
exact dynamics):

1. the robot covariance is propagated along the iterate (riskbound.motion.covariance);
2. every obstacle's ellipse is built with the risk its pairs carry (riskbound.planning.obstacle_constraints);
3. each ellipse constraint is replaced by its tangent at p̄_k, and each static half-plane is
   tightened by the robot's own uncertainty: nᵀp ≥ b + Φ⁻¹(1 − a)·√(nᵀ Σ_robot n), exact for a
   Gaussian p (riskbound.risk.charge.halfplane_risk);
4. the condensed QP (riskbound.planning.convex_subproblem) gives new inputs; their exact rollout is
   the candidate, charged with the risk bound of riskbound.risk.charge along its own covariance;
5. with `joint` allocation, iterative risk allocation moves the unused risk to the pairs on which
   the candidate binds (riskbound.risk.allocation.reallocate).

A candidate is certified when its charge is within the bound (the sum over every pair for the
joint modes, each pair for per_constraint). The best certified candidate (lowest cost) is the plan;
the iterations stop when the plan no longer moves, at `qp_iterations`, or at the deadline. The
double integrator's tangents lie inside the feasible set, so from a feasible iterate every later
one is feasible too and the cost never increases; the unicycle's inputs are kept in a trust region
around the iterate, halved when a step makes things worse.
"""

import time
from dataclasses import dataclass

import numpy as np

from riskbound.planning.buffered_function import BufferedFunction
from riskbound.planning.convex_subproblem import ConvexSubproblem, input_limits
from riskbound.planning.obstacle_constraints import build_obstacle_constraints
from riskbound.planning.problem import plan_cost, weight_values
from riskbound.risk.allocation import REALLOCATION_TARGET, reallocate
from riskbound.risk.charge import box_risk, distant_risk, halfplane_risk
from riskbound.risk.quantile import chance_constraint_backoff

# A plan that moves less than this between iterations [m] has converged: a centimetre, well inside the
# robot disc and the walkers' footprints, saves an iteration in most warm cycles (measured).
CONVERGED_MOVE_M = 1e-2
# A pair binds when the plan is within this factor of its ellipse (dᵀAd ≤ 1.1: about 5 % of the radius).
BINDING_QUADRATIC = 1.1
# Unicycle trust region: largest change of acceleration [m/s²] and turn rate [rad/s] per iteration.
TRUST_ACCEL_MPS2 = 1.0
TRUST_TURN_RADPS = 0.6
# Share of α given to the static half-planes when a static world is known (our choice): walls do
# not move, so their charge is steady and small next to the people's.
STATIC_RISK_SHARE = 0.2
# An unused row: the half-plane x ≥ x̄ − 1 km, never active.
_UNUSED_ROW_OFFSET_M = 1.0e3


@dataclass
class PlanCharge:
    """The risk charged to one plan: per pair of the constrained slots, and the totals."""

    slots: np.ndarray  # (M, N) charge of each slot's pair (0 for unused slots)
    dropped: float  # reachable obstacles without a slot
    distant: float  # obstacles out of reach, isotropic bound
    static: float  # static half-planes
    people: float  # slots + dropped + distant
    total: float
    largest_pair: float


@dataclass
class Candidate:
    states: np.ndarray
    inputs: np.ndarray
    constraints: object
    charge: PlanCharge
    cost: float
    obstacle_slack_m: float
    static_slack_m: float
    certified: bool
    min_quadratic: float  # smallest dᵀAd over the used slots (≥ 1 outside every ellipse)
    violation: float  # Σ over steps of the deepest ellipse violation max(0, 1 − dᵀAd), plus 10 × static slack


@dataclass
class SearchOutcome:
    best: Candidate  # best certified candidate, or None
    least_violating: Candidate  # the candidate that enters the ellipses least (its `violation`), or None
    iterations: int
    converged: bool
    solver_status: str
    qp_failures: int


class SequentialQP:
    """Holds the QP (built once) and runs the iterations of one cycle."""

    def __init__(self, settings, model):
        self.settings, self.model = settings, model
        self.subproblem = ConvexSubproblem(settings, model, settings.static_planes)
        self._horizon = BufferedFunction(model.horizon_function(settings.horizon_steps))
        self._covariance = BufferedFunction(model.covariance_sequence_function(settings.horizon_steps))

    def rollout(self, x0, inputs):
        """(states (N+1, n), J): the exact rollout of `inputs` and its Jacobian ∂(x₁…x_N)/∂U."""
        s, n = self.settings, self.model.state_dim
        out = self._horizon(i0=x0, i1=inputs.T, i2=s.step_s)
        N, m = s.horizon_steps, self.model.input_dim
        return (out["o0"].reshape(N + 1, n).copy(),
                out["o1"].reshape(N * m, N * n).T.copy())

    def robot_covariances(self, states, inputs, P0):
        """Robot covariances (N+1, n, n) along `states` driven by `inputs` (riskbound.motion.covariance)."""
        s, n = self.settings, self.model.state_dim
        out = self._covariance(i0=states.T, i1=inputs.T, i2=s.step_s, i3=P0, i4=s.robot_accel_noise,
                               i5=s.robot_turn_noise)
        # The stacked (n·(N+1))×n output, column-major: reshape through its transpose.
        return out["o0"].reshape(n, n * (s.horizon_steps + 1)).T.reshape(s.horizon_steps + 1, n, n).copy()

    def search(self, x0, P0, reference, forecast, start_inputs, pair_risks, budget, static_world, started,
               deadline_s, allocation_passes, free_first=False, iterations_cap=None):
        """Iterate from `start_inputs`; `pair_risks` ({track id: (N,) risk}) is updated in place (joint).

        allocation_passes: reallocation steps that may be followed by another pass (the last step's
        split is left in `pair_risks` for the next cycle).
        free_first: the first iteration leaves the people out (cold starts).
        iterations_cap: convex subproblems at most (default `qp_iterations`).
        """
        s, model = self.settings, self.model
        N = s.horizon_steps
        weights = np.asarray(weight_values(s), dtype=float)
        inputs = np.asarray(start_inputs, dtype=float).copy()
        states, linearisation = self.rollout(x0, inputs)
        people_budget = budget * (1.0 - STATIC_RISK_SHARE) if static_world is not None else budget
        static_backoff = (chance_constraint_backoff(budget * STATIC_RISK_SHARE / (N * max(s.static_planes, 1)))
                          if static_world is not None and s.static_planes else 0.0)
        trust = np.array([TRUST_ACCEL_MPS2, TRUST_TURN_RADPS]) if model.name == "unicycle" else None
        joint = s.risk_allocation == "joint"
        passes_left = allocation_passes if joint else 1
        best = least = current = constraints = None
        status, failures, converged, iterations = "", 0, False, 0
        # The double integrator's covariance does not depend on the plan: one propagation serves
        # every iterate. The unicycle's is propagated along each iterate.
        plan_cov = self.robot_covariances(states, inputs, P0)
        for _ in range(s.qp_iterations if iterations_cap is None else iterations_cap):
            if time.perf_counter() - started > deadline_s:
                break
            iterations += 1
            position_cov = plan_cov[1:, 0:2, 0:2]
            # So the double integrator's ellipses change only when the risk split does.
            if constraints is None or model.name == "unicycle":
                constraints = build_obstacle_constraints(forecast, position_cov, x0[0:2], s, pair_risks, people_budget)
            obstacle_rows = _tangent_rows(constraints, states[1:, 0:2], x0[0:2])
            if free_first and iterations == 1:
                # A cold start's rollout stands still: tangents there wall the robot in. The first
                # iterate is the plan without people; the tangents at its points, inside the
                # ellipses it crosses, push it out sideways.
                obstacle_rows[..., 0:2], obstacle_rows[..., 2] = (1.0, 0.0), states[1:, None, 0] - _UNUSED_ROW_OFFSET_M
            static_rows, static_planes = _static_rows(static_world, states[1:, 0:2], position_cov, static_backoff,
                                                      s.static_planes, s.robot_radius_m)
            lower, upper = input_limits(s, model)
            if trust is not None:
                lower, upper = np.maximum(lower, inputs - trust), np.minimum(upper, inputs + trust)
            ok, status, new_inputs, obstacle_slack, static_slack = self.subproblem.solve(
                x0, states, linearisation, inputs, reference, weights, obstacle_rows, static_rows, lower, upper)
            if not ok:
                failures += 1
                if trust is not None:
                    trust = trust / 2.0
                    continue
                break
            new_states, new_linearisation = self.rollout(x0, new_inputs)
            new_cov = plan_cov if model.name != "unicycle" else self.robot_covariances(new_states, new_inputs, P0)
            charge = charge_plan(new_states, new_cov[1:, 0:2, 0:2], forecast, constraints, static_planes, s)
            certified = (charge.largest_pair <= budget if s.risk_allocation == "per_constraint"
                         else charge.total <= budget)
            if static_planes is not None:
                # The planes hold only near the points they were built around: a plan that moved
                # further waits for the next iteration's planes before it can be certified.
                moved_from_planes = np.linalg.norm(new_states[1:, 0:2] - states[1:, 0:2], axis=1).max()
                certified = certified and moved_from_planes <= static_world.valid_move_m(s.robot_radius_m)
            quadratic = _quadratic(constraints, new_states[1:, 0:2])
            used = quadratic[: constraints.considered]
            depth = np.maximum(1.0 - used.min(axis=0), 0.0) if constraints.considered else np.zeros(1)
            candidate = Candidate(new_states, new_inputs, constraints, charge,
                                  plan_cost(s, new_states, new_inputs, reference), obstacle_slack, static_slack,
                                  certified, float(used.min(initial=np.inf)),
                                  float(depth.sum()) + 10.0 * static_slack)
            if certified and (best is None or candidate.cost < best.cost):
                best = candidate
            if least is None or candidate.violation < least.violation:
                least = candidate
            # The unicycle's rollout can leave the linearisation's reach: a step that enters the
            # ellipses deeper than its iterate did is retried with half the trust region.
            worse = current is not None and candidate.violation > current.violation + 1e-6
            if trust is not None and worse:
                trust = trust / 2.0
                continue
            moved = float(np.max(np.abs(new_states[:, 0:2] - states[:, 0:2])))
            current, inputs, states, linearisation, plan_cov = candidate, new_inputs, new_states, new_linearisation, new_cov
            if free_first and iterations == 1:
                current = None  # the plan without people is no yardstick for the next step
                continue
            if joint and not certified and constraints.considered:
                # Over budget (the carried split no longer fits the scene): take risk back from the
                # binding pairs at once rather than after convergence.
                _reallocate(pair_risks, constraints, charge, quadratic, people_budget)
                constraints = None
                continue
            if moved >= CONVERGED_MOVE_M:
                continue
            # Converged for this split. Iterative allocation moves risk to the pairs that bind (and
            # back when the plan overspends); another pass follows while passes are left.
            if joint and constraints.considered:
                _reallocate(pair_risks, constraints, charge, quadratic, people_budget)
                constraints = None
            passes_left -= 1
            if certified and passes_left <= 0:
                converged = True
                break
            if not joint and not certified:
                break
        if joint and current is not None and not converged and constraints is not None and constraints.considered:
            _reallocate(pair_risks, constraints, current.charge, _quadratic(constraints, current.states[1:, 0:2]),
                        people_budget)
        return SearchOutcome(best, least, iterations, converged, status, failures)


def charge_plan(states, position_covariances, forecast, constraints, static_planes, settings):
    """PlanCharge of `states` (N+1, n) with the robot's own position covariances (N, 2, 2)."""
    n = constraints.considered
    robot_radius = settings.robot_radius_m
    distant = _distant_charge(forecast, constraints, position_covariances, states[0], settings)
    positions = states[1:, 0:2]
    slots = np.zeros(constraints.risks.shape)
    dropped = 0.0
    if forecast.track_count:
        reachable = np.concatenate([constraints.kept, constraints.dropped_indices])
        if len(reachable):
            covariance = forecast.covariances[reachable] + position_covariances[None]
            pair = box_risk(positions[None] - forecast.positions[reachable], covariance, forecast.headings[reachable],
                            forecast.half_extents[reachable, None, :] + robot_radius)
            slots[:n] = pair[:n]
            dropped = float(pair[n:].sum())
    static = 0.0
    if static_planes is not None:
        normals, offsets = static_planes
        static = float(halfplane_risk(positions[:, None, :], position_covariances[:, None], normals, offsets).sum())
    people = float(slots.sum()) + dropped + distant
    largest = float(max(slots.max(initial=0.0), distant))
    return PlanCharge(slots, dropped, distant, static, people, people + static, largest)


def _distant_charge(forecast, constraints, position_covariances, x0, settings):
    """Isotropic bound for every obstacle the pruning found out of reach (riskbound.risk.charge).

    The robot is within v_max·t_k of x₀ at step k, so its gap to an obstacle's enclosing disc is at
    least ‖ô_k − x₀‖ − v_max·t_k − (radius of the grown box's enclosing disc), whatever the plan.
    Pruning left such an obstacle out because its ellipse, which encloses that disc, is out of
    reach: the gap is positive and the bound small.
    """
    out = np.ones(forecast.track_count, dtype=bool)
    out[constraints.kept] = False
    out[constraints.dropped_indices] = False
    if not np.any(out):
        return 0.0
    reach = settings.max_speed_mps * forecast.times
    distance = np.linalg.norm(forecast.positions[out] - np.asarray(x0[0:2])[None, None, :], axis=-1)
    enclosing = np.linalg.norm(forecast.half_extents[out] + settings.robot_radius_m, axis=-1)[:, None] + reach[None]
    mean = np.zeros(distance.shape + (2,))
    mean[..., 0] = distance
    covariance = forecast.covariances[out] + position_covariances[None]
    return float(distant_risk(mean, covariance, enclosing).sum())


def _tangent_rows(constraints, points, robot_position):
    """(N, M, 3) normalised tangent half-planes of the slot ellipses at `points` (N, 2)."""
    M, N = constraints.risks.shape
    rows = np.zeros((N, M, 3))
    rows[..., 0] = 1.0
    rows[..., 2] = points[:, None, 0] - _UNUSED_ROW_OFFSET_M
    n = constraints.considered
    if n == 0:
        return rows
    d = points[None] - constraints.centres[:n]  # (n, N, 2)
    gradient = 2.0 * np.einsum("jkab,jkb->jka", constraints.shapes[:n], d)
    q = np.einsum("jka,jka->jk", d, 0.5 * gradient)
    length = np.linalg.norm(gradient, axis=-1)
    degenerate = length < 1e-9
    if np.any(degenerate):
        # A point on an ellipse's centre has no tangent: use the plane through the ellipse's nearest
        # side, facing away from the robot's position (or +x when the robot is on the centre too).
        away = np.asarray(robot_position)[None, None, :] - constraints.centres[:n]
        away_length = np.linalg.norm(away, axis=-1, keepdims=True)
        away = np.where(away_length > 1e-9, away / np.maximum(away_length, 1e-300), [1.0, 0.0])
        radius = constraints.semi_axes[:n].max(axis=-1)
        gradient = np.where(degenerate[..., None], away, gradient)
        length = np.where(degenerate, 1.0, length)
        q = np.where(degenerate, 0.0, q)
    normal = gradient / length[..., None]
    # Tangent of q at p̄: q(p̄) + ∇q·(p − p̄) ≥ 1  ⇔  n·p ≥ (1 − q(p̄) + ∇q·p̄)/|∇q|.
    offset = (1.0 - q + np.einsum("jka,ka->jk", gradient, points)) / length
    if np.any(degenerate):
        centre_offset = np.einsum("jka,jka->jk", normal, constraints.centres[:n]) + radius
        offset = np.where(degenerate, centre_offset, offset)
    rows[:, :n, 0:2] = normal.transpose(1, 0, 2)
    rows[:, :n, 2] = offset.T
    return rows


def _static_rows(static_world, points, position_covariances, backoff, planes, robot_radius):
    """(N, K, 3) static rows tightened by the robot's uncertainty, and (normals, offsets) for the charge."""
    N = len(points)
    rows = np.zeros((N, planes, 3))
    rows[..., 0] = 1.0
    rows[..., 2] = points[:, None, 0] - _UNUSED_ROW_OFFSET_M
    if static_world is None or planes == 0:
        return rows, None
    normals, offsets = static_world.halfplanes(points, planes, robot_radius)  # (N, K, 2), (N, K)
    sigma = np.sqrt(np.maximum(np.einsum("kia,kab,kib->ki", normals, position_covariances, normals), 0.0))
    rows[..., 0:2] = normals
    rows[..., 2] = offsets + backoff * sigma
    return rows, (normals, offsets)


def _quadratic(constraints, points):
    """dᵀAd of every slot at `points` (M, N); unused slots give a large value."""
    d = points[None] - constraints.centres
    return np.einsum("jka,jkab,jkb->jk", d, constraints.shapes, d)


def reallocate_pairs(pair_risks, constraints, charge, states, budget):
    """Iterative allocation for a plan (states (N+1, n)) of any solve path; writes `pair_risks`."""
    _reallocate(pair_risks, constraints, charge, _quadratic(constraints, states[1:, 0:2]), budget)


def _reallocate(pair_risks, constraints, charge, quadratic, budget):
    """One step of iterative risk allocation over the used slots; writes the result to `pair_risks`."""
    n = constraints.considered
    binding = quadratic[:n] <= BINDING_QUADRATIC
    others = float(charge.slots[:n][~binding].sum()) + charge.dropped + charge.distant
    updated = reallocate(constraints.risks[:n], charge.slots[:n], binding, REALLOCATION_TARGET * budget - others,
                         constraints.risk)
    for slot in range(n):
        pair_risks[int(constraints.track_ids[slot])] = updated[slot]


__all__ = ["Candidate", "PlanCharge", "SearchOutcome", "SequentialQP", "charge_plan", "reallocate_pairs"]
