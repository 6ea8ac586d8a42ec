"""Social force pedestrian model, Phys. Rev. E 51, 4282 (1995) (the "elliptical" variant).

Every pedestrian α is a point with position r_α, velocity v_α, desired speed v⁰_α and desired
direction e_α (towards its next waypoint). Forces are per unit mass (m/s²):

* driving term        (v⁰_α e_α − v_α) / τ
* other pedestrians   f_αβ = −∇_r V(b),  V(b) = V⁰ exp(−b/σ),
                      2b = sqrt((|r| + |r − s e_β|)² − s²),  r = r_α − r_β,  s = |v_β| Δt
  (b is the semi-minor axis of an ellipse around β stretched along β's step: people keep more
  room in front of someone walking than beside them), weighted by w = 1 when β is inside α's
  field of view (half-angle φ about e_α) and by c < 1 when β is behind.
* walls and obstacles f_αB = −∇_r U(d),  U(d) = U⁰ exp(−d/R), d = distance to the nearest point
  of the wall segment or obstacle edge.
* speed limit         |v_α| ≤ v_max,α = 1.3 v⁰_α.

Walkers here also have a body radius: the pedestrian potential is referenced to the gap between
the two discs (b minus the sum of the radii), and the wall potential to the gap between disc and
wall, so that the published decay lengths act on the free space people actually keep. With zero
radii the model is the published point model.

Two bounds keep the walkers' motion within what people do (our choices, no source). Measured on
the 40-walker courtyard (seed 7, 10 Hz truth), the unbounded model gave accelerations of 14 m/s²
at the 99th percentile and 32 m/s² at most: a walker a tracker cannot follow and a planner cannot
anticipate. Bounded as below: 5 m/s² at the 99th percentile, the rest coming from body contacts.

* The pedestrian repulsion saturates at contact: for a negative gap (the ellipse of β reaches into
  α's disc, which the elliptical b does for people walking close behind one another) its
  magnitude stays at its contact value V⁰/σ instead of growing exponentially.
* The sum of the interaction terms (pedestrians, walls, group cohesion) is limited in norm to
  `max_interaction_accel_mps2`. The driving term is not limited, so a lone walker still follows
  the analytic v(t) below.

Bodies do not pass through each other: the 1995 model has no contact term, and in crossing
flows its smooth repulsion alone lets discs overlap. After each step, overlapping discs are pushed
apart along the line of centres and their closing velocity is removed; discs that reach a wall or
obstacle are put back on its surface and lose the velocity into it (a hard-contact constraint,
common practice in crowd simulation, no source). `step` reports how many contacts it resolved.

The robot, when the walkers react to it, is one more β for every walker: the same elliptical
potential around the robot's disc and its step s = |v_robot| Δt, with its own strength
V_robot (`RobotPresence.strength_m2_s2`; the pedestrians' V⁰ = 2.1 m²/s² treats the robot as a
person, 0 leaves the walkers blind to it and skips the term entirely, so the crowd is exactly the
non-reacting one). The robot is not part of the hard-contact step: walkers may still touch it,
and those contacts are what a closed loop counts.

Integration: over one step h the interaction forces are held constant and the relaxation term is
integrated exactly (exponential integrator), so a lone walker follows the analytic
v(t) = v⁰ (1 − exp(−t/τ)) at any step size.
"""

from dataclasses import dataclass, fields

import numpy as np

# Tiny floor on lengths that are divided by: keeps coincident points from producing NaN.
_EPS_M = 1e-9
# Passes of the contact projection per step: one pass can push a disc into a third one.
CONTACT_ITERATIONS = 4


