"""`riskbound bench compare`: our planner against the three baselines, side by side in one process.

Methods (same robot model, cost, forecasts, pruning and per-constraint risk where they have one):
``ours`` the chance-constrained MPC (ellipse per obstacle and step, IPOPT);
``mixed_integer`` the disjunctive formulation (one binary per face and step, bonmin), exact for the box;
``linearised`` half-planes about the previous plan (one QP per cycle; up to `--passes` in suite a);
``robust_inflation`` ellipses grown by a fixed `--sigma-multiple` standard deviations, no allocation.

Suite (a), open loop: random single-obstacle instances (start speed, goal, obstacle box, heading,
velocity, initial and growth covariance of the obstacle, robot covariance). Every method plans once
from a cold start. The mixed-integer plan is the reference optimum of the disjunctive problem; the
cost gap of a method is cost / cost_mixed_integer − 1 on the instances both solved. A method is
"stuck" on an instance when it returns no usable plan, or a plan ending with less than half the
progress towards the goal that the mixed-integer plan makes (it stopped in front of the obstacle).

Suite (b), closed loop: our own invented scene, an exhibition hall (30 m × 20 m) with
constant-velocity walkers, 60 % in the two visitor streams along the hall and the rest crossing
in random directions, wrapping around at the walls so that the density stays constant. The robot
crosses the hall along its length; the forecast it gets every cycle is a constant-velocity
prediction from a noisy measurement of each walker (σ_p, σ_v), with covariance σ_p² + σ_v² t² per
axis: for walkers that truly keep their velocity this is the exact distribution of the forecast
error. Collisions are checked against the TRUE walker boxes (robot disc against box, 5 sub-steps per
cycle); an episode ends at the goal (success), at a collision, or at the time limit ("stuck").
The mixed-integer formulation is not run in closed loop: one cycle takes seconds (see suite a).

Empirical collision probability of a plan: Monte Carlo over the forecast (each obstacle and step
drawn from its Gaussian) and the robot's position covariance propagated along the plan, counting
a sample as a collision when the relative position lies in the obstacle box grown by the robot
radius at ANY step (the event whose probability the joint risk level α bounds). Steps are drawn
independently, which makes the union no smaller than for the positively correlated errors of real
motion; Boole's inequality bounds it either way.

Outputs in --out: compare.md (tables), compare.json, solve_ms_vs_walkers.png, cost_gap_hist.png,
success_rates.png. JSON keys:
    settings, machine, alpha, suite{instances, methods{<m>{solve_ms_median, solve_ms_p90,
    speedup_vs_mixed_integer, cost_gap_mean, cost_gap_median, cost_gap_p90,
    cost_gap_mean_where_obstacle_active, success_rate, collision_probability_mean,
    collision_probability_max, stuck}}, obstacle_active_instances, cost_gaps{<m>[...]}},
    crowd{sizes, seeds, methods{<m>{<size>{episodes, success_rate, collision_rate,
    collisions_while_stopped, stuck, solve_ms_median, solve_ms_p90, failed_solve_fraction,
    failed_solves_by_status{<status>: cycles},
    collision_probability_mean, collision_probability_max, collision_probability_max_considered,
    plans_above_alpha}}}}, pruning{walkers_low, walkers_high, solve_ms_median_low,
    solve_ms_median_high, ratio, solve_ms_median_replay_low, solve_ms_median_replay_high_far, ratio_far},
    targets{<name>{target, measured, met}}, wall_time_s
Figures that cannot be computed (for example a cost gap when no instance was solved by both
methods) are written as null.
"""

import json
import os
import time
from dataclasses import dataclass

import numpy as np

from riskbound.clearance import disc_box_clearance
from riskbound.motion.covariance import propagate_along_trajectory
from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.baselines.common import goal_reference, plan_cost
from riskbound.planning.baselines.linearised import LinearisedPlanner
from riskbound.planning.baselines.mixed_integer import MixedIntegerPlanner
from riskbound.planning.baselines.robust_inflation import RobustInflationPlanner
from riskbound.planning.mpc import ChanceConstrainedMPC
from riskbound.planning.settings import PlannerSettings

METHODS = ("ours", "mixed_integer", "linearised", "robust_inflation")
CROWD_METHODS = ("ours", "linearised", "robust_inflation")
LABELS = {"ours": "ours (ellipse MPC)", "mixed_integer": "mixed-integer", "linearised": "linearised",
          "robust_inflation": "robust inflation"}
