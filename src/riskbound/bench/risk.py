"""`riskbound bench risk`: does the planner spend the risk it is given? Monte Carlo per plan.

Scenes of our own (`crossing_scene`): a robot heading for a goal 6 m away, one to five walkers
whose constant-velocity forecasts cross its straight path within the horizon (starting at least
1.5 m from the robot), covariances growing with time. For every scene, robot model and α, the planner plans from scratch (`cold`) and after
`--settle-cycles` further cycles on the same scene (`settled`: the risk split carried from cycle to
cycle as in closed loop). Each plan is then flown `--draws` times open loop: the start drawn from
its covariance, white input noise as the planner assumes it, the exact nonlinear model; each
walker at each step drawn from its forecast (the forecast carries marginals only, so steps are
drawn independently). A draw collides when the robot disc meets a walker's box at any step
(riskbound.clearance.disc_box_clearance).

Printed per model and α: from-scratch failures, plans significantly above α (the one-sided 95 %
Clopper–Pearson lower bound of the collision frequency above α; the interval inverts the binomial
distribution exactly, computed with scipy.stats.beta), and over plans with a binding walker
constraint the median α / P(collision). Where the conservatism goes, at the binding pairs of the
settled plans: the enclosing ellipse (the pair's allocated risk over its charge), the face bound
(the charge over the pair's own Monte Carlo frequency), Boole's inequality (the summed pair
frequencies over the joint one), and the uniform split (α / P for `joint_uniform` over `joint`).
Writes JSON and a PNG of α / P per plan.
"""

import json
import os
import sys
import time

import numpy as np
from scipy.stats import beta

from riskbound.clearance import disc_box_clearance
from riskbound.motion.forecast import ObstacleForecast

WALKER_HALF_EXTENTS_M = (0.25, 0.2)  # a walking adult's footprint, value from memory
TARGET_RATIO = 20.0
TARGET_FAILURES = {"double_integrator": 0.05, "unicycle": 0.10}
CONFIDENCE = 0.95
# Walkers start at least this far from the robot: a scene that begins in contact is not a planning
# problem (our choice; 1.5 m is a brisk walker's second plus the two footprints).
MIN_START_DISTANCE_M = 1.5


def add_arguments(parser):
    parser.add_argument("--scenes", type=int, default=40, help="scenes per robot model")
    parser.add_argument("--risks", type=float, nargs="+", default=[0.01, 0.05, 0.1])
    parser.add_argument("--models", nargs="+", default=["double_integrator", "unicycle"],
                        choices=["double_integrator", "unicycle"])
    parser.add_argument("--draws", type=int, default=20_000, help="Monte Carlo draws per plan")
    parser.add_argument("--settle-cycles", type=int, default=5, help="cycles on the same scene before the settled plan")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--out", default="out/bench", help="directory for risk.json and risk_ratio.png")


def crossing_scene(rng, model, settings):
    """(x0, P0, goal, forecast on the planner grid) of one random crossing scene."""
    N, dt = settings.horizon_steps, settings.step_s
    times = dt * np.arange(1, N + 1)
    speed = rng.uniform(0.0, 1.0)
    heading = rng.uniform(-np.pi, np.pi)
    direction = np.array([np.cos(heading), np.sin(heading)])
    start = rng.uniform(-2.0, 2.0, 2)
    goal = start + 6.0 * direction
    if model == "unicycle":
        x0 = np.array([*start, heading, speed])
        P0 = np.diag([0.03**2, 0.03**2, 0.05**2, 0.05**2])
    else:
        x0 = np.array([*start, *(speed * direction)])
        P0 = np.diag([0.03**2, 0.03**2, 0.05**2, 0.05**2])
    walkers = int(rng.integers(1, 6))
    positions, headings, covariances = [], [], []
    while len(positions) < walkers:
        crossing = start + rng.uniform(1.0, 4.0) * direction
        at = rng.uniform(0.5, 1.8)
        walk_heading = rng.uniform(-np.pi, np.pi)
        velocity = rng.uniform(0.5, 1.5) * np.array([np.cos(walk_heading), np.sin(walk_heading)])
        origin = crossing - velocity * at + rng.normal(scale=0.3, size=2)
        if np.linalg.norm(origin - start) < MIN_START_DISTANCE_M:
            continue
        positions.append(origin[None, :] + velocity[None, :] * times[:, None])
        headings.append(np.full(N, walk_heading))
        sigma_p, sigma_v = rng.uniform(0.05, 0.15), rng.uniform(0.05, 0.3)
        variance = sigma_p**2 + (sigma_v * times) ** 2
        covariances.append(variance[:, None, None] * np.eye(2)[None])
    forecast = ObstacleForecast(np.arange(walkers), times, np.array(positions), np.array(headings),
                                np.array(covariances), np.tile(WALKER_HALF_EXTENTS_M, (walkers, 1)))
    return x0, P0, goal, forecast


