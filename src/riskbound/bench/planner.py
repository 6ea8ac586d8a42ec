"""`riskbound bench planner`: solve-time distribution of the planner core in closed loop.

For each robot model, solve path and crowd size, several seeded crossings of the scripted plaza;
every cycle's solve time (everything the planner does per cycle: covariance propagation, pruning,
inflation, the solver, the risk charge) is collected. Prints median / p90 / p99 / max, failed
cycles (and how many of them were shown infeasible), and the ratios the targets are stated in:
the reference solver's times over the default path's, and the largest crowd's median over the
40-walker median. Writes JSON and a histogram PNG.
"""

import json
import os
import platform
import sys
import time

import numpy as np

from riskbound.bench.time_histogram import write_time_histogram
from riskbound.planning.settings import INFEASIBLE_RESPONSES, PLANNER_SOLVERS

TARGET_MEDIAN_MS = 3.0
TARGET_P99_MS = 10.0
TARGET_FAILED_FRACTION = 0.01
TARGET_SPEEDUP = 3.0
TARGET_CROWD_RATIO = 2.0
TARGET_WALKERS = 40


def add_arguments(parser):
    parser.add_argument("--walkers", type=int, nargs="+", default=[40, 200], help="crowd sizes (same plaza)")
    parser.add_argument("--seeds", type=int, default=3, help="crossings per crowd size")
    parser.add_argument("--models", nargs="+", default=["double_integrator", "unicycle"],
                        choices=["double_integrator", "unicycle"])
    parser.add_argument("--solvers", nargs="+", default=list(PLANNER_SOLVERS), choices=PLANNER_SOLVERS,
                        help="solve paths, run side by side (the first is the one the targets are for)")
    parser.add_argument("--horizon-steps", type=int, default=20)
    parser.add_argument("--max-cycles", type=int, default=300, help="cycles per crossing at most")
    parser.add_argument("--infeasible-response", default="stop", choices=INFEASIBLE_RESPONSES,
                        help="the planner's infeasible_response (default stop)")
    parser.add_argument("--out", default="out/bench", help="directory for planner.json and planner_solve_ms.png")


def summarise(solve_ms):
    ms = np.asarray(solve_ms, dtype=float)
    return {"cycles": int(ms.size), "median_ms": float(np.median(ms)), "p90_ms": float(np.percentile(ms, 90)),
            "p99_ms": float(np.percentile(ms, 99)), "max_ms": float(ms.max())}