# Targets. Mean cost gap: the figure reported for this method family against the mixed-integer
# formulation, recalled from memory (value from memory). Speed-up (300×) and pruning ratio: our own
# targets for the sequential QP path.
TARGET_SPEEDUP = 300.0
TARGET_COST_GAP = 0.04
TARGET_PRUNING_RATIO = 2.0
# Walking adults: speed N(1.3, 0.2²) m/s clipped, footprint half-extents (value from memory).
WALKER_SPEED_MPS = (1.3, 0.2, 0.6, 1.8)
WALKER_HALF_LENGTH_M = (0.15, 0.25)
WALKER_HALF_WIDTH_M = (0.22, 0.3)
SUBSTEPS = 5
# The hall of the far walkers lies this far to the side of the exhibition hall [m].
FAR_HALL_OFFSET_M = 60.0
GOAL_TOLERANCE_M = 0.3
# A plan that ends with less than this share of the mixed-integer plan's progress stopped short.
STUCK_PROGRESS_SHARE = 0.5
# The obstacle "shapes" an instance when the mixed-integer plan comes this close to its box [m].
ACTIVE_MARGIN_M = 0.01
# A robot slower than this when hit was standing still: the walker ran into it.
STOPPED_SPEED_MPS = 0.1


# --- helpers -------------------------------------------------------------------------------------

def _sqrt_psd(covariance):
    """Symmetric square roots (…, 2, 2) of PSD 2×2 matrices (Cholesky fails on singular ones)."""
    values, vectors = np.linalg.eigh(covariance)
    return np.einsum("...ij,...j,...kj->...ik", vectors, np.sqrt(np.clip(values, 0.0, None)), vectors)


def plan_collision_probability(states, inputs, P0, forecast, settings, model, rng, samples):
    """Empirical P(any step of the plan is inside any grown obstacle box), see the module docstring."""
    N = settings.horizon_steps
    if forecast.track_count == 0:
        return 0.0
    robot_cov = propagate_along_trajectory(model, states, inputs, settings.step_s, P0,
                                           settings.robot_accel_noise, settings.robot_turn_noise)[1:, 0:2, 0:2]
    planned = states[1:, 0:2]  # (N, 2)
    grown = forecast.half_extents + settings.robot_radius_m  # (J, 2)
    spread = np.sqrt(np.trace(forecast.covariances, axis1=-2, axis2=-1).max(axis=1)
                     + np.trace(robot_cov, axis1=-2, axis2=-1).max())
    distance = np.linalg.norm(forecast.positions - planned[None], axis=-1).min(axis=1)
    # Farther than 8 standard deviations beyond the box corner: probability below 1e-14, skip.
    near = np.flatnonzero(distance < np.linalg.norm(grown, axis=-1) + 8.0 * spread)
    if len(near) == 0:
        return 0.0
    covariance = forecast.covariances[near] + robot_cov[None]  # relative position covariance
    root = _sqrt_psd(covariance)  # (J, N, 2, 2)
    z = rng.standard_normal((samples, len(near), N, 2))
    relative = (planned[None, None] - forecast.positions[near][None]) + np.einsum("jkab,sjkb->sjka", root, z)
    c, s = np.cos(forecast.headings[near]), np.sin(forecast.headings[near])
    along = relative[..., 0] * c + relative[..., 1] * s
    across = -relative[..., 0] * s + relative[..., 1] * c
    inside = (np.abs(along) < grown[near, None, 0]) & (np.abs(across) < grown[near, None, 1])
    return float(np.mean(inside.any(axis=(1, 2))))


def considered_only(forecast, constraints):
    """The part of `forecast` a planner constrained this cycle (its obstacle slots in use)."""
    ids = set(int(i) for i in constraints.track_ids[: constraints.considered])
    keep = np.array([int(i) in ids for i in forecast.track_ids], dtype=bool)
    return ObstacleForecast(forecast.track_ids[keep], forecast.times, forecast.positions[keep],
                            forecast.headings[keep], forecast.covariances[keep], forecast.half_extents[keep])


def _percentile(values, q):
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(np.percentile(values, q)) if len(values) else float("nan")