def fly(model, settings, x0, P0, inputs, forecast, draws, rng):
    """Monte Carlo: (joint collision frequency, per-walker-step frequencies (J, N))."""
    N, dt = settings.horizon_steps, settings.step_s
    states = rng.multivariate_normal(x0, P0, size=draws)  # (D, n)
    sigma = np.array([settings.robot_accel_noise,
                      settings.robot_turn_noise if model.name == "unicycle" else settings.robot_accel_noise])
    collided = np.zeros(draws, dtype=bool)
    pair = np.zeros((forecast.track_count, N))
    for k in range(N):
        u = inputs[k][None, :] + rng.normal(size=(draws, 2)) * sigma[None, :]
        states = _step(model, states, u, dt)
        for j in range(forecast.track_count):
            centre = rng.multivariate_normal(forecast.positions[j, k], forecast.covariances[j, k], size=draws)
            hit = disc_box_clearance(states[:, 0:2], settings.robot_radius_m, centre, forecast.headings[j, k],
                                     forecast.half_extents[j]) < 0.0
            pair[j, k] = hit.mean()
            collided |= hit
    return float(collided.mean()), pair


def _step(model, x, u, dt):
    """The robot model's discrete step, vectorised over draws (the same equations as robot_models)."""
    if model.name == "unicycle":
        theta_mid = x[:, 2] + 0.5 * u[:, 1] * dt
        v_mid = x[:, 3] + 0.5 * u[:, 0] * dt
        return np.stack([x[:, 0] + v_mid * dt * np.cos(theta_mid), x[:, 1] + v_mid * dt * np.sin(theta_mid),
                         x[:, 2] + u[:, 1] * dt, x[:, 3] + u[:, 0] * dt], axis=1)
    return np.concatenate([x[:, 0:2] + x[:, 2:4] * dt + 0.5 * u * dt**2, x[:, 2:4] + u * dt], axis=1)


def lower_confidence(hits, draws, confidence=CONFIDENCE):
    """One-sided lower Clopper–Pearson bound of a binomial proportion (0 when there are no hits)."""
    return 0.0 if hits == 0 else float(beta.ppf(1.0 - confidence, hits, draws - hits + 1))


