"""Suite (b) of `riskbound bench compare`: the invented exhibition hall, each method in closed loop.

Suite (b), closed loop: our own invented scene, an exhibition hall (30 m × 20 m) with
constant-velocity walkers, 60 % in the two visitor streams along the hall and the rest crossing
in random directions, wrapping around at the walls so that the density stays constant. The robot
crosses the hall along its length; the forecast it gets every cycle is a constant-velocity
prediction from a noisy measurement of each walker (σ_p, σ_v), with covariance σ_p² + σ_v² t² per
axis: for walkers that truly keep their velocity this is the exact distribution of the forecast
error. Collisions are checked against the TRUE walker boxes (robot disc against box, 5 sub-steps per
cycle); an episode ends at the goal (success), at a collision, or at the time limit ("stuck").
The mixed-integer formulation is not run in closed loop: one cycle takes seconds (see suite a).
"""

from dataclasses import dataclass

import numpy as np

from riskbound.bench.compare_collision import considered_only, plan_collision_probability, significantly_above
from riskbound.bench.compare_methods import CROWD_METHODS, finite_percentile, make_planner
from riskbound.clearance import disc_box_clearance
from riskbound.motion.forecast import ObstacleForecast

# Walking adults: speed N(1.3, 0.2²) m/s clipped, footprint half-extents (value from memory).
WALKER_SPEED_MPS = (1.3, 0.2, 0.6, 1.8)
WALKER_HALF_LENGTH_M = (0.15, 0.25)
WALKER_HALF_WIDTH_M = (0.22, 0.3)
SUBSTEPS = 5
# The hall of the far walkers lies this far to the side of the exhibition hall [m].
FAR_HALL_OFFSET_M = 60.0
GOAL_TOLERANCE_M = 0.3
# A robot slower than this when hit was standing still: the walker ran into it.
STOPPED_SPEED_MPS = 0.1


@dataclass
class Concourse:
    """The invented exhibition hall: hall size, robot route, measurement noise, time limit."""

    walkers: int
    seed: int
    half_length_m: float = 15.0
    half_width_m: float = 10.0
    start: tuple = (-8.0, 0.0)
    goal: tuple = (8.0, 0.0)
    clear_m: float = 2.5
    clear_s: float = 3.0
    far_walkers: int = 0
    position_sigma_m: float = 0.08
    velocity_sigma_mps: float = 0.12
    time_limit_s: float = 35.0
    stream_share: float = 0.6