def _finite_or_null(value):
    """JSON has no NaN: a figure that could not be computed (no instance solved by both) becomes null."""
    if isinstance(value, dict):
        return {str(k): _finite_or_null(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_or_null(v) for v in value]
    if isinstance(value, (float, np.floating)):
        return float(value) if np.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def make_planner(method, settings, sigma_multiple, passes=1, time_limit_s=120.0):
    if method == "ours":
        return ChanceConstrainedMPC(settings)
    if method == "mixed_integer":
        return MixedIntegerPlanner(settings, time_limit_s=time_limit_s)
    if method == "linearised":
        return LinearisedPlanner(settings, passes=passes)
    if method == "robust_inflation":
        return RobustInflationPlanner(settings, sigma_multiple=sigma_multiple)
    raise ValueError(f"method={method!r} is not one of {METHODS}")


# --- suite (a): single obstacle, open loop ------------------------------------------------------

@dataclass
class Instance:
    x0: np.ndarray
    P0: np.ndarray
    goal: np.ndarray
    forecast: ObstacleForecast


def _random_spd(rng, sigma_low, sigma_high):
    """A 2×2 covariance with standard deviations in [low, high] along random principal axes."""
    sigmas = rng.uniform(sigma_low, sigma_high, 2)
    angle = rng.uniform(0.0, np.pi)
    R = np.array([[np.cos(angle), -np.sin(angle)], [np.sin(angle), np.cos(angle)]])
    return R @ np.diag(sigmas**2) @ R.T


def random_instance(rng, settings):
    """One single-obstacle instance; redrawn until the start lies clear of the obstacle's ellipse.

    Start at the origin, goal 3–6 m away in a random direction, start speed 0–0.8 m/s towards the
    goal. Obstacle: box half-extents 0.15–0.6 m × 0.15–0.4 m, centre 30–70 % along the way and up
    to ±1.2 m across it, velocity up to 0.5 m/s, position σ 0.03–0.2 m, velocity σ 0.03–0.25 m/s
    (covariance Σ₀ + t² Σ_v); robot position σ 0.01–0.05 m, velocity σ 0.01–0.05 m/s.
    """
    N, dt = settings.horizon_steps, settings.step_s
    times = dt * np.arange(1, N + 1)
    while True:
        direction = rng.uniform(-np.pi, np.pi)
        unit = np.array([np.cos(direction), np.sin(direction)])
        normal = np.array([-unit[1], unit[0]])
        goal = rng.uniform(3.0, 6.0) * unit
        x0 = np.array([0.0, 0.0, *(rng.uniform(0.0, 0.8) * unit)])
        P0 = np.diag([*(rng.uniform(0.01, 0.05, 2) ** 2), *(rng.uniform(0.01, 0.05, 2) ** 2)])
        half = np.array([rng.uniform(0.15, 0.6), rng.uniform(0.15, 0.4)])
        centre = rng.uniform(0.3, 0.7) * goal + rng.uniform(-1.2, 1.2) * normal
        speed, course = rng.uniform(0.0, 0.5), rng.uniform(-np.pi, np.pi)
        velocity = speed * np.array([np.cos(course), np.sin(course)])
        heading = course if speed > 0.05 else rng.uniform(-np.pi, np.pi)
        sigma0, sigma_v = _random_spd(rng, 0.03, 0.2), _random_spd(rng, 0.03, 0.25)
        positions = centre[None] + times[:, None] * velocity[None]
        covariances = sigma0[None] + (times**2)[:, None, None] * sigma_v[None]
        forecast = ObstacleForecast([1], times, positions[None], np.full((1, N), heading),
                                    covariances[None], half[None])
        # The start must be clear of the largest ellipse any method draws (3σ robust inflation
        # with a margin), or some method is infeasible from the first step.
        reach = np.linalg.norm(positions, axis=-1) - np.sqrt(2.0) * (
            half.max() + settings.robot_radius_m + 3.5 * np.sqrt(np.linalg.eigvalsh(covariances).max(axis=-1)))
        if reach.min() > 0.3:
            return Instance(x0, P0, goal, forecast)


def run_suite(settings, instances, seed, sigma_multiple, passes, mc_samples, time_limit_s, log):
    rng = np.random.default_rng(seed)
    mc_rng = np.random.default_rng(seed + 1)
    suite_settings = settings.with_changes(max_obstacles=1)
    planners = {m: make_planner(m, suite_settings, sigma_multiple, passes, time_limit_s) for m in METHODS}
    cases = [random_instance(rng, suite_settings) for _ in range(instances + 1)]
    # The first instance warms up every solver (first calls pay one-off set-up) and is not scored.
    for method, planner in planners.items():
        planner.reset()
        planner.solve(cases[0].x0, cases[0].P0, cases[0].goal, cases[0].forecast)
    records = {m: [] for m in METHODS}
    for i, case in enumerate(cases[1:]):
        reference = goal_reference(suite_settings, case.x0[0:2], case.goal)
        line = [f"suite {i + 1}/{instances}"]
        for method, planner in planners.items():
            planner.reset()
            result = planner.solve(case.x0, case.P0, case.goal, case.forecast)
            record = {"solve_ms": result.solve_ms, "success": bool(result.success), "status": result.status,
                      "cost": float("nan"), "collision_probability": float("nan"), "progress": float("nan"),
                      "margin_m": result.min_margin_m}
            if result.success:
                record["cost"] = plan_cost(suite_settings, result.states, result.inputs, reference)
                record["collision_probability"] = plan_collision_probability(
                    result.states, result.inputs, case.P0, case.forecast, suite_settings, planner.model,
                    mc_rng, mc_samples)
                remaining = np.linalg.norm(case.goal - result.states[-1, 0:2])
                record["progress"] = float(np.linalg.norm(case.goal) - remaining)
            records[method].append(record)
            line.append(f"{method} {result.status} {result.solve_ms:.0f} ms")
        log(" | ".join(line))
    return summarise_suite(records, suite_settings)


def summarise_suite(records, settings):
    reference = records["mixed_integer"]
    ref_ms = np.median([r["solve_ms"] for r in reference])
    # Instances where the obstacle shapes the optimum: the mixed-integer plan touches its box.
    active = [ref["success"] and ref["margin_m"] < ACTIVE_MARGIN_M for ref in reference]
    methods, gaps = {}, {}
    for method, rows in records.items():
        solve_ms = [r["solve_ms"] for r in rows]
        both = [r["success"] and ref["success"] and ref["cost"] > 0.0 for r, ref in zip(rows, reference)]
        gap = [r["cost"] / ref["cost"] - 1.0 for r, ref, ok in zip(rows, reference, both) if ok]
        gap_active = [r["cost"] / ref["cost"] - 1.0 for r, ref, ok, a in zip(rows, reference, both, active)
                      if ok and a]
        stuck = sum(1 for r, ref in zip(rows, reference)
                    if not r["success"] or (ref["success"] and ref["progress"] > 0.0
                                            and r["progress"] < STUCK_PROGRESS_SHARE * ref["progress"]))
        probability = [r["collision_probability"] for r in rows if r["success"]]
        gaps[method] = gap
        methods[method] = {
            "solve_ms_median": float(np.median(solve_ms)), "solve_ms_p90": _percentile(solve_ms, 90),
            "speedup_vs_mixed_integer": float(ref_ms / np.median(solve_ms)),
            "cost_gap_mean": float(np.mean(gap)) if gap else float("nan"),
            "cost_gap_median": _percentile(gap, 50), "cost_gap_p90": _percentile(gap, 90),
            "cost_gap_mean_where_obstacle_active": float(np.mean(gap_active)) if gap_active else float("nan"),
            "success_rate": float(np.mean([r["success"] for r in rows])),
            "collision_probability_mean": float(np.mean(probability)) if probability else float("nan"),
            "collision_probability_max": float(np.max(probability)) if probability else float("nan"),
            "stuck": int(stuck),
        }
    return {"instances": len(reference), "obstacle_active_instances": int(sum(active)), "methods": methods,
            "cost_gaps": gaps}


# --- suite (b): exhibition hall, closed loop -----------------------------------------------------

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


def summarise_crowds(results, alpha):
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
                "solve_ms_median": float(np.median(solve_ms)), "solve_ms_p90": _percentile(solve_ms, 90),
                "failed_solve_fraction": float(sum(sum(e["failures"].values()) for e in episodes)
                                               / max(len(solve_ms), 1)),
                "failed_solves_by_status": {status: sum(e["failures"].get(status, 0) for e in episodes)
                                            for status in sorted({s for e in episodes for s in e["failures"]})},
                "collision_probability_mean": float(np.mean(probability)) if len(probability) else 0.0,
                "collision_probability_max": float(np.max(probability)) if len(probability) else 0.0,
                "collision_probability_max_considered": float(np.max(considered)) if len(considered) else 0.0,
                "plans_above_alpha": int(np.sum(probability > alpha)),
            }
    return summary


