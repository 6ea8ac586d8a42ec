"""From obstacle forecasts to the numbers of the ellipsoid constraints: prune, allocate risk, inflate.

For every obstacle j and step k the constraint is (p_k − o_jk)ᵀ A_jk (p_k − o_jk) ≥ 1, with A_jk the
shape matrix of the minimum-volume ellipse enclosing the deterministic-equivalent box
(riskbound.risk.box, riskbound.risk.ellipsoid).

Pruning: an obstacle is kept only if at some step k its ellipse comes within the robot's reach,
‖o_jk − p₀‖ − a_jk ≤ v_max t_k, with a_jk the ellipse's largest semi-axis. The survivors are
ranked by their smallest such gap and the nearest `max_obstacles` are kept. The ellipses used for
pruning are computed with the smallest per-constraint risk that can be in force (all slots used),
so they are never smaller than the final ones and pruning stays conservative.
"""

from dataclasses import dataclass

import numpy as np

from riskbound.risk.allocation import per_constraint_risk
from riskbound.risk.box import inflated_half_extents
from riskbound.risk.ellipsoid import box_enclosing_semi_axes, ellipse_shape_matrix

# An unused obstacle slot: an ellipse far away that no plan within reach can touch.
# dᵀ A d = 1e-6 · (2e3)² = 4 ≥ 1 with a gradient of order 1e-3, so it neither binds nor distorts.
UNUSED_SLOT_OFFSET_M = 2.0e3
UNUSED_SLOT_SHAPE = 1.0e-6


@dataclass
class ObstacleConstraints:
    """Constraint numbers for the solver slots.

    centres: (M, N, 2), shapes: (M, N, 2, 2), used: (M,) bool, track_ids: (M,) (−1 when unused),
    risk: per-constraint risk in force, considered: obstacles constrained, dropped: obstacles that
    could come within reach but exceeded `max_obstacles`, semi_axes: (M, N, 2) for plotting.
    """

    centres: np.ndarray
    shapes: np.ndarray
    semi_axes: np.ndarray
    headings: np.ndarray
    used: np.ndarray
    track_ids: np.ndarray
    risk: float
    considered: int
    dropped: int


def build_obstacle_constraints(forecast, robot_position_covariances, robot_position, settings):
    """Prune, allocate risk and compute the ellipse of every kept obstacle on the planner's grid.

    forecast: ObstacleForecast already on the grid t_k = k·Δt, k = 1…N
    robot_position_covariances: (N, 2, 2) robot position covariance at the same steps
    robot_position: (2,) current robot position
    """
    steps, slots = settings.horizon_steps, settings.max_obstacles
    centres = np.tile(np.asarray(robot_position, dtype=float) + [UNUSED_SLOT_OFFSET_M, 0.0], (slots, steps, 1))
    shapes = np.tile(np.eye(2) * UNUSED_SLOT_SHAPE, (slots, steps, 1, 1))
    semi_axes = np.full((slots, steps, 2), 1.0 / np.sqrt(UNUSED_SLOT_SHAPE))
    headings = np.zeros((slots, steps))
    used = np.zeros(slots, dtype=bool)
    track_ids = np.full(slots, -1, dtype=np.int64)

    def result(risk, considered, dropped):
        return ObstacleConstraints(centres, shapes, semi_axes, headings, used, track_ids, risk,
                                   considered, dropped)

    total_risk, mode = settings.risk_level, settings.risk_allocation
    if forecast.track_count == 0:
        return result(per_constraint_risk(total_risk, steps, 1, mode), 0, 0)

    cautious_risk = per_constraint_risk(total_risk, steps, slots, mode)
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
    kept, dropped = order[:slots], max(len(order) - slots, 0)
    if len(kept) == 0:
        return result(per_constraint_risk(total_risk, steps, 1, mode), 0, 0)

    risk = per_constraint_risk(total_risk, steps, len(kept), mode)
    headings_kept = forecast.headings[kept]
    half_kept = inflated_half_extents(forecast.half_extents[kept, None, :], headings_kept,
                                      settings.robot_radius_m, covariance[kept], risk)
    kept_axes = box_enclosing_semi_axes(half_kept)
    kept_shapes = ellipse_shape_matrix(kept_axes, headings_kept)
    n = len(kept)
    centres[:n] = forecast.positions[kept]
    shapes[:n] = kept_shapes
    semi_axes[:n] = kept_axes
    headings[:n] = headings_kept
    used[:n] = True
    track_ids[:n] = forecast.track_ids[kept]
    return result(risk, n, dropped)