@dataclass(frozen=True)
class SocialForceParameters:
    """Model constants. Defaults are the simulation parameters given in Phys. Rev. E 51, 4282
    (1995) (value from memory of that paper)."""

    relaxation_time_s: float = 0.5          # τ
    pedestrian_strength_m2_s2: float = 2.1  # V⁰
    pedestrian_range_m: float = 0.3         # σ
    step_horizon_s: float = 2.0             # Δt in the ellipse semi-axis b
    wall_strength_m2_s2: float = 10.0       # U⁰
    wall_range_m: float = 0.2               # R
    view_half_angle_deg: float = 100.0      # φ (field of view 2φ = 200°)
    behind_weight: float = 0.5              # c
    max_speed_factor: float = 1.3           # v_max = 1.3 v⁰
    # Not in the 1995 model: a bound on the interaction terms, our choice (see the module
    # docstring); float("inf") gives the published model.
    max_interaction_accel_mps2: float = 5.0

    def __post_init__(self):
        for field in fields(self):
            value = getattr(self, field.name)
            if not np.isfinite(value) and field.name != "max_interaction_accel_mps2":
                raise ValueError(f"{field.name}={value!r}: must be a finite number")
        positive = ("relaxation_time_s", "pedestrian_range_m", "wall_range_m", "max_speed_factor",
                    "max_interaction_accel_mps2")
        for name in positive:
            if getattr(self, name) <= 0.0:
                raise ValueError(f"{name}={getattr(self, name)!r}: must be > 0")
        for name in ("pedestrian_strength_m2_s2", "wall_strength_m2_s2", "step_horizon_s"):
            if getattr(self, name) < 0.0:
                raise ValueError(f"{name}={getattr(self, name)!r}: must be >= 0")
        if not 0.0 <= self.view_half_angle_deg <= 180.0:
            raise ValueError(f"view_half_angle_deg={self.view_half_angle_deg!r}: must be in [0, 180]")
        if not 0.0 <= self.behind_weight <= 1.0:
            raise ValueError(f"behind_weight={self.behind_weight!r}: must be in [0, 1]")


@dataclass(frozen=True)
class Geometry:
    """Static surroundings: wall segments (M, 2, 2) as [[x1, y1], [x2, y2]] and disc obstacles
    with centres (K, 2) and radii (K,), all in metres."""

    walls: np.ndarray
    obstacle_centres: np.ndarray
    obstacle_radii: np.ndarray

    @classmethod
    def build(cls, walls=(), obstacle_centres=(), obstacle_radii=()):
        walls = np.asarray(walls, dtype=float).reshape(-1, 2, 2)
        centres = np.asarray(obstacle_centres, dtype=float).reshape(-1, 2)
        radii = np.asarray(obstacle_radii, dtype=float).reshape(-1)
        if len(centres) != len(radii):
            raise ValueError(f"obstacle_radii has {len(radii)} entries for {len(centres)} obstacle_centres")
        return cls(walls, centres, radii)


def nearest_points_on_segments(points, segments):
    """Closest point of every segment to every point: (N, 2) × (M, 2, 2) → (N, M, 2)."""
    start = segments[:, 0, :]
    along = segments[:, 1, :] - start
    length2 = np.maximum(np.einsum("md,md->m", along, along), _EPS_M)
    offset = points[:, None, :] - start[None, :, :]
    fraction = np.clip(np.einsum("nmd,md->nm", offset, along) / length2, 0.0, 1.0)
    return start[None, :, :] + fraction[..., None] * along[None, :, :]


def crossed_walls(start, end, walls):
    """Indices of the wall segments (M, 2, 2) that the segment start → end properly crosses."""
    walls = np.asarray(walls, dtype=float).reshape(-1, 2, 2)
    start, end = np.asarray(start, dtype=float), np.asarray(end, dtype=float)

    def side(a, b, c):
        return (b[..., 0] - a[..., 0]) * (c[..., 1] - a[..., 1]) - (b[..., 1] - a[..., 1]) * (c[..., 0] - a[..., 0])

    q1, q2 = walls[:, 0], walls[:, 1]
    crosses = (side(q1, q2, start) * side(q1, q2, end) < 0.0) & (side(start, end, q1) * side(start, end, q2) < 0.0)
    return np.flatnonzero(crosses)