def _first_tracks(forecast, count):
    return ObstacleForecast(forecast.track_ids[:count], forecast.times, forecast.positions[:count],
                            forecast.headings[:count], forecast.covariances[:count], forecast.half_extents[:count])


def run_pruning(settings, low, high, seeds, scene_options, log):
    """Our median solve ms with `high` against `low` walkers, two ways.

    Same hall: closed loops with `high` and with `low` walkers in the exhibition hall (at 200 vs 40 the
    local density is five times higher, so more walkers are in reach, not only more to prune).
    Far walkers: the closed loop with `low` walkers is recorded, its forecasts carrying also
    `high − low` walkers in a far hall; every cycle is then re-solved twice, interleaved so both
    see the same machine load, by two planners warm-started alike: with all walkers and with the
    `low` in the hall only. The problems are identical after pruning, so the ratio is its cost.
    """
    planner = make_planner("ours", settings, 3.0)

    def closed_loop_ms(walkers):
        solve_ms = []
        for seed in range(seeds):
            solve_ms.extend(run_episode(planner, settings, Concourse(walkers, seed, **scene_options), 0)["solve_ms"])
        log(f"pruning: {walkers} walkers in the hall, closed loop, median solve {np.median(solve_ms):.1f} ms "
            f"over {len(solve_ms)} cycles")
        return float(np.median(solve_ms))

    at_low, same_hall = closed_loop_ms(low), closed_loop_ms(high)
    with_far, without_far = [], []
    replay_all, replay_hall = make_planner("ours", settings, 3.0), make_planner("ours", settings, 3.0)
    for seed in range(seeds):
        scene = Concourse(low, seed, far_walkers=high - low, **scene_options)
        episode = run_episode(planner, settings, scene, 0, record=True)
        replay_all.reset()
        replay_hall.reset()
        for x, forecast in episode["recorded"]:
            with_far.append(replay_all.solve(x, episode["P0"], episode["goal"], forecast).solve_ms)
            without_far.append(replay_hall.solve(x, episode["P0"], episode["goal"],
                                                 _first_tracks(forecast, low)).solve_ms)
    far, hall = float(np.median(with_far)), float(np.median(without_far))
    log(f"pruning: replay of {len(with_far)} cycles, {low} walkers + {high - low} far away {far:.1f} ms, "
        f"{low} only {hall:.1f} ms")
    return {"walkers_low": low, "walkers_high": high, "solve_ms_median_low": at_low,
            "solve_ms_median_high": same_hall, "ratio": same_hall / at_low,
            "solve_ms_median_replay_low": hall, "solve_ms_median_replay_high_far": far, "ratio_far": far / hall}


