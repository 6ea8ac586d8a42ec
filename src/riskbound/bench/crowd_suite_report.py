"""The crowd suite's table, criteria, Markdown and figure (riskbound.bench.crowd_suite runs it)."""

import numpy as np

from riskbound.logs.contact_geometry import ROBOT_INTO_WALKER_MPS, STANDING_SPEED_MPS
from riskbound.logs.run_summary import ROBOTS_WALKERS_MAY_CATCH

# The acceptance (issue 12, "A crowd suite, run in CI"): our own targets, no source.
MIN_GOAL_SHARE = 0.95
MAX_STOP_S = 3.0


def suite_table(rows, solve_ms):
    """{"by_robot": {robot: figures over its runs}}; solve_ms: {robot: every attempted solve [ms]}."""
    by_robot = {}
    for robot in dict.fromkeys(row["robot"] for row in rows):
        mine = [row for row in rows if row["robot"] == robot]
        times = np.asarray(solve_ms.get(robot, []), dtype=float)
        by_robot[robot] = {
            "robot_model": mine[0]["robot_model"],
            "runs": len(mine),
            "goal_reached": sum(row["goal_reached"] for row in mine),
            "goal_reached_share": sum(row["goal_reached"] for row in mine) / len(mine),
            "passed": sum(row["passed"] for row in mine),
            "robot_into_walker": sum(row["robot_into_walker"] for row in mine),
            "walker_into_robot": sum(row["walker_into_robot"] for row in mine),
            "runs_with_walker_contact": sum(bool(row["walker_contacts"]) for row in mine),
            "min_clearance_m": float(np.nanmin([row["min_clearance_m"] for row in mine] + [np.inf])),
            "static_contacts": sum(row["static_contacts"] for row in mine),
            "static_checked_runs": sum(row["static_map_checked"] for row in mine),
            "time_outside_bounds_s": float(sum(row["time_outside_bounds_s"] for row in mine)),
            "longest_stop_s": max(row["longest_stop_s"] for row in mine),
            "runs_stopped_over_limit": sum(row["longest_stop_s"] > MAX_STOP_S for row in mine),
            "solves": int(len(times)),
            "solve_ms_median": float(np.median(times)) if len(times) else float("nan"),
            "solve_ms_p99": float(np.percentile(times, 99)) if len(times) else float("nan"),
        }
    return {"by_robot": by_robot}


def suite_criteria(table):
    """The issue's criteria per robot type: [{robot, criterion, value, met}]. Walker contacts follow
    the closed-loop verdict (riskbound.logs.run_summary): none at all for a multirotor, none with
    the robot moving into the walker for a ground robot (unicycle)."""
    found = []
    for robot, line in table["by_robot"].items():
        ground = line["robot_model"] in ROBOTS_WALKERS_MAY_CATCH
        checks = [
            (f"goal reached in ≥ {100 * MIN_GOAL_SHARE:g} % of runs", line["goal_reached_share"],
             line["goal_reached_share"] >= MIN_GOAL_SHARE),
            ("zero static contacts", line["static_contacts"], line["static_contacts"] == 0
             and line["static_checked_runs"] == line["runs"]),
            ("no time outside the bounds", line["time_outside_bounds_s"], line["time_outside_bounds_s"] == 0.0),
            (f"no stop longer than {MAX_STOP_S:g} s while the goal is open", line["longest_stop_s"],
             line["longest_stop_s"] <= MAX_STOP_S),
            ("no contact with the robot moving into the walker", line["robot_into_walker"],
             line["robot_into_walker"] == 0) if ground else
            ("no walker contact", line["robot_into_walker"] + line["walker_into_robot"],
             line["robot_into_walker"] + line["walker_into_robot"] == 0),
        ]
        found += [{"robot": robot, "criterion": name, "value": value, "met": bool(met)} for name, value, met in checks]
    return found


def _f(value, digits=1):
    return "—" if value is None or not np.isfinite(value) else f"{value:.{digits}f}"