def boundary_clearance(points, radii, geometry):
    """Smallest gap between each walker's disc and any wall or obstacle [m] (inf when none);
    negative means overlap."""
    clearance = np.full(len(points), np.inf)
    if len(geometry.walls):
        nearest = nearest_points_on_segments(points, geometry.walls)
        distance = np.linalg.norm(points[:, None, :] - nearest, axis=2)
        clearance = np.minimum(clearance, distance.min(axis=1) - radii)
    if len(geometry.obstacle_radii):
        distance = np.linalg.norm(points[:, None, :] - geometry.obstacle_centres[None], axis=2)
        gap = distance - geometry.obstacle_radii[None, :] - radii[:, None]
        clearance = np.minimum(clearance, gap.min(axis=1))
    return clearance


@dataclass(frozen=True)
class RobotPresence:
    """The robot as the walkers see it during one step: a disc at `position` (2,) [m] moving with
    `velocity` (2,) [m/s], of radius `radius_m`, repelling with `strength_m2_s2` (V_robot, ≥ 0)."""

    position: np.ndarray
    velocity: np.ndarray
    radius_m: float
    strength_m2_s2: float

    def __post_init__(self):
        if not (np.isfinite(self.strength_m2_s2) and self.strength_m2_s2 >= 0.0):
            raise ValueError(f"strength_m2_s2={self.strength_m2_s2!r}: must be a finite number >= 0")
        if not (np.isfinite(self.radius_m) and self.radius_m >= 0.0):
            raise ValueError(f"radius_m={self.radius_m!r}: must be a finite number >= 0")
        for name in ("position", "velocity"):
            value = np.asarray(getattr(self, name), dtype=float)
            if value.shape != (2,) or not np.all(np.isfinite(value)):
                raise ValueError(f"{name}={getattr(self, name)!r}: must be two finite numbers")


def _elliptical_repulsion(r, speed, heading, contact_m, strength_m2_s2, params):
    """f = −∇_r V(b) of every β on every α, (N, M, 2) [m/s²], before the view weight.

    r: (N, M, 2) r_α − r_β; speed, heading: (M,), (M, 2) of β; contact_m: (N, M) sum of the radii.
    """
    step = (speed * params.step_horizon_s)[None, :, None] * heading[None, :, :]  # s e_β
    r_ahead = r - step
    norm_r = np.maximum(np.linalg.norm(r, axis=2), _EPS_M)
    norm_ahead = np.maximum(np.linalg.norm(r_ahead, axis=2), _EPS_M)
    s = np.broadcast_to(speed[None, :] * params.step_horizon_s, norm_r.shape)
    sum_norms = norm_r + norm_ahead
    b = 0.5 * np.sqrt(np.maximum(sum_norms ** 2 - s ** 2, _EPS_M ** 2))
    gap = b - contact_m
    # dV/db = −V/σ; ∂b/∂r = (|r| + |r − s e|)(r/|r| + (r − s e)/|r − s e|) / (4b)
    # Saturated at contact (module docstring): an overlap does not grow the repulsion further.
    magnitude = (strength_m2_s2 / params.pedestrian_range_m
                 * np.exp(-np.maximum(gap, 0.0) / params.pedestrian_range_m))
    db_dr = (sum_norms / (4.0 * np.maximum(b, _EPS_M)))[..., None] * (
        r / norm_r[..., None] + r_ahead / norm_ahead[..., None])
    return magnitude[..., None] * db_dr, norm_r


def _view_weight(r, norm_r, directions, params):
    """w = 1 where β lies within φ of e_α, c behind (N, M)."""
    to_beta = -r / norm_r[..., None]
    in_view = np.einsum("nd,nmd->nm", directions, to_beta) >= np.cos(np.radians(params.view_half_angle_deg))
    return np.where(in_view, 1.0, params.behind_weight)