# --- report --------------------------------------------------------------------------------------

def evaluate_targets(suite, crowd, pruning, alpha):
    ours = suite["methods"]["ours"]
    crowd_ours = [crowd["ours"][size]["success_rate"] for size in crowd["ours"]]
    crowd_lin = [crowd["linearised"][size]["success_rate"] for size in crowd["linearised"]]
    probability_max = max([ours["collision_probability_max"]]
                          + [crowd["ours"][size]["collision_probability_max"] for size in crowd["ours"]])
    probability_considered = max([ours["collision_probability_max"]]
                                 + [crowd["ours"][size]["collision_probability_max_considered"]
                                    for size in crowd["ours"]])
    return {
        "speedup_vs_mixed_integer": {"target": TARGET_SPEEDUP, "measured": ours["speedup_vs_mixed_integer"],
                                     "met": bool(ours["speedup_vs_mixed_integer"] >= TARGET_SPEEDUP)},
        "cost_gap_mean": {"target": TARGET_COST_GAP, "measured": ours["cost_gap_mean"],
                          "met": bool(ours["cost_gap_mean"] <= TARGET_COST_GAP)},
        "collision_probability_max": {"target": alpha, "measured": probability_max,
                                      "met": bool(probability_max <= alpha)},
        "collision_probability_max_considered": {"target": alpha, "measured": probability_considered,
                                                 "met": bool(probability_considered <= alpha)},
        "crowd_success_vs_linearised": {"target": float(np.mean(crowd_lin)), "measured": float(np.mean(crowd_ours)),
                                        "met": bool(all(o >= li for o, li in zip(crowd_ours, crowd_lin)))},
        "pruning_ratio": {"target": TARGET_PRUNING_RATIO, "measured": pruning["ratio"],
                          "met": bool(pruning["ratio"] <= TARGET_PRUNING_RATIO)},
        "pruning_ratio_far_walkers": {"target": TARGET_PRUNING_RATIO, "measured": pruning["ratio_far"],
                                      "met": bool(pruning["ratio_far"] <= TARGET_PRUNING_RATIO)},
    }