def evaluate(settings, scenes, draws, settle_cycles, rng, progress=None):
    """Plan and fly every scene; returns one record per (scene, stage)."""
    from riskbound.planning.mpc import ChanceConstrainedMPC

    mpc = ChanceConstrainedMPC(settings)
    records = []
    for index, (x0, P0, goal, forecast) in enumerate(scenes):
        mpc.reset()
        result = mpc.solve(x0, P0, goal, forecast)
        stages = [("cold", result)]
        for _ in range(settle_cycles):
            result = mpc.solve(x0, P0, goal, forecast, elapsed_s=0.0)
        stages.append(("settled", result))
        for stage, plan in stages:
            record = {"scene": index, "stage": stage, "status": plan.status, "success": bool(plan.success),
                      "charged": float(plan.risk_charged), "risk": settings.risk_level}
            if plan.success:
                joint, pair = fly(mpc.model, settings, x0, P0, plan.inputs, forecast, draws, rng)
                hits = int(round(joint * draws))
                constraints = plan.constraints
                n = constraints.considered
                d = plan.states[None, 1:, 0:2] - constraints.centres[:n]
                q = np.einsum("jka,jkab,jkb->jk", d, constraints.shapes[:n], d)
                binding = q <= 1.1
                slot_pairs = pair[constraints.kept] if n else np.zeros((0, settings.horizon_steps))
                record.update({
                    "p_collision": joint, "hits": hits, "draws": draws,
                    "lower_95": lower_confidence(hits, draws),
                    "binding": bool(binding.any()),
                    "pair_sum": float(pair.sum()),
                    "binding_allocated": constraints.risks[:n][binding].tolist(),
                    "binding_pair_mc": slot_pairs[binding].tolist(),
                })
            records.append(record)
        if progress:
            progress(index)
    return records


def run(args):
    from riskbound.planning.settings import PlannerSettings

    os.makedirs(args.out, exist_ok=True)
    started = time.perf_counter()
    summary, ratios = {}, {}
    for model in args.models:
        base = PlannerSettings(robot_model=model)
        rng = np.random.default_rng(args.seed)
        scenes = [crossing_scene(rng, model, base) for _ in range(args.scenes)]
        for risk in args.risks:
            for mode in ("joint", "joint_uniform"):
                settings = base.with_changes(risk_level=risk, risk_allocation=mode)

                def progress(i, label=f"{model} α={risk} {mode}"):
                    sys.stderr.write(f"\r{label}: scene {i + 1}/{args.scenes}   ")
                    sys.stderr.flush()
                records = evaluate(settings, scenes, args.draws, args.settle_cycles,
                                   np.random.default_rng(args.seed + 1), progress)
                summary[f"{model}/{risk}/{mode}"] = records
    sys.stderr.write(f"\rdone in {time.perf_counter() - started:.0f} s{' ' * 40}\n")

    print(f"Monte Carlo per plan, {args.scenes} crossing scenes per model, {args.draws} draws per plan")
    print(f"{'model':<18} {'α':>5} {'stage':<8} {'failed':>7} {'above α':>8} {'worst P':>9} {'median α/P':>11} "
          f"{'uniform':>8}")
    conservatism = []
    for model in args.models:
        for risk in args.risks:
            for stage in ("cold", "settled"):
                rows = [r for r in summary[f"{model}/{risk}/joint"] if r["stage"] == stage]
                uniform = [r for r in summary[f"{model}/{risk}/joint_uniform"] if r["stage"] == stage]
                failed = sum(not r["success"] for r in rows) / len(rows)
                flown = [r for r in rows if r["success"]]
                above = sum(r["lower_95"] > risk for r in flown)
                worst = max((r["p_collision"] for r in flown), default=float("nan"))
                ratio = _median_ratio(flown, risk)
                ratio_uniform = _median_ratio([r for r in uniform if r["success"]], risk)
                ratios[f"{model} α={risk} {stage}"] = [risk / max(r["p_collision"], 0.5 / r["draws"])
                                                       for r in flown if r["binding"]]
                print(f"{model:<18} {risk:>5} {stage:<8} {100 * failed:>6.1f}% {above:>8} {worst:>9.2e} "
                      f"{ratio:>11.1f} {ratio_uniform:>8.1f}")
                if stage == "settled":
                    allocated = np.concatenate([r.get("binding_allocated", []) for r in flown]) if flown else []
                    pair_mc = np.concatenate([r.get("binding_pair_mc", []) for r in flown]) if flown else []
                    conservatism.append((model, risk, _conservatism(flown, allocated, pair_mc), ratio_uniform / ratio))
    print()
    print("where the conservatism goes (settled plans, medians over binding pairs / plans):")
    print(f"{'model':<18} {'α':>5} {'ellipse+faces: a/P_pair':>24} {'faces: charge/ΣP_pair':>22} {'Boole: ΣP_pair/P':>17} "
          f"{'uniform split':>14}")
    for model, risk, parts, split in conservatism:
        print(f"{model:<18} {risk:>5} {parts[0]:>24.2f} {parts[1]:>22.2f} {parts[2]:>17.2f} {split:>14.1f}")
    print()
    for model in args.models:
        cold = [r for risk in args.risks for r in summary[f"{model}/{risk}/joint"] if r["stage"] == "cold"]
        failed = sum(not r["success"] for r in cold) / len(cold)
        median = _median_ratio([r for risk in args.risks for r in summary[f"{model}/{risk}/joint"]
                                if r["stage"] == "settled" and r["success"]], None)
        above = sum(r.get("lower_95", 0.0) > risk for risk in args.risks
                    for r in summary[f"{model}/{risk}/joint"] + summary[f"{model}/{risk}/joint_uniform"])
        print(f"targets, {model}: from-scratch failures {100 * failed:.1f}% ≤ {100 * TARGET_FAILURES[model]:.0f}%: "
              f"{_met(failed <= TARGET_FAILURES[model])}; plans significantly above α: {above} "
              f"({_met(above == 0)}); median α/P over settled plans with a binding walker {median:.1f} "
              f"≤ {TARGET_RATIO}: {_met(median <= TARGET_RATIO)}")

    with open(os.path.join(args.out, "risk.json"), "w") as handle:
        json.dump({"scenes": args.scenes, "draws": args.draws, "results": summary}, handle, indent=1)
    _plot(ratios, os.path.join(args.out, "risk_ratio.png"))
    print(f"wrote {os.path.join(args.out, 'risk.json')} and {os.path.join(args.out, 'risk_ratio.png')}")
    return 0