def pedestrian_forces(positions, velocities, directions, radii, params):
    """Sum over β of the weighted repulsion f_αβ on each α (N, 2) [m/s²]."""
    count = len(positions)
    if count < 2:
        return np.zeros((count, 2))
    r = positions[:, None, :] - positions[None, :, :]               # r_α − r_β, (N, N, 2)
    speed = np.linalg.norm(velocities, axis=1)
    heading = velocities / np.maximum(speed, _EPS_M)[:, None]
    force, norm_r = _elliptical_repulsion(r, speed, heading, radii[:, None] + radii[None, :],
                                          params.pedestrian_strength_m2_s2, params)
    weight = _view_weight(r, norm_r, directions, params)
    np.fill_diagonal(weight, 0.0)
    return np.einsum("nm,nmd->nd", weight, force)


def robot_forces(positions, directions, radii, robot, params):
    """Repulsion of the robot's disc on each walker (N, 2) [m/s²] (module docstring)."""
    centre = np.asarray(robot.position, dtype=float)
    velocity = np.asarray(robot.velocity, dtype=float).reshape(1, 2)
    r = positions[:, None, :] - centre[None, None, :]                 # r_α − r_robot, (N, 1, 2)
    speed = np.linalg.norm(velocity, axis=1)
    heading = velocity / np.maximum(speed, _EPS_M)[:, None]
    force, norm_r = _elliptical_repulsion(r, speed, heading, radii[:, None] + robot.radius_m,
                                          robot.strength_m2_s2, params)
    weight = _view_weight(r, norm_r, directions, params)
    return np.einsum("nm,nmd->nd", weight, force)


def boundary_forces(positions, radii, geometry, params):
    """Repulsion from walls and obstacle edges on each walker (N, 2) [m/s²]."""
    total = np.zeros_like(positions)
    scale = params.wall_strength_m2_s2 / params.wall_range_m
    if len(geometry.walls):
        away = positions[:, None, :] - nearest_points_on_segments(positions, geometry.walls)
        distance = np.maximum(np.linalg.norm(away, axis=2), _EPS_M)
        gap = distance - radii[:, None]
        magnitude = scale * np.exp(-gap / params.wall_range_m)
        total += np.einsum("nm,nmd->nd", magnitude / distance, away)
    if len(geometry.obstacle_radii):
        away = positions[:, None, :] - geometry.obstacle_centres[None, :, :]
        distance = np.maximum(np.linalg.norm(away, axis=2), _EPS_M)
        gap = distance - geometry.obstacle_radii[None, :] - radii[:, None]
        magnitude = scale * np.exp(-gap / params.wall_range_m)
        total += np.einsum("nm,nmd->nd", magnitude / distance, away)
    return total


def step(positions, velocities, targets, desired_speeds, radii, geometry, params, dt_s, extra_forces=None,
         robot=None):
    """Advance all walkers by dt_s. Returns new (positions, velocities, contacts): positions and
    velocities (N, 2) and the number of contacts resolved in this step.

    targets: (N, 2) points the walkers head for; desired_speeds: (N,) v⁰ [m/s];
    radii: (N,) body radii [m]; extra_forces: optional (N, 2) [m/s²] added to the interactions
    (the simulation uses it to keep groups together); robot: an optional RobotPresence the
    walkers react to (None or strength 0: they do not).
    """
    positions = np.asarray(positions, dtype=float)
    velocities = np.asarray(velocities, dtype=float)
    if len(positions) == 0:
        return positions.copy(), velocities.copy(), 0
    to_target = targets - positions
    distance = np.linalg.norm(to_target, axis=1)
    directions = np.where(distance[:, None] > _EPS_M, to_target / np.maximum(distance, _EPS_M)[:, None], 0.0)
    interaction = pedestrian_forces(positions, velocities, directions, radii, params)
    interaction += boundary_forces(positions, radii, geometry, params)
    if extra_forces is not None:
        interaction += extra_forces
    if robot is not None and robot.strength_m2_s2 > 0.0:
        interaction += robot_forces(positions, directions, radii, robot, params)
    interaction = _limit_norm(interaction, params.max_interaction_accel_mps2)
    tau = params.relaxation_time_s
    # Exact solution of dv/dt = (v∞ − v)/τ with v∞ = v⁰e + τf held constant over the step.
    v_inf = desired_speeds[:, None] * directions + tau * interaction
    decay = np.exp(-dt_s / tau)
    new_velocities = v_inf + (velocities - v_inf) * decay
    displacement = v_inf * dt_s + (velocities - v_inf) * tau * (1.0 - decay)
    max_speed = params.max_speed_factor * desired_speeds
    new_velocities = _limit_norm(new_velocities, max_speed)
    displacement = _limit_norm(displacement, max_speed * dt_s)
    new_positions, new_velocities, contacts = resolve_contacts(positions + displacement, new_velocities, radii, geometry)
    return new_positions, new_velocities, contacts