def markdown(report):
    suite, crowd, pruning, alpha = report["suite"], report["crowd"], report["pruning"], report["alpha"]
    lines = [f"# Side-by-side comparison (α = {alpha:g}, joint over horizon and obstacles)", "",
             f"Machine: {report['machine']['cpus']} CPUs, load average {report['machine']['load_average']}; "
             f"wall time {report['wall_time_s']:.0f} s.", "",
             f"## (a) Single obstacle, open loop: {suite['instances']} random instances", "",
             f"Cost gap = cost / mixed-integer cost − 1; \"active\": the {suite['obstacle_active_instances']} "
             "instances where the mixed-integer plan touches its box. P(coll.): Monte Carlo per plan.", "",
             "| method | median ms | p90 ms | speed-up vs MI | mean cost gap | median gap | p90 gap "
             "| mean gap, active | success | P(coll.) mean | P(coll.) max | stuck |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for method, m in suite["methods"].items():
        lines.append(f"| {LABELS[method]} | {m['solve_ms_median']:.1f} | {m['solve_ms_p90']:.1f} | "
                     f"{m['speedup_vs_mixed_integer']:.1f}× | {100 * m['cost_gap_mean']:+.1f} % | "
                     f"{100 * m['cost_gap_median']:+.1f} % | {100 * m['cost_gap_p90']:+.1f} % | "
                     f"{100 * m['cost_gap_mean_where_obstacle_active']:+.1f} % | "
                     f"{100 * m['success_rate']:.0f} % | {m['collision_probability_mean']:.4f} | "
                     f"{m['collision_probability_max']:.4f} | {m['stuck']} |")
    lines += ["", f"## (b) Exhibition hall, closed loop: {crowd['seeds']} seeds per size", "",
              "P(coll.) over all walkers; \"considered\": over the walkers the planner constrained that "
              "cycle (they differ when the slot cap drops reachable walkers).", "",
              "| method | walkers | success | collisions (robot stopped) | stuck | median ms | p90 ms "
              "| failed solves | P(coll.) mean | P(coll.) max | max, considered | plans > α |",
              "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for method, by_size in crowd["methods"].items():
        for size, m in by_size.items():
            lines.append(f"| {LABELS[method]} | {size} | {100 * m['success_rate']:.0f} % | "
                         f"{100 * m['collision_rate']:.0f} % ({m['collisions_while_stopped']}) | {m['stuck']} | "
                         f"{m['solve_ms_median']:.1f} | "
                         f"{m['solve_ms_p90']:.1f} | {100 * m['failed_solve_fraction']:.1f} % | "
                         f"{m['collision_probability_mean']:.4f} | {m['collision_probability_max']:.4f} | "
                         f"{m['collision_probability_max_considered']:.4f} | {m['plans_above_alpha']} |")
    lines += ["", "Failed solves (the robot brakes on each) by status: " + "; ".join(
        f"{LABELS[method]} {size}: " + (", ".join(f"{s} {n}" for s, n in m["failed_solves_by_status"].items())
                                        or "none")
        for method, by_size in crowd["methods"].items() for size, m in by_size.items())]
    lines += ["", "Mixed-integer: not run in closed loop (one cycle takes seconds, see (a)).", "",
              f"## Pruning: our median solve ms at {pruning['walkers_high']} vs {pruning['walkers_low']} walkers",
              "", f"- same hall (local density ×{pruning['walkers_high'] / pruning['walkers_low']:g}): "
              f"{pruning['solve_ms_median_high']:.1f} ms vs {pruning['solve_ms_median_low']:.1f} ms, "
              f"ratio {pruning['ratio']:.2f}",
              f"- the same cycles re-solved with {pruning['walkers_low']} walkers in the hall + "
              f"{pruning['walkers_high'] - pruning['walkers_low']} out of reach (pruning work only): "
              f"{pruning['solve_ms_median_replay_high_far']:.1f} ms vs {pruning['solve_ms_median_replay_low']:.1f} ms, "
              f"ratio {pruning['ratio_far']:.2f}", "", "## Targets", "",
              "| target | wanted | measured | met |", "|---|---|---|---|"]
    wanted = {"speedup_vs_mixed_integer": "≥ {:.0f}×", "cost_gap_mean": "≤ {:.0%}",
              "collision_probability_max": "≤ {:g}", "collision_probability_max_considered": "≤ {:g}",
              "crowd_success_vs_linearised": "≥ linearised, every size ({:.0%} mean)",
              "pruning_ratio": "≤ {:.1f}", "pruning_ratio_far_walkers": "≤ {:.1f}"}
    for name, t in report["targets"].items():
        lines.append(f"| {name} | {wanted[name].format(t['target'])} | {t['measured']:.4g} | "
                     f"{'yes' if t['met'] else 'NO'} |")
    return "\n".join(lines) + "\n"


def plots(report, crowd_results, out):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6, 4))
    for method in CROWD_METHODS:
        sizes = sorted(crowd_results[method])
        median = [np.median(np.concatenate([e["solve_ms"] for e in crowd_results[method][s]])) for s in sizes]
        p90 = [np.percentile(np.concatenate([e["solve_ms"] for e in crowd_results[method][s]]), 90) for s in sizes]
        ax.errorbar(sizes, median, yerr=[np.zeros(len(sizes)), np.subtract(p90, median)], marker="o",
                    capsize=3, label=LABELS[method])
    pruning = report["pruning"]
    ax.plot([pruning["walkers_high"]], [pruning["solve_ms_median_high"]], "k*", markersize=10,
            label=f"ours, {pruning['walkers_high']} walkers")
    ax.set_xlabel("walkers in the exhibition hall")
    ax.set_ylabel("solve time [ms] (median, bar to p90)")
    ax.set_yscale("log")
    ax.legend()
    ax.grid(True, alpha=0.3)
    fig.tight_layout()
    fig.savefig(os.path.join(out, "solve_ms_vs_walkers.png"), dpi=120)
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(6, 4))
    for method in ("ours", "linearised", "robust_inflation"):
        gaps = 100 * np.asarray(report["suite"]["cost_gaps"][method])
        if len(gaps):
            ax.hist(gaps, bins=20, alpha=0.5, label=LABELS[method])
    ax.axvline(100 * TARGET_COST_GAP, color="k", linestyle="--", label="4 % target (mean)")
    ax.set_xlabel("cost above the mixed-integer optimum [%]")
    ax.set_ylabel("instances")
    ax.legend()
    fig.tight_layout()
    fig.savefig(os.path.join(out, "cost_gap_hist.png"), dpi=120)
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(6, 4))
    crowd = report["crowd"]["methods"]
    sizes = list(next(iter(crowd.values())).keys())
    width = 0.8 / len(crowd)
    for i, (method, by_size) in enumerate(crowd.items()):
        ax.bar(np.arange(len(sizes)) + i * width, [100 * by_size[s]["success_rate"] for s in sizes], width,
               label=LABELS[method])
    ax.set_xticks(np.arange(len(sizes)) + 0.4 - width / 2)
    ax.set_xticklabels([f"{s} walkers" for s in sizes])
    ax.set_ylabel("episodes reaching the goal without collision [%]")
    ax.set_ylim(0, 105)
    ax.legend()
    fig.tight_layout()
    fig.savefig(os.path.join(out, "success_rates.png"), dpi=120)
    plt.close(fig)