def _median_ratio(records, risk):
    """Median α / P over plans with a binding walker (P floored at half a draw when no draw collided).

    risk None: each record's own α (records of several risk levels)."""
    values = [(risk if risk is not None else r["risk"]) / max(r["p_collision"], 0.5 / r["draws"])
              for r in records if r["binding"]]
    return float(np.median(values)) if values else float("nan")


def _met(ok):
    return "met" if ok else "MISSED"


def _conservatism(records, allocated, pair_mc):
    """(ellipse and faces: a / P_pair, faces: charge / ΣP_pair, Boole: ΣP_pair / P) medians."""
    allocated, pair_mc = np.asarray(allocated), np.asarray(pair_mc)
    seen = pair_mc > 0
    ellipse = float(np.median(allocated[seen] / pair_mc[seen])) if seen.any() else float("nan")
    boole = [r["pair_sum"] / r["p_collision"] for r in records if r.get("p_collision", 0) > 0]
    faces = [r["charged"] / r["pair_sum"] for r in records if r.get("pair_sum", 0) > 0]
    return ellipse, float(np.median(faces)) if faces else float("nan"), \
        float(np.median(boole)) if boole else float("nan")


def _plot(ratios, path):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figure, axis = plt.subplots(figsize=(9, 4.5))
    labels = [label for label, values in ratios.items() if values]
    axis.boxplot([ratios[label] for label in labels], vert=False)
    axis.set_yticks(range(1, len(labels) + 1), labels, fontsize=7)
    axis.set_xscale("log")
    axis.axvline(1.0, color="tab:red", linewidth=1)
    axis.axvline(TARGET_RATIO, color="tab:gray", linestyle="--", linewidth=1)
    axis.set_xlabel("α / P(collision) per plan with a binding walker (1: the bound spent exactly)")
    axis.set_title("risk spent by the planner, Monte Carlo per plan")
    figure.tight_layout()
    figure.savefig(path, dpi=110)
    plt.close(figure)
