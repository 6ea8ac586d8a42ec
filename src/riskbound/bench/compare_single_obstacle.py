"""Suite (a) of `riskbound bench compare`: random single-obstacle instances, each method planning
once, open loop.

Suite (a), open loop: random single-obstacle instances (start speed, goal, obstacle box, heading,
velocity, initial and growth covariance of the obstacle, robot covariance). Every method plans once
from a cold start. The mixed-integer plan is the reference optimum of the disjunctive problem; the
cost gap of a method is cost / cost_mixed_integer − 1 on the instances both solved. A method is
"stuck" on an instance when it returns no usable plan, or a plan ending with less than half the
progress towards the goal that the mixed-integer plan makes (it stopped in front of the obstacle).
"""

from dataclasses import dataclass

import numpy as np

from riskbound.bench.compare_collision import plan_collision_probability, significantly_above
from riskbound.bench.compare_methods import METHODS, finite_percentile, make_planner
from riskbound.motion.forecast import ObstacleForecast
from riskbound.planning.baselines.common import goal_reference, plan_cost

# A plan that ends with less than this share of the mixed-integer plan's progress stopped short.
STUCK_PROGRESS_SHARE = 0.5
# The obstacle "shapes" an instance when the mixed-integer plan comes this close to its box [m].
ACTIVE_MARGIN_M = 0.01


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
    return summarise_suite(records, suite_settings, mc_samples)


def summarise_suite(records, settings, samples):
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
            "solve_ms_median": float(np.median(solve_ms)), "solve_ms_p90": finite_percentile(solve_ms, 90),
            "speedup_vs_mixed_integer": float(ref_ms / np.median(solve_ms)),
            "cost_gap_mean": float(np.mean(gap)) if gap else float("nan"),
            "cost_gap_median": finite_percentile(gap, 50), "cost_gap_p90": finite_percentile(gap, 90),
            "cost_gap_mean_where_obstacle_active": float(np.mean(gap_active)) if gap_active else float("nan"),
            "success_rate": float(np.mean([r["success"] for r in rows])),
            "collision_probability_mean": float(np.mean(probability)) if probability else float("nan"),
            "collision_probability_max": float(np.max(probability)) if probability else float("nan"),
            "plans_significantly_above_alpha": significantly_above(probability, samples, settings.risk_level),
            "stuck": int(stuck),
        }
    return {"instances": len(reference), "obstacle_active_instances": int(sum(active)), "methods": methods,
            "cost_gaps": gaps}