# --- command -------------------------------------------------------------------------------------

def add_arguments(parser):
    parser.add_argument("--out", default="out/bench_compare", help="output directory (default %(default)s)")
    parser.add_argument("--quick", action="store_true",
                        help="smoke size: 2 instances with a 12-step horizon in suite (a), crowds of 10 and 40 "
                             "walkers on a 6 m route with 1 seed, fewer Monte Carlo samples")
    parser.add_argument("--instances", type=int, default=None, help="suite (a) instances (default 50, quick 2)")
    parser.add_argument("--seeds", type=int, default=None, help="crowd seeds per size (default 8, quick 1)")
    parser.add_argument("--sizes", type=int, nargs="+", default=None,
                        help="crowd sizes in walkers (default 10 40 100, quick 10 40)")
    parser.add_argument("--pruning-walkers", type=int, nargs=2, default=[40, 200], metavar=("LOW", "HIGH"),
                        help="walker counts of the pruning check (default 40 200)")
    parser.add_argument("--sigma-multiple", type=float, default=3.0,
                        help="robust inflation: standard deviations added to each face (default 3)")
    parser.add_argument("--passes", type=int, default=10,
                        help="suite (a): most linearisation passes of the linearised formulation (default 10)")
    parser.add_argument("--mi-time-limit-s", type=float, default=120.0,
                        help="time cap of one mixed-integer solve [s] (default 120)")
    parser.add_argument("--seed", type=int, default=7, help="random seed of suite (a)")