def suite_markdown(suite):
    """The suite as Markdown: machine, summary table, criteria, per-run rows, every walker contact."""
    machine, settings, table = suite["machine"], suite["settings"], suite["table"]["by_robot"]
    lines = [
        f"# Crowd suite: {len(suite['crowds'])} crowds × {len(settings['robots'])} robot types, replay speed "
        f"{settings['speed']:g}",
        "",
        f"Machine: {machine['cores']} cores, " + ("one core kept busy by a spinning process"
                                                if machine["busy_core"] else "no extra load started by the suite")
        + f"; 1-minute load average {_f(machine['load_1min_mean'], 2)} and CPU busy "
        f"{_f(100 * machine['cpu_busy_share_mean'] if machine['cpu_busy_share_mean'] is not None else None, 0)} % "
        f"of all cores on average over the runs (the suite's own nodes included); {machine['wall_s'] / 60:.1f} min.",
        f"Parameter files: {', '.join(f'{r} {p}' for r, p in settings['parameter_files'].items())}. "
        f"A contact is the robot moving into the walker when it closes in faster than {ROBOT_INTO_WALKER_MPS:g} m/s "
        f"at onset; a stop is speed below {STANDING_SPEED_MPS:g} m/s while the goal is open.",
        "",
        "| robot | runs | goal reached | walker contacts: robot into walker | walker into robot | static contacts "
        "| time outside bounds [s] | longest stop [s] | solve ms median | solve ms p99 | min clearance [m] |",
        "|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for robot, t in table.items():
        lines.append(f"| {robot} ({t['robot_model']}) | {t['runs']} | {t['goal_reached']} "
                     f"({100 * t['goal_reached_share']:.0f} %) | {t['robot_into_walker']} | {t['walker_into_robot']} | "
                     f"{t['static_contacts']} | {t['time_outside_bounds_s']:.2f} | {t['longest_stop_s']:.1f} | "
                     f"{_f(t['solve_ms_median'])} | {_f(t['solve_ms_p99'])} | {_f(t['min_clearance_m'], 3)} |")
    lines += ["", "Criteria (issue 12):", ""]
    for c in suite["criteria"]:
        lines.append(f"- {c['robot']}: {c['criterion']}: {'met' if c['met'] else 'NOT met'} ({c['value']:g})"
                     if isinstance(c["value"], (int, float)) else f"- {c['robot']}: {c['criterion']}: {c['met']}")
    lines += ["", "| robot | crowd | walkers (min/mean) | goal | contacts robot→walker / walker→robot | min clearance [m] "
              "| static contacts | outside [s] | longest stop [s] | solve ms median / p99 | load 1 min | CPU busy |",
              "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in suite["runs"]:
        goal = f"{r['time_to_goal_s']:.1f} s" if r["goal_reached"] else f"not reached ({r['min_distance_to_goal_m']:.1f} m)"
        lines.append(f"| {r['robot']} | {r['crowd']} | {r['walkers_min']}/{r['walkers_mean']:.0f} | {goal} | "
                     f"{r['robot_into_walker']} / {r['walker_into_robot']} | {_f(r['min_clearance_m'], 3)} | "
                     f"{r['static_contacts']} | {r['time_outside_bounds_s']:.2f} | {r['longest_stop_s']:.1f} | "
                     f"{_f(r['solve_ms_median'])} / {_f(r['solve_ms_p99'])} | {r['load_1min_end']:.2f} | "
                     f"{_f(100 * r['cpu_busy_share'], 0)} % |")
    contacts = [(r, c) for r in suite["runs"] for c in r["walker_contacts"]]
    lines += ["", f"Walker contacts ({len(contacts)}):" if contacts else "Walker contacts: none."]
    if contacts:
        lines += ["", "| robot | crowd | walker | onset [s] | frames | min clearance [m] | who moved | robot speed "
                      "(toward) [m/s] | walker speed (toward) [m/s] |", "|---|---|---|---|---|---|---|---|---|"]
        for r, c in contacts:
            lines.append(f"| {r['robot']} | {r['crowd']} | {c['walker_id']} | {c['onset_s']:.1f} | {c['frames']} | "
                         f"{c['min_clearance_m']:.3f} | {c['who'].replace('_', ' ')} | {c['robot_speed_mps']:.2f} "
                         f"({c['robot_toward_walker_mps']:+.2f}) | {_f(c['walker_speed_mps'], 2)} "
                         f"({_f(c['walker_toward_robot_mps'], 2)}) |")
    return "\n".join(lines)


def plot_suite(rows, path):
    """Minimum clearance to walkers and to the static world, and the longest stop, per run."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    crowds = list(dict.fromkeys(row["crowd"] for row in rows))
    robots = list(dict.fromkeys(row["robot"] for row in rows))
    figure, axes = plt.subplots(3, 1, figsize=(max(8.0, 0.7 * len(crowds) + 3.0), 9.5), sharex=True)
    width = 0.8 / max(len(robots), 1)
    for i, robot in enumerate(robots):
        mine = {row["crowd"]: row for row in rows if row["robot"] == robot}
        x = np.array([k for k, crowd in enumerate(crowds) if crowd in mine]) + (i - (len(robots) - 1) / 2) * width
        chosen = [mine[crowd] for crowd in crowds if crowd in mine]
        for axis, key in zip(axes, ("min_clearance_m", "min_static_clearance_m", "longest_stop_s")):
            values = [row[key] if np.isfinite(row[key]) else np.nan for row in chosen]
            axis.bar(x, values, width, label=robot)
    axes[0].axhline(0.0, color="tab:red", linewidth=1.0)
    axes[0].set_ylabel("min clearance to walkers [m]")
    axes[1].axhline(0.0, color="tab:red", linewidth=1.0)
    axes[1].set_ylabel("min clearance to walls [m]")
    axes[2].axhline(MAX_STOP_S, color="tab:red", linewidth=1.0, label=f"{MAX_STOP_S:g} s")
    axes[2].set_ylabel("longest stop [s]")
    axes[2].set_xticks(range(len(crowds)))
    axes[2].set_xticklabels(crowds, rotation=30, ha="right", fontsize=8)
    axes[0].legend(fontsize=8)
    axes[0].set_title("crowd suite: per run (below the red line at 0: contact)")
    figure.savefig(path, dpi=110, bbox_inches="tight")
    plt.close(figure)
    return path