class ConcourseWalkers:
    """Ground truth: constant-velocity walkers wrapping around at the hall's walls.

    No walker starts within `clear_m` of the robot's start or goal, nor on a course that brings it
    within `clear_m` of the start during the first `clear_s` (a collision nobody could avoid).
    `far_walkers` extra walkers use a second, identical hall `FAR_HALL_OFFSET_M` to the side: they
    are in every forecast but never within the robot's reach (they isolate the cost of pruning).
    """

    def __init__(self, scene):
        self.scene = scene
        rng = np.random.default_rng(scene.seed)
        # The far hall draws from its own stream: the exhibition hall is the same with or without it.
        near = self._draw(rng, scene.walkers, 0.0)
        far = self._draw(np.random.default_rng([scene.seed, 1]), scene.far_walkers, FAR_HALL_OFFSET_M)
        self.positions, self.velocities, self.headings, self.half_extents, self.hall_y = (
            np.concatenate([a, b]) for a, b in zip(near, far))

    def _draw(self, rng, count, hall_y):
        """Positions, velocities, headings, half-extents and hall offsets of `count` walkers."""
        scene = self.scene
        L, W = scene.half_length_m, scene.half_width_m
        mean, sd, low, high = WALKER_SPEED_MPS
        speed = np.clip(rng.normal(mean, sd, count), low, high)
        stream = rng.random(count) < scene.stream_share
        course = np.where(stream, np.where(rng.random(count) < 0.5, 0.0, np.pi) + rng.normal(0.0, 0.15, count),
                          rng.uniform(-np.pi, np.pi, count))
        velocities = speed[:, None] * np.stack([np.cos(course), np.sin(course)], axis=-1)
        start, goal = np.asarray(scene.start), np.asarray(scene.goal)
        early = np.linspace(0.0, scene.clear_s, 16)
        positions = np.zeros((count, 2))
        for j in range(count):
            while True:
                p = rng.uniform([-L, -W], [L, W]) + [0.0, hall_y]
                path = p[None, :] + early[:, None] * velocities[j][None, :]
                if (np.linalg.norm(path - start, axis=1).min() > scene.clear_m
                        and np.linalg.norm(p - goal) > scene.clear_m):
                    positions[j] = p
                    break
        half_extents = np.stack([rng.uniform(*WALKER_HALF_LENGTH_M, count),
                                 rng.uniform(*WALKER_HALF_WIDTH_M, count)], axis=-1)
        return positions, velocities, course, half_extents, np.full(count, hall_y)

    def advance(self, dt):
        L, W = self.scene.half_length_m, self.scene.half_width_m
        p = self.positions + dt * self.velocities
        p[:, 0] = (p[:, 0] + L) % (2 * L) - L
        p[:, 1] = (p[:, 1] - self.hall_y + W) % (2 * W) - W + self.hall_y
        self.positions = p

    def forecast(self, rng, times):
        """Constant-velocity forecast from a noisy measurement (see the module docstring)."""
        s = self.scene
        J = len(self.positions)
        p = self.positions + rng.normal(0.0, s.position_sigma_m, (J, 2))
        v = self.velocities + rng.normal(0.0, s.velocity_sigma_mps, (J, 2))
        positions = p[:, None, :] + times[None, :, None] * v[:, None, :]
        variance = s.position_sigma_m**2 + (times * s.velocity_sigma_mps) ** 2
        covariances = np.zeros((J, len(times), 2, 2))
        covariances[..., 0, 0] = covariances[..., 1, 1] = variance[None, :]
        headings = np.repeat(np.arctan2(v[:, 1], v[:, 0])[:, None], len(times), axis=1)
        return ObstacleForecast(np.arange(J), times, positions, headings, covariances, self.half_extents)


def _brake(model, x, settings):
    """Input that stops the robot at the acceleration limit (the watchdog's stop)."""
    if model.name == "unicycle":
        return np.array([np.clip(-x[3] / settings.step_s, -settings.max_accel_mps2, settings.max_accel_mps2), 0.0])
    return np.clip(-x[2:4] / settings.step_s, -settings.max_accel_mps2, settings.max_accel_mps2)


def run_episode(planner, settings, scene, mc_samples, collision_check=True, record=False):
    """One closed-loop run; returns outcome, per-cycle solve times and plan collision probabilities.

    With `record`, also the (state, forecast) of every cycle, to replay the same problems later.
    """
    model = planner.model
    dt, N = settings.step_s, settings.horizon_steps
    times = dt * np.arange(1, N + 1)
    walkers = ConcourseWalkers(scene)
    noise_rng = np.random.default_rng(10_000 + scene.seed)  # same measurement noise for every method
    robot_rng = np.random.default_rng(20_000 + scene.seed)
    mc_rng = np.random.default_rng(30_000 + scene.seed)
    goal = np.asarray(scene.goal, dtype=float)
    if model.name == "unicycle":
        x = np.array([*scene.start, np.arctan2(*(goal - scene.start)[::-1]), 0.0])
    else:
        x = np.array([*scene.start, 0.0, 0.0])
    P0 = np.diag([0.02**2, 0.02**2, 0.05**2, 0.05**2])
    planner.reset()
    solve_ms, probabilities, probabilities_considered, failures, recorded = [], [], [], {}, []
    outcome, cycles = "stuck", int(round(scene.time_limit_s / dt))
    hit_while_stopped = False
    for _ in range(cycles):
        forecast = walkers.forecast(noise_rng, times)
        if record:
            recorded.append((x.copy(), forecast))
        result = planner.solve(x, P0, goal, forecast, elapsed_s=dt)
        solve_ms.append(result.solve_ms)
        if result.success:
            u = result.inputs[0]
            if mc_samples:
                probability = plan_collision_probability(result.states, result.inputs, P0, forecast,
                                                         settings, model, mc_rng, mc_samples)
                probabilities.append(probability)
                # With obstacles dropped by the slot cap, α covers only the ones constrained.
                if result.obstacles_dropped:
                    probability = plan_collision_probability(
                        result.states, result.inputs, P0, considered_only(forecast, result.constraints),
                        settings, model, mc_rng, mc_samples)
                probabilities_considered.append(probability)
        else:
            failures[result.status] = failures.get(result.status, 0) + 1
            u = _brake(model, x, settings)
        noise = robot_rng.normal(0.0, [settings.robot_accel_noise, settings.robot_turn_noise])
        applied = u + (noise if model.name == "unicycle" else robot_rng.normal(0.0, settings.robot_accel_noise, 2))
        collided = False
        for _ in range(SUBSTEPS):
            x = model.step(x, applied, dt / SUBSTEPS)
            walkers.advance(dt / SUBSTEPS)
            if collision_check and disc_box_clearance(x[0:2], settings.robot_radius_m, walkers.positions,
                                                      walkers.headings, walkers.half_extents).min() < 0.0:
                collided = True
                break
        if collided:
            outcome = "collision"
            hit_while_stopped = bool(model.speed(x) < STOPPED_SPEED_MPS)
            break
        if np.linalg.norm(x[0:2] - goal) < GOAL_TOLERANCE_M:
            outcome = "success"
            break
    return {"outcome": outcome, "hit_while_stopped": hit_while_stopped, "solve_ms": solve_ms,
            "collision_probabilities": probabilities,
            "collision_probabilities_considered": probabilities_considered,
            "failures": failures, "cycles": len(solve_ms), "recorded": recorded, "P0": P0, "goal": goal}