def _check(args):
    for name in ("instances", "seeds"):
        value = getattr(args, name)
        if value is not None and value < 1:
            raise ValueError(f"--{name}={value} is out of range: must be at least 1")
    if any(size < 1 for size in args.sizes or []) or min(args.pruning_walkers) < 1:
        raise ValueError("--sizes and --pruning-walkers must be at least 1 walker")


def run(args):
    try:
        _check(args)
    except ValueError as error:
        print(f"riskbound bench compare: {error}")
        return 2
    started = time.perf_counter()
    quick = args.quick
    instances = args.instances or (2 if quick else 50)
    seeds = args.seeds or (1 if quick else 8)
    sizes = args.sizes or ([10, 40] if quick else [10, 40, 100])
    mc_samples_suite, mc_samples_crowd = (2000, 300) if quick else (20000, 2000)
    scene_options = {"start": (-3.0, 0.0), "goal": (3.0, 0.0), "time_limit_s": 10.0} if quick else {}
    pruning_options = dict(scene_options, time_limit_s=3.0) if quick else scene_options
    pruning_seeds = 1 if quick else 2
    settings = PlannerSettings()
    # A shorter horizon keeps the mixed-integer solves of the smoke run to a second or two.
    suite_settings = settings.with_changes(horizon_steps=12) if quick else settings
    os.makedirs(args.out, exist_ok=True)

    def log(text):
        print(f"[{time.perf_counter() - started:7.1f} s] {text}", flush=True)

    log(f"suite (a): {instances} single-obstacle instances, methods {', '.join(METHODS)}")
    suite = run_suite(suite_settings, instances, args.seed, args.sigma_multiple, args.passes, mc_samples_suite,
                      args.mi_time_limit_s, log)
    log(f"suite (b): exhibition hall with {sizes} walkers, {seeds} seeds, methods {', '.join(CROWD_METHODS)}")
    crowd_results = run_crowds(settings, sizes, seeds, args.sigma_multiple, mc_samples_crowd,
                               scene_options, log)
    crowd = {"sizes": list(sizes), "seeds": seeds, "methods": summarise_crowds(crowd_results, settings.risk_level)}
    low, high = args.pruning_walkers
    pruning = run_pruning(settings, low, high, pruning_seeds, pruning_options, log)
    report = {
        "settings": {"planner": {k: getattr(settings, k) for k in settings.__dataclass_fields__},
                     "suite_horizon_steps": suite_settings.horizon_steps,
                     "sigma_multiple": args.sigma_multiple, "passes": args.passes, "quick": quick,
                     "mc_samples_suite": mc_samples_suite, "mc_samples_crowd": mc_samples_crowd},
        "machine": {"cpus": os.cpu_count(), "load_average": [round(v, 2) for v in os.getloadavg()]},
        "alpha": settings.risk_level, "suite": suite, "crowd": crowd, "pruning": pruning,
    }
    report["targets"] = evaluate_targets(suite, crowd["methods"], pruning, settings.risk_level)
    report["wall_time_s"] = time.perf_counter() - started
    with open(os.path.join(args.out, "compare.json"), "w") as stream:
        json.dump(_finite_or_null(report), stream, indent=1, allow_nan=False)
    table = markdown(report)
    with open(os.path.join(args.out, "compare.md"), "w") as stream:
        stream.write(table)
    plots(report, crowd_results, args.out)
    print(table)
    log(f"wrote {args.out}/compare.md, compare.json and 3 PNGs")
    return 0
