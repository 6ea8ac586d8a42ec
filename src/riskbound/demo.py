"""`riskbound demo`: the planner core crossing a plaza among a dozen walkers (no ROS graph needed).

Writes `plaza_crossing.png` (walker tracks, the robot's path, plans and forecast ellipses at a
few moments) and `clearance.png` (clearance and solve time over time) into --out and prints a
summary: solve ms, smallest clearance to any walker footprint, whether the goal was reached.
"""

import json
import os
import sys

import numpy as np


def add_arguments(parser):
    parser.add_argument("--out", default="out/demo", help="output directory")
    parser.add_argument("--walkers", type=int, default=12)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--model", default="double_integrator", choices=["double_integrator", "unicycle"])
    parser.add_argument("--risk-level", type=float, default=0.05, help="total collision bound α")


def run(args):
    from riskbound.bench.episode import run_episode
    from riskbound.bench.scripted_crowd import PlazaScenario
    from riskbound.planning.settings import PlannerSettings

    try:
        settings = PlannerSettings(robot_model=args.model, risk_level=args.risk_level)
    except ValueError as error:
        print(f"riskbound demo: {error}", file=sys.stderr)
        return 2
    scenario = PlazaScenario(walkers=args.walkers, seed=args.seed)
    os.makedirs(args.out, exist_ok=True)
    print(f"plaza crossing: {args.walkers} walkers, {args.model}, α = {settings.risk_level} "
          f"({settings.risk_allocation} allocation), horizon {settings.horizon_steps} × {settings.step_s} s")

    def progress(k):
        if k % 10 == 0:
            sys.stderr.write(f"\rcycle {k}")
            sys.stderr.flush()

    log = run_episode(settings, scenario, max_cycles=400, on_cycle=progress)
    sys.stderr.write("\r")
    ms = log.solve_ms
    summary = {
        "reached_goal": log.reached_goal, "cycles": log.cycles, "time_s": log.cycles / settings.control_rate_hz,
        "solve_ms_median": float(np.median(ms)), "solve_ms_p99": float(np.percentile(ms, 99)),
        "solve_ms_max": float(ms.max()), "failed_cycles": log.failures,
        "min_clearance_m": log.min_clearance_m, "collision_cycles": log.collisions,
    }
    print(f"reached goal: {'yes' if log.reached_goal else 'no'} after {summary['time_s']:.1f} s ({log.cycles} cycles)")
    print(f"solve time: median {summary['solve_ms_median']:.2f} ms, p99 {summary['solve_ms_p99']:.2f} ms, "
          f"max {summary['solve_ms_max']:.2f} ms; failed cycles: {log.failures}")
    print(f"smallest clearance to a walker footprint: {summary['min_clearance_m']:.2f} m; "
          f"collision cycles: {log.collisions}")
    with open(os.path.join(args.out, "summary.json"), "w") as handle:
        json.dump(summary, handle, indent=2)
    _plot_crossing(log, scenario, settings, os.path.join(args.out, "plaza_crossing.png"))
    _plot_timeline(log, settings, os.path.join(args.out, "clearance.png"))
    print(f"wrote {args.out}/plaza_crossing.png, clearance.png, summary.json")
    return 0 if log.reached_goal and log.collisions == 0 else 1


def _ellipse_points(centre, semi_axes, heading, count=48):
    angle = np.linspace(0.0, 2.0 * np.pi, count)
    local = np.stack([semi_axes[0] * np.cos(angle), semi_axes[1] * np.sin(angle)], axis=-1)
    c, s = np.cos(heading), np.sin(heading)
    return centre + local @ np.array([[c, s], [-s, c]])


def _plot_crossing(log, scenario, settings, path):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    robot = np.array(log.robot_states)
    walkers = np.array(log.walker_positions)
    fig, ax = plt.subplots(figsize=(8, 8))
    for j in range(walkers.shape[1]):
        track = walkers[:, j]
        jumps = np.flatnonzero(np.linalg.norm(np.diff(track, axis=0), axis=1) > 1.0) + 1
        for segment in np.split(track, jumps):
            ax.plot(segment[:, 0], segment[:, 1], color="0.75", linewidth=0.8)
    ax.plot(robot[:, 0], robot[:, 1], color="tab:blue", linewidth=2.0, label="robot path")
    snapshots = np.linspace(0, len(log.results) - 1, 5).astype(int)
    colours = plt.cm.viridis(np.linspace(0.0, 0.9, len(snapshots)))
    for colour, k in zip(colours, snapshots):
        result = log.results[k]
        ax.scatter(*robot[k, :2], color=colour, zorder=5, s=30)
        ax.scatter(walkers[k, :, 0], walkers[k, :, 1], color=colour, marker="s", s=12, zorder=4)
        if not result.success:
            continue
        ax.plot(result.states[:, 0], result.states[:, 1], color=colour, linewidth=1.2, linestyle="--")
        constraints = result.constraints
        for j in range(constraints.considered):
            for step in (0, settings.horizon_steps - 1):
                outline = _ellipse_points(constraints.centres[j, step], constraints.semi_axes[j, step],
                                          constraints.headings[j, step])
                ax.plot(outline[:, 0], outline[:, 1], color=colour, linewidth=0.7,
                        alpha=1.0 if step == 0 else 0.4)
    ax.scatter(*scenario.start, marker="o", color="black", s=60, label="start")
    ax.scatter(*scenario.goal, marker="*", color="black", s=120, label="goal")
    edge = scenario.half_size_m
    ax.set_xlim(-edge, edge)
    ax.set_ylim(-edge, edge)
    ax.set_aspect("equal")
    ax.set_xlabel("x [m]")
    ax.set_ylabel("y [m]")
    ax.set_title(f"plaza crossing, α = {settings.risk_level}: plans (dashed) and risk ellipses "
                 f"(first and last step) at 5 moments")
    ax.legend(loc="upper right")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _plot_timeline(log, settings, path):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    t = np.arange(log.cycles) / settings.control_rate_hz
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(8, 5), sharex=True)
    top.plot(t, log.clearances, color="tab:blue")
    top.axhline(0.0, color="tab:red", linewidth=1)
    top.set_ylabel("clearance [m]")
    top.set_title("smallest clearance between robot disc and walker footprints")
    bottom.plot(t, log.solve_ms, color="tab:green", linewidth=0.8)
    bottom.set_ylabel("solve [ms]")
    bottom.set_xlabel("time [s]")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