def run_crowds(settings, sizes, seeds, sigma_multiple, mc_samples, scene_options, log):
    planners = {m: make_planner(m, settings, sigma_multiple) for m in CROWD_METHODS}
    results = {m: {} for m in CROWD_METHODS}
    for size in sizes:
        for method, planner in planners.items():
            episodes = []
            for seed in range(seeds):
                episode = run_episode(planner, settings, Concourse(size, seed, **scene_options), mc_samples)
                episodes.append(episode)
                log(f"crowd {size:3d} walkers seed {seed} {method:16s} {episode['outcome']:9s} "
                    f"{episode['cycles']:3d} cycles, median {np.median(episode['solve_ms']):.1f} ms")
            results[method][size] = episodes
    return results


def summarise_crowds(results, alpha, samples):
    summary = {}
    for method, by_size in results.items():
        summary[method] = {}
        for size, episodes in by_size.items():
            solve_ms = np.concatenate([e["solve_ms"] for e in episodes])
            probability = np.concatenate([e["collision_probabilities"] for e in episodes] + [np.zeros(0)])
            considered = np.concatenate([e["collision_probabilities_considered"] for e in episodes] + [np.zeros(0)])
            outcomes = [e["outcome"] for e in episodes]
            summary[method][str(size)] = {
                "episodes": len(episodes),
                "success_rate": outcomes.count("success") / len(episodes),
                "collision_rate": outcomes.count("collision") / len(episodes),
                "collisions_while_stopped": sum(e["hit_while_stopped"] for e in episodes),
                "stuck": outcomes.count("stuck"),
                "solve_ms_median": float(np.median(solve_ms)), "solve_ms_p90": finite_percentile(solve_ms, 90),
                "failed_solve_fraction": float(sum(sum(e["failures"].values()) for e in episodes)
                                               / max(len(solve_ms), 1)),
                "failed_solves_by_status": {status: sum(e["failures"].get(status, 0) for e in episodes)
                                            for status in sorted({s for e in episodes for s in e["failures"]})},
                "collision_probability_mean": float(np.mean(probability)) if len(probability) else 0.0,
                "collision_probability_max": float(np.max(probability)) if len(probability) else 0.0,
                "collision_probability_max_considered": float(np.max(considered)) if len(considered) else 0.0,
                "plans_above_alpha": int(np.sum(probability > alpha)),
                "plans_significantly_above_alpha": significantly_above(probability, samples, alpha),
            }
    return summary