def run(args):
    from riskbound.bench.episode import run_episode
    from riskbound.bench.scripted_crowd import PlazaScenario
    from riskbound.planning.mpc import ChanceConstrainedMPC
    from riskbound.planning.settings import PlannerSettings

    os.makedirs(args.out, exist_ok=True)
    rows, samples = {}, {}
    total = len(args.models) * len(args.solvers) * len(args.walkers) * args.seeds
    done = 0
    started = time.perf_counter()
    for model in args.models:
        for solver in args.solvers:
            settings = PlannerSettings(robot_model=model, horizon_steps=args.horizon_steps, solver=solver,
                                       infeasible_response=args.infeasible_response)
            mpc = ChanceConstrainedMPC(settings)
            for walkers in args.walkers:
                solve_ms, crossings, statuses = [], [], {}
                for seed in range(args.seeds):
                    def progress(k, label=f"{model} {solver} {walkers} walkers, seed {seed}"):
                        if k % 20 == 0:
                            sys.stderr.write(f"\r[{done + 1}/{total}] {label}, cycle {k}   ")
                            sys.stderr.flush()
                    log = run_episode(settings, PlazaScenario(walkers=walkers, seed=seed),
                                      max_cycles=args.max_cycles, mpc=mpc, on_cycle=progress)
                    done += 1
                    solve_ms.extend(log.solve_ms.tolist())
                    for result in log.results:
                        statuses[result.status] = statuses.get(result.status, 0) + 1
                    crossings.append({"seed": seed, "reached_goal": log.reached_goal, "cycles": log.cycles,
                                      "failures": log.failures, "min_clearance_m": log.min_clearance_m,
                                      "collision_cycles": log.collisions})
                key = (model, solver, walkers)
                rows[key] = dict(summarise(solve_ms), crossings=crossings, statuses=statuses)
                samples[key] = solve_ms
    sys.stderr.write(f"\rdone in {time.perf_counter() - started:.0f} s{' ' * 60}\n")

    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"planner solve time, {args.horizon_steps} steps, infeasible_response={args.infeasible_response}, "
          f"{args.seeds} crossings per size ({platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"load average {load:.2f} at the end)")
    print(f"{'model':<18} {'solver':<14} {'walkers':>7} {'cycles':>6} {'median':>7} {'p90':>7} {'p99':>7} {'max':>7} "
          f"{'failed':>7} {'shown inf.':>10} {'contact':>7} {'reached':>7}")
    for (model, solver, walkers), row in rows.items():
        failed = sum(c["failures"] for c in row["crossings"])
        contact = sum(c["collision_cycles"] for c in row["crossings"])
        reached = sum(c["reached_goal"] for c in row["crossings"])
        print(f"{model:<18} {solver:<14} {walkers:>7} {row['cycles']:>6} {row['median_ms']:>7.2f} {row['p90_ms']:>7.2f} "
              f"{row['p99_ms']:>7.2f} {row['max_ms']:>7.2f} {100.0 * failed / row['cycles']:>6.1f}% "
              f"{row['statuses'].get('infeasible', 0):>10} {contact:>7} {reached:>4}/{args.seeds}")
    print()
    main = args.solvers[0]
    for model in args.models:
        head = rows.get((model, main, TARGET_WALKERS))
        if head is None:
            continue
        failed = sum(c["failures"] for c in head["crossings"]) / head["cycles"]
        verdict = [f"median {head['median_ms']:.2f} ≤ {TARGET_MEDIAN_MS}: {_met(head['median_ms'] <= TARGET_MEDIAN_MS)}",
                   f"p99 {head['p99_ms']:.2f} ≤ {TARGET_P99_MS}: {_met(head['p99_ms'] <= TARGET_P99_MS)}",
                   f"failed {100 * failed:.1f}% ≤ {100 * TARGET_FAILED_FRACTION:.0f}%: "
                   f"{_met(failed <= TARGET_FAILED_FRACTION)}"]
        for other in args.solvers[1:]:
            reference = rows.get((model, other, TARGET_WALKERS))
            if reference:
                median_ratio = reference["median_ms"] / head["median_ms"]
                p99_ratio = reference["p99_ms"] / head["p99_ms"]
                ok = min(median_ratio, p99_ratio) >= TARGET_SPEEDUP
                verdict.append(f"{other} / {main}: median {median_ratio:.1f}×, p99 {p99_ratio:.1f}× "
                               f"(≥ {TARGET_SPEEDUP}×: {_met(ok)})")
        for walkers in args.walkers:
            if walkers > TARGET_WALKERS and (model, main, walkers) in rows:
                ratio = rows[(model, main, walkers)]["median_ms"] / head["median_ms"]
                verdict.append(f"{walkers}/{TARGET_WALKERS} walkers median {ratio:.2f}× "
                               f"(≤ {TARGET_CROWD_RATIO}×: {_met(ratio <= TARGET_CROWD_RATIO)})")
        print(f"targets, {model}, {main}, {TARGET_WALKERS} walkers: " + "; ".join(verdict))

    report = {"horizon_steps": args.horizon_steps, "infeasible_response": args.infeasible_response,
              "seeds": args.seeds, "load_average": load,
              "machine": {"cores": os.cpu_count(), "processor": platform.processor()},
              "results": {"/".join(map(str, key)): value for key, value in rows.items()}}
    json_path = os.path.join(args.out, "planner.json")
    with open(json_path, "w") as handle:
        json.dump(report, handle, indent=2)
    png_path = os.path.join(args.out, "planner_solve_ms.png")
    write_time_histogram({f"{model[:7]} {solver} {walkers}": values
                          for (model, solver, walkers), values in samples.items()}, png_path,
                         TARGET_MEDIAN_MS, f"{TARGET_MEDIAN_MS} ms", "solve time per cycle [ms]", "cycles",
                         "planner solve time in closed loop")
    print(f"wrote {json_path} and {png_path}")
    return 0


def _met(ok):
    return "met" if ok else "MISSED"
