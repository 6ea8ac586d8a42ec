"""`riskbound bench compare`: our planner against the three baselines, side by side in one process.

The command: its options, the run and the files it writes. The parts live beside it:
``compare_methods`` the four methods and how each is built; ``compare_single_obstacle`` suite (a),
open loop on random single-obstacle instances against the mixed-integer optimum; ``compare_hall``
suite (b), closed loop in an invented exhibition hall; ``compare_pruning`` our solve time with many
walkers against few; ``compare_collision`` the empirical collision probability of a plan (Monte
Carlo); ``compare_report`` the targets, the tables and the plots.

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

import numpy as np

from riskbound.bench.compare_hall import run_crowds, summarise_crowds
from riskbound.bench.compare_methods import CROWD_METHODS, METHODS
from riskbound.bench.compare_pruning import run_pruning
from riskbound.bench.compare_report import evaluate_targets, markdown, plots
from riskbound.bench.compare_single_obstacle import run_suite
from riskbound.planning.settings import PlannerSettings


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
    crowd = {"sizes": list(sizes), "seeds": seeds,
             "methods": summarise_crowds(crowd_results, settings.risk_level, mc_samples_crowd)}
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