def resolve_contacts(positions, velocities, radii, geometry, iterations=CONTACT_ITERATIONS):
    """Hard-contact constraint (see the module docstring). Returns (positions, velocities, contacts)."""
    positions = positions.copy()
    velocities = velocities.copy()
    contacts = 0
    for _ in range(iterations):
        found = 0
        if len(positions) >= 2:
            r = positions[:, None, :] - positions[None, :, :]
            distance = np.linalg.norm(r, axis=2)
            np.fill_diagonal(distance, np.inf)
            overlap = radii[:, None] + radii[None, :] - distance
            touching = overlap > 0.0
            found += int(np.count_nonzero(touching)) // 2
            if found:
                normal = r / np.maximum(distance, _EPS_M)[..., None]
                depth = np.where(touching, overlap, 0.0)
                positions += 0.5 * np.einsum("nm,nmd->nd", depth, normal)
                # Remove the closing part of each touching pair's relative velocity, shared equally.
                closing = np.einsum("nmd,nmd->nm", velocities[:, None, :] - velocities[None, :, :], normal)
                closing = np.where(touching, np.minimum(closing, 0.0), 0.0)
                velocities -= 0.5 * np.einsum("nm,nmd->nd", closing, normal)
        found += _push_out_of_boundaries(positions, velocities, radii, geometry)
        contacts += found
        if not found:
            break
    return positions, velocities, contacts


def _push_out_of_boundaries(positions, velocities, radii, geometry):
    """Move discs that reach a wall or obstacle back onto its surface, in place. Returns the count."""
    found = 0
    if len(geometry.walls):
        nearest = nearest_points_on_segments(positions, geometry.walls)
        away = positions[:, None, :] - nearest
        distance = np.linalg.norm(away, axis=2)
        closest = np.argmin(distance, axis=1)
        rows = np.arange(len(positions))
        gap = distance[rows, closest] - radii
        hit = gap < 0.0
        if hit.any():
            normal = away[rows, closest] / np.maximum(distance[rows, closest], _EPS_M)[:, None]
            positions[hit] -= gap[hit, None] * normal[hit]
            into = np.minimum(np.einsum("nd,nd->n", velocities, normal), 0.0)
            velocities[hit] -= into[hit, None] * normal[hit]
            found += int(hit.sum())
    if len(geometry.obstacle_radii):
        away = positions[:, None, :] - geometry.obstacle_centres[None, :, :]
        distance = np.linalg.norm(away, axis=2)
        gap = distance - geometry.obstacle_radii[None, :] - radii[:, None]
        closest = np.argmin(gap, axis=1)
        rows = np.arange(len(positions))
        hit = gap[rows, closest] < 0.0
        if hit.any():
            normal = away[rows, closest] / np.maximum(distance[rows, closest], _EPS_M)[:, None]
            positions[hit] -= gap[rows, closest][hit, None] * normal[hit]
            into = np.minimum(np.einsum("nd,nd->n", velocities, normal), 0.0)
            velocities[hit] -= into[hit, None] * normal[hit]
            found += int(hit.sum())
    return found


def _limit_norm(vectors, limits):
    norms = np.linalg.norm(vectors, axis=1)
    scale = np.where(norms > limits, limits / np.maximum(norms, _EPS_M), 1.0)
    return vectors * scale[:, None]
