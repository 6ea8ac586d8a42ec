"""`riskbound bench faults`: fault-to-stop latency of the watchdog on a live localhost graph.

Starts the simulated robot, the planner and the watchdog as separate processes (see
riskbound.ros.fault_injection), then injects each fault `--trials` times: planner killed, planner
hung, solver failure (an obstacle on the robot), NaN command, odometry stopped. For each fault it
prints the latency distribution (median, max) from injection to the first stop on cmd_vel, the
share of trials within the bound (the fault's staleness limit plus one control period; target
100 %), and the time until normal commands resumed after the fault was cleared. Writes faults.json
(every trial) and faults_latency.png.

The processes keep DDS discovery on this machine (ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST) and use
ROS_DOMAIN_ID from the environment, or a random one.
"""

import json
import os
import platform
import sys
import time

import numpy as np

FAULT_NAMES = ("nan_command", "solver_failure", "odom_stopped", "planner_hung", "planner_killed")


def add_arguments(parser):
    parser.add_argument("--trials", type=int, default=20, help="repetitions of each fault (at least 1)")
    parser.add_argument("--faults", nargs="+", default=list(FAULT_NAMES), choices=FAULT_NAMES,
                        help="faults to inject, in this order")
    parser.add_argument("--model", default="double_integrator", choices=["double_integrator", "unicycle"],
                        help="robot model of the planner and the simulated robot")
    parser.add_argument("--out", default="out/bench", help="directory for faults.json, faults_latency.png and logs")


def summarise(results, bound_s):
    latency = np.array([r.latency_s for r in results], dtype=float)
    recovery = np.array([r.recovery_s for r in results], dtype=float)
    stopped = latency[np.isfinite(latency)]
    resumed = recovery[np.isfinite(recovery)]
    return {
        "trials": len(results), "bound_ms": 1e3 * bound_s,
        "stopped": int(stopped.size),
        "latency_median_ms": float(1e3 * np.median(stopped)) if stopped.size else None,
        "latency_max_ms": float(1e3 * stopped.max()) if stopped.size else None,
        "within_bound_percent": 100.0 * sum(r.within_bound for r in results) / len(results),
        "expected_cause_percent": 100.0 * sum(r.cause_expected for r in results) / len(results),
        "resumed": int(resumed.size),
        "recovery_median_s": float(np.median(resumed)) if resumed.size else None,
        "recovery_max_s": float(resumed.max()) if resumed.size else None,
    }


def run(args):
    if args.trials < 1:
        print(f"--trials={args.trials} must be at least 1", file=sys.stderr)
        return 2
    from riskbound.ros.fault_injection import FaultGraph

    os.makedirs(args.out, exist_ok=True)
    log_dir = os.path.join(args.out, "faults_logs")
    print(f"ROS_DOMAIN_ID={os.environ.get('ROS_DOMAIN_ID')} "
          f"ROS_AUTOMATIC_DISCOVERY_RANGE={os.environ.get('ROS_AUTOMATIC_DISCOVERY_RANGE')}; node logs in {log_dir}")
    results = {name: [] for name in args.faults}
    started = time.monotonic()
    with FaultGraph(log_dir, robot_model=args.model) as graph:
        settings = graph.settings
        bounds = {name: graph.bound_s(name) for name in args.faults}
        total = len(args.faults) * args.trials
        for i, name in enumerate(args.faults):
            for k in range(args.trials):
                results[name].append(graph.trial(name))
                latency = results[name][-1].latency_s
                sys.stderr.write(f"\r[{i * args.trials + k + 1}/{total}] {name}: {1e3 * latency:.0f} ms      ")
                sys.stderr.flush()
    sys.stderr.write("\n")
    summary = {name: summarise(results[name], bounds[name]) for name in args.faults}

    print(f"\nfault-to-stop latency, {args.trials} trials per fault, {args.model}, watchdog at "
          f"{settings.control_rate_hz:g} Hz (checks at {settings.check_rate_hz:g} Hz)")
    print(f"{'fault':<16}{'bound ms':>9}{'median ms':>11}{'max ms':>9}{'within':>9}{'cause ok':>10}"
          f"{'resume median s':>17}{'resume max s':>14}")
    for name, row in summary.items():
        def ms(value):
            return "-" if value is None else f"{value:.0f}"

        def s(value):
            return "-" if value is None else f"{value:.2f}"
        print(f"{name:<16}{row['bound_ms']:>9.0f}{ms(row['latency_median_ms']):>11}{ms(row['latency_max_ms']):>9}"
              f"{row['within_bound_percent']:>8.0f}%{row['expected_cause_percent']:>9.0f}%"
              f"{s(row['recovery_median_s']):>17}{s(row['recovery_max_s']):>14}")
    all_within = all(row["within_bound_percent"] == 100.0 for row in summary.values())
    print(f"target: 100 % of trials stop within the bound — {'met' if all_within else 'NOT met'}; "
          f"{time.monotonic() - started:.0f} s in all")

    report = {
        "benchmark": "faults", "model": args.model, "trials_per_fault": args.trials,
        "watchdog": {"control_rate_hz": settings.control_rate_hz, "check_rate_hz": settings.check_rate_hz,
                     "status_timeout_s": settings.status_timeout_s, "command_timeout_s": settings.command_timeout_s,
                     "odom_timeout_s": settings.odom_timeout_s, "recovery_cycles": settings.recovery_cycles},
        "machine": {"python": platform.python_version(), "platform": platform.platform(),
                    "cpus": os.cpu_count()},
        "summary": summary,
        "trials": {name: [r.as_dict() for r in rows] for name, rows in results.items()},
    }
    json_path = os.path.join(args.out, "faults.json")
    with open(json_path, "w") as handle:
        json.dump(report, handle, indent=2)
    png_path = os.path.join(args.out, "faults_latency.png")
    _plot(results, bounds, png_path)
    print(f"wrote {json_path} and {png_path}")
    return 0 if all_within else 1


def _plot(results, bounds, path):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = list(results)
    fig, ax = plt.subplots(figsize=(8, 4.5))
    rng = np.random.default_rng(0)
    for i, name in enumerate(names):
        latency_ms = 1e3 * np.array([r.latency_s for r in results[name]], dtype=float)
        latency_ms = latency_ms[np.isfinite(latency_ms)]
        ax.scatter(i + rng.uniform(-0.15, 0.15, latency_ms.size), latency_ms, s=14, alpha=0.7)
        if latency_ms.size:
            ax.plot([i - 0.3, i + 0.3], [np.median(latency_ms)] * 2, color="black", lw=1.5)
        ax.plot([i - 0.4, i + 0.4], [1e3 * bounds[name]] * 2, color="red", ls="--", lw=1.2)
    ax.set_xticks(range(len(names)), names, rotation=15)
    ax.set_ylabel("injection → first stop on cmd_vel [ms]")
    ax.set_ylim(bottom=0.0)
    ax.set_title("Watchdog fault-to-stop latency (black: median, red dashed: bound)")
    ax.grid(axis="y", alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
