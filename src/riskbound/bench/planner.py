"""`riskbound bench planner`: solve-time distribution of the planner core in closed loop.

For each crowd size, several seeded crossings of the scripted plaza; every cycle's solve time
(everything the planner does per cycle: covariance propagation, pruning, inflation, IPOPT) is
collected. Prints median / p90 / p99 / max per crowd size and the ratio to the 10-walker median,
writes JSON and a histogram PNG.
"""

import json
import os
import platform
import sys
import time

import numpy as np

from riskbound.bench.time_histogram import write_time_histogram
from riskbound.planning.settings import INFEASIBLE_RESPONSES

TARGET_MEDIAN_MS = 5.0
TARGET_P99_MS = 20.0


def add_arguments(parser):
    parser.add_argument("--walkers", type=int, nargs="+", default=[10, 40, 100], help="crowd sizes")
    parser.add_argument("--seeds", type=int, default=3, help="crossings per crowd size")
    parser.add_argument("--model", default="double_integrator", choices=["double_integrator", "unicycle"])
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

    settings = PlannerSettings(robot_model=args.model, horizon_steps=args.horizon_steps,
                               infeasible_response=args.infeasible_response)
    mpc = ChanceConstrainedMPC(settings)
    os.makedirs(args.out, exist_ok=True)
    rows, samples = {}, {}
    total = len(args.walkers) * args.seeds
    done = 0
    started = time.perf_counter()
    for walkers in args.walkers:
        solve_ms, outcomes = [], []
        for seed in range(args.seeds):
            def progress(k, walkers=walkers, seed=seed):
                if k % 20 == 0:
                    sys.stderr.write(f"\r[{done + 1}/{total}] {walkers} walkers, seed {seed}, cycle {k}   ")
                    sys.stderr.flush()
            log = run_episode(settings, PlazaScenario(walkers=walkers, seed=seed), max_cycles=args.max_cycles,
                              mpc=mpc, on_cycle=progress)
            done += 1
            solve_ms.extend(log.solve_ms.tolist())
            outcomes.append({"seed": seed, "reached_goal": log.reached_goal, "cycles": log.cycles,
                             "failures": log.failures, "min_clearance_m": log.min_clearance_m,
                             "least_violation_cycles": sum(r.status == "least_violation" for r in log.results),
                             "collision_cycles": log.collisions})
        rows[walkers] = dict(summarise(solve_ms), crossings=outcomes)
        samples[walkers] = solve_ms
    sys.stderr.write(f"\rdone in {time.perf_counter() - started:.0f} s{' ' * 40}\n")

    base = rows[args.walkers[0]]["median_ms"]
    print(f"planner solve time, {args.model}, {args.horizon_steps} steps, max_obstacles={settings.max_obstacles}, "
          f"infeasible_response={settings.infeasible_response}, {args.seeds} crossings per size "
          f"({platform.processor() or platform.machine()}, {os.cpu_count()} cores)")
    print(f"{'walkers':>8} {'cycles':>7} {'median':>8} {'p90':>8} {'p99':>8} {'max':>8} {'median ratio':>13} "
          f"{'failed':>7} {'least viol.':>12} {'contact':>8} {'reached':>8}")
    for walkers, row in rows.items():
        failed = sum(c["failures"] for c in row["crossings"])
        violating = sum(c["least_violation_cycles"] for c in row["crossings"])
        contact = sum(c["collision_cycles"] for c in row["crossings"])
        reached = sum(c["reached_goal"] for c in row["crossings"])
        print(f"{walkers:>8} {row['cycles']:>7} {row['median_ms']:>8.2f} {row['p90_ms']:>8.2f} {row['p99_ms']:>8.2f} "
              f"{row['max_ms']:>8.2f} {row['median_ms'] / base:>13.2f} {failed:>7} {violating:>12} {contact:>8} "
              f"{reached:>5}/{args.seeds}")
    if 40 in rows:
        ok = rows[40]["median_ms"] <= TARGET_MEDIAN_MS and rows[40]["p99_ms"] <= TARGET_P99_MS
        print(f"target at 40 walkers: median ≤ {TARGET_MEDIAN_MS} ms and p99 ≤ {TARGET_P99_MS} ms: "
              f"{'met' if ok else 'MISSED'}")

    report = {"model": args.model, "horizon_steps": args.horizon_steps, "max_obstacles": settings.max_obstacles,
              "infeasible_response": settings.infeasible_response,
              "seeds": args.seeds, "machine": {"cores": os.cpu_count(), "processor": platform.processor()},
              "results": {str(k): v for k, v in rows.items()}}
    json_path = os.path.join(args.out, "planner.json")
    with open(json_path, "w") as handle:
        json.dump(report, handle, indent=2)
    png_path = os.path.join(args.out, "planner_solve_ms.png")
    write_time_histogram({f"{walkers} walkers": values for walkers, values in samples.items()}, png_path,
                         TARGET_MEDIAN_MS, f"{TARGET_MEDIAN_MS} ms", "solve time per cycle [ms]", "cycles",
                         "planner solve time in closed loop")
    print(f"wrote {json_path} and {png_path}")
    return 0

