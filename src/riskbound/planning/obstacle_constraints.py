"""From obstacle forecasts to the numbers of the ellipsoid constraints: prune, allocate risk, inflate.

For every obstacle j and step k the constraint is (p_k − o_jk)ᵀ A_jk (p_k − o_jk) ≥ 1, with A_jk the
shape matrix of the minimum-volume ellipse enclosing the deterministic-equivalent box
(riskbound.risk.box, riskbound.risk.ellipsoid) built for the risk a_jk of that pair.

Pruning: an obstacle is reachable if at some step k its ellipse comes within the robot's reach,
‖o_jk − p₀‖ − a_jk ≤ v_max t_k, with a_jk the ellipse's largest semi-axis. The reachable ones are
ranked by their smallest such gap and the nearest `max_obstacles` get constraint slots. The
ellipses used for pruning are built with the smallest risk any pair can be given (α split over
every forecast obstacle), so they are never smaller than the final ones.

Risk per pair: the uniform split (α over steps × reachable obstacles, the dropped ones included,
so the split covers every obstacle the robot could reach), or for `joint` the per-pair risks that
iterative risk allocation carried over from earlier cycles (riskbound.risk.allocation), never below
the uniform share. Whatever the split, the planner charges the plan it returns with the bound of
riskbound.risk.charge over every obstacle, constrained or not.
"""

from dataclasses import dataclass

import numpy as np

from riskbound.risk.allocation import MAX_PAIR_RISK, per_constraint_risk
from riskbound.risk.box import inflated_half_extents
from riskbound.risk.ellipsoid import box_enclosing_semi_axes, ellipse_shape_matrix

# An unused obstacle slot: an ellipse far away that no plan within reach can touch.
# dᵀ A d = 1e-6 · (2e3)² = 4 ≥ 1 with a gradient of order 1e-3, so it neither binds nor distorts.
UNUSED_SLOT_OFFSET_M = 2.0e3
UNUSED_SLOT_SHAPE = 1.0e-6


@dataclass
class ObstacleConstraints:
    """Constraint numbers for the solver slots.

    centres: (M, N, 2), shapes: (M, N, 2, 2), semi_axes: (M, N, 2), headings: (M, N),
    used: (M,) bool, track_ids: (M,) (−1 when unused), risks: (M, N) risk of each slot's pair,
    risk: the uniform share (α/(N·reachable) for joint modes, α per pair for per_constraint),
    considered: obstacles constrained, dropped: reachable obstacles beyond `max_obstacles`,
    kept: (considered,) forecast indices of the slots, dropped_indices: forecast indices of the
    reachable obstacles without a slot, grown_half_extents: (M, 2) half-extents plus
    robot radius, relative_covariances: (M, N, 2, 2) robot plus obstacle covariance.
    """

    centres: np.ndarray
    shapes: np.ndarray
    semi_axes: np.ndarray
    headings: np.ndarray
    used: np.ndarray
    track_ids: np.ndarray
    risks: np.ndarray
    risk: float
    considered: int
    dropped: int
    kept: np.ndarray
    dropped_indices: np.ndarray
    grown_half_extents: np.ndarray
    relative_covariances: np.ndarray


def build_obstacle_constraints(forecast, robot_position_covariances, robot_position, settings, pair_risks=None,
                               total_risk=None):
    """Prune, allocate risk and compute the ellipse of every kept obstacle on the planner's grid.

    forecast: ObstacleForecast already on the grid t_k = k·Δt, k = 1…N
    robot_position_covariances: (N, 2, 2) robot position covariance at the same steps
    robot_position: (2,) current robot position
    pair_risks: optional {track id: (N,) risk per step} for `joint` (iterative allocation); pairs
        not in it, and every pair in the other modes, get the uniform share
    total_risk: the collision bound the obstacles share (default settings.risk_level)
    """
    steps, slots = settings.horizon_steps, settings.max_obstacles
    centres = np.tile(np.asarray(robot_position, dtype=float) + [UNUSED_SLOT_OFFSET_M, 0.0], (slots, steps, 1))
    shapes = np.tile(np.eye(2) * UNUSED_SLOT_SHAPE, (slots, steps, 1, 1))
    semi_axes = np.full((slots, steps, 2), 1.0 / np.sqrt(UNUSED_SLOT_SHAPE))
    headings = np.zeros((slots, steps))
    used = np.zeros(slots, dtype=bool)
    track_ids = np.full(slots, -1, dtype=np.int64)
    grown = np.zeros((slots, 2))
    relative = np.zeros((slots, steps, 2, 2))
    total_risk = settings.risk_level if total_risk is None else total_risk
    mode = settings.risk_allocation

    def result(risks, risk, kept, dropped):
        return ObstacleConstraints(centres, shapes, semi_axes, headings, used, track_ids, risks, risk,
                                   len(kept), len(dropped), kept, dropped, grown, relative)

    empty = np.zeros(0, dtype=int)
    if forecast.track_count == 0:
        risk = per_constraint_risk(total_risk, steps, 1, mode)
        return result(np.full((slots, steps), risk), risk, empty, empty)

    cautious_risk = per_constraint_risk(total_risk, steps, forecast.track_count, mode)
    covariance = forecast.covariances + robot_position_covariances[None, :, :, :]
    half = inflated_half_extents(forecast.half_extents[:, None, :], forecast.headings, settings.robot_radius_m,
                                 covariance, cautious_risk)
    largest_semi_axis = box_enclosing_semi_axes(half).max(axis=-1)
    offset = forecast.positions - np.asarray(robot_position)[None, None, :]
    distance = np.hypot(offset[..., 0], offset[..., 1])
    gap = distance - largest_semi_axis - settings.max_speed_mps * forecast.times[None, :]
    closest_gap = gap.min(axis=1)
    reachable = np.flatnonzero(closest_gap <= 0.0)
    order = reachable[np.argsort(closest_gap[reachable], kind="stable")]
    kept, dropped = order[:slots], order[slots:]
    risk = per_constraint_risk(total_risk, steps, max(len(order), 1), mode)
    risks = np.full((slots, steps), risk)
    if len(kept) == 0:
        return result(risks, risk, empty, empty)

    n = len(kept)
    if mode == "joint" and pair_risks:
        for slot, index in enumerate(kept):
            carried = pair_risks.get(int(forecast.track_ids[index]))
            if carried is not None:
                risks[slot] = np.clip(carried, risk, MAX_PAIR_RISK)
    headings_kept = forecast.headings[kept]
    half_kept = inflated_half_extents(forecast.half_extents[kept, None, :], headings_kept,
                                      settings.robot_radius_m, covariance[kept], risks[:n])
    kept_axes = box_enclosing_semi_axes(half_kept)
    centres[:n] = forecast.positions[kept]
    shapes[:n] = ellipse_shape_matrix(kept_axes, headings_kept)
    semi_axes[:n] = kept_axes
    headings[:n] = headings_kept
    used[:n] = True
    track_ids[:n] = forecast.track_ids[kept]
    grown[:n] = forecast.half_extents[kept] + settings.robot_radius_m
    relative[:n] = covariance[kept]
    return result(risks, risk, kept, dropped)
