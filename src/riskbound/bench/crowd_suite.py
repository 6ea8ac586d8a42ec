"""`riskbound bench crowdsuite`: both shipped robot types across the committed bag and seeded crowds.

    riskbound bench crowdsuite [--crowds 10] [--first-seed 101] [--robots drone ground_robot]
                               [--speed 1.0] [--duration-s 90] [--busy-core] [--out DIR]

The crowds: the committed test/data/crowd_courtyard_40 and `--crowds` bags generated as
`riskbound crowd SCENARIO --seed S --duration-s D` does (riskbound.crowd.record.generate_crowd_bag,
walls and obstacles on /map), crowd i from SCENARIOS[i mod 3] with seed first_seed + i. The
scenarios are those of ours with at least 40 walkers: the courtyard (40 walkers throughout), the
campus plaza and the station concourse (streams of arrivals, up to 120 and 160 present); the
walkers actually present are counted from each bag's ground truth and shown. Generated bags are
kept in DIR/crowds and reused by a later suite with the same seed and duration.

Every crowd is crossed by every robot type with its shipped parameter file (config/drone.yaml,
double integrator; config/ground_robot.yaml, unicycle) through `riskbound closedloop`
(riskbound.closed_loop.run_closed_loop: the real ROS graph, the bag replayed at `--speed`, 1.0 is
real time), one run after the other: the runs never overlap (these machines have 2 cores).
`--busy-core` keeps one core busy with a spinning process for the whole suite (its own process
group, pinned to the last core, stopped when the suite ends or fails). Each run's figures are its
closed-loop summary (riskbound.logs.run_summary): the walker contacts split by who moved into whom
(riskbound.logs.contact_geometry), static contacts, time outside the bounds and the longest stop
while the goal is open. The machine's load (1-minute load average and the busy share of all
cores, from /proc/stat, over each run) is recorded beside each run: quoted timings come from
whatever else the machine was doing.

The issue's criteria, per robot type (crowd_suite_report.suite_criteria): goal reached in ≥ 95 % of runs, no static
contact, no time outside the bounds, no stop longer than 3 s while the goal is open; no walker
contact at all for the multirotor, and none in which the robot moved into the walker for the
ground robot (every contact is listed with its geometry).

Progress on stderr; the table on stdout; DIR/suite.json, DIR/suite.md and DIR/suite.png (minimum
clearance to walkers and to the static world, and the longest stop, per run); each run's report in
DIR/runs/ROBOT_CROWD. Exit status 0 when every criterion holds, 1 when one does not, 2 for bad
options or unreadable bags.
"""

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from riskbound.bench.crowd_suite_report import plot_suite, suite_criteria, suite_markdown, suite_table
from riskbound.logs.bag_io import BagError, read_crowd_bag, read_custom_data

COMMITTED_BAG = "test/data/crowd_courtyard_40"
SCENARIOS = ("config/crowd_courtyard_40.yaml", "config/crowd_campus_plaza.yaml",
             "config/crowd_station_concourse.yaml")
ROBOTS = {"drone": "config/drone.yaml", "ground_robot": "config/ground_robot.yaml"}
DEFAULT_CROWDS = 10
# Seeds of the generated crowds start here: away from the committed bag's seed 7.
DEFAULT_FIRST_SEED = 101
# Long enough for the ground robot's longest crossing (44 m of concourse at 1 m/s, with detours).
DEFAULT_DURATION_S = 90.0
# A run may take the bag's length, the nodes' start-up and the runner's stop: the wall-time limit.
START_UP_MARGIN_S = 60.0
EXIT_FAILED, EXIT_USAGE = 1, 2


def add_arguments(parser):
    parser.epilog = "exit codes: 0 every criterion holds; 1 one does not; 2 bad options or unreadable bags"
    parser.add_argument("--crowds", type=int, default=DEFAULT_CROWDS,
                        help=f"seeded crowds besides the committed bag (default {DEFAULT_CROWDS})")
    parser.add_argument("--first-seed", type=int, default=DEFAULT_FIRST_SEED,
                        help=f"seed of the first generated crowd (default {DEFAULT_FIRST_SEED})")
    parser.add_argument("--robots", nargs="+", choices=sorted(ROBOTS), default=sorted(ROBOTS),
                        help="robot types, each with its shipped parameter file (default both)")
    parser.add_argument("--speed", type=float, default=1.0, help="replay speed factor (default 1.0: real time)")
    parser.add_argument("--duration-s", type=float, default=DEFAULT_DURATION_S,
                        help=f"recorded seconds of each generated crowd (default {DEFAULT_DURATION_S:g}; "
                             "the courtyard's scenario is shorter and keeps its own 60 s)")
    parser.add_argument("--no-committed", action="store_true", help="leave out the committed bag")
    parser.add_argument("--busy-core", action="store_true",
                        help="keep one core busy with a spinning process during the suite")
    parser.add_argument("--out", default="out/crowd_suite", help="output directory (default out/crowd_suite)")


def run(args):
    try:
        _check(args)
        suite = run_suite(Path(args.out), crowds=args.crowds, first_seed=args.first_seed, robots=args.robots,
                          speed=args.speed, duration_s=args.duration_s, committed=not args.no_committed,
                          busy_core=args.busy_core, log=_progress)
    except (ValueError, BagError, OSError) as error:
        print(f"riskbound bench crowdsuite: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    print(suite["markdown"])
    return 0 if all(c["met"] for c in suite["criteria"]) else EXIT_FAILED


def _check(args):
    if args.crowds < 0:
        raise ValueError(f"--crowds {args.crowds}: must be >= 0")
    if args.no_committed and args.crowds == 0:
        raise ValueError("--crowds 0 with --no-committed: no crowd to cross")
    if not args.speed > 0.0:
        raise ValueError(f"--speed {args.speed}: must be > 0")
    if not args.duration_s >= 20.0:
        raise ValueError(f"--duration-s {args.duration_s}: must be >= 20 s (a crossing takes that long)")


def _progress(text):
    sys.stderr.write(text + "\n")
    sys.stderr.flush()


def _root():
    from riskbound.launching.xml_description import package_share

    return package_share("riskbound")


def crowd_bags(out_dir, crowds, first_seed, duration_s, committed, log):
    """[(label, bag path)]: the committed bag and the seeded crowds, generated into out_dir/crowds
    unless a bag with the same scenario, seed and duration is already there."""
    from riskbound.crowd.record import generate_crowd_bag
    from riskbound.crowd.scenario import load_scenario

    root = _root()
    bags = [("courtyard_40-s7 (committed)", root / COMMITTED_BAG)] if committed else []
    for i in range(crowds):
        scenario_path = root / SCENARIOS[i % len(SCENARIOS)]
        scenario = load_scenario(scenario_path)
        seed = first_seed + i
        duration = min(duration_s, scenario.duration_s)
        path = Path(out_dir) / "crowds" / f"{scenario.name}-s{seed}"
        label = f"{scenario.name}-s{seed}"
        if _same_crowd(path, scenario.name, seed, duration):
            log(f"crowd {i + 1}/{crowds}: {label} (kept from an earlier suite)")
        else:
            if path.exists():
                _remove_bag(path)
            log(f"crowd {i + 1}/{crowds}: generating {label}, {duration:g} s ...")
            generate_crowd_bag(scenario_path, path, seed=seed, duration_s=duration)
        bags.append((label, path))
    return bags


def _same_crowd(path, name, seed, duration_s):
    if not (path / "metadata.yaml").is_file():
        return False
    try:
        data = read_custom_data(path)
        info = read_crowd_bag(path)
    except BagError:
        return False
    span_s = info.truth.stamps_s[-1] - info.truth.stamps_s[0] if len(info.truth) else 0.0
    return (data.get("scenario") == name and data.get("seed") == str(seed)
            and abs(span_s - duration_s) <= 0.2)


def _remove_bag(path):
    if not (path / "metadata.yaml").is_file():
        raise ValueError(f"{path} exists and is not a bag directory: not replacing it")
    shutil.rmtree(path)


def crowd_facts(bag):
    """{walkers_min, walkers_mean, span_s}: walkers in the bag's ground-truth frames, its length."""
    crowd = read_crowd_bag(bag)
    counts = np.array([len(ids) for ids in crowd.truth_ids])
    if not len(counts):
        raise BagError(f"{bag}: no ground-truth frames")
    return {"walkers_min": int(counts.min()), "walkers_mean": float(counts.mean()),
            "span_s": float(crowd.truth.stamps_s[-1] - crowd.truth.stamps_s[0])}


def cpu_times():
    """(busy, total) jiffies of all cores from /proc/stat; (nan, nan) where there is none."""
    try:
        values = [float(v) for v in Path("/proc/stat").read_text().splitlines()[0].split()[1:]]
    except (OSError, ValueError, IndexError):
        return float("nan"), float("nan")
    idle = values[3] + (values[4] if len(values) > 4 else 0.0)   # idle + iowait
    return sum(values) - idle, sum(values)


def busy_share(before, after):
    total = after[1] - before[1]
    return (after[0] - before[0]) / total if total > 0 else float("nan")


def start_spinner():
    """A process that keeps the last core busy, in its own process group."""
    core = (os.cpu_count() or 1) - 1
    code = f"import os\nos.sched_setaffinity(0, {{{core}}})\nwhile True:\n    pass\n"
    return subprocess.Popen([sys.executable, "-c", code], start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def stop_spinner(process):
    try:
        os.killpg(process.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    process.wait()


def run_suite(out_dir, crowds=DEFAULT_CROWDS, first_seed=DEFAULT_FIRST_SEED, robots=tuple(ROBOTS), speed=1.0,
              duration_s=DEFAULT_DURATION_S, committed=True, busy_core=False, log=_progress):
    """Run the suite (module docstring) and write its files; returns the suite as a dict."""
    from riskbound.closed_loop import run_closed_loop
    from riskbound.logs.run_summary import read_solve_ms

    out_dir = Path(out_dir).resolve()
    out_dir.mkdir(parents=True, exist_ok=True)
    unknown = [r for r in robots if r not in ROBOTS]
    if unknown:
        raise ValueError(f"robots={unknown}: allowed are {sorted(ROBOTS)}")
    started = time.monotonic()
    bags = crowd_bags(out_dir, crowds, first_seed, duration_s, committed, log)
    crowd_info = {label: crowd_facts(bag) for label, bag in bags}
    plan = [(robot, label, bag) for label, bag in bags for robot in robots]
    rows, solve_ms = [], {robot: [] for robot in robots}
    spinner = start_spinner() if busy_core else None
    try:
        if spinner is not None:
            log(f"one core kept busy by a spinning process (pid {spinner.pid})")
        for n, (robot, label, bag) in enumerate(plan, start=1):
            run_dir = out_dir / "runs" / f"{robot}_{label.split(' ')[0]}"
            facts = crowd_info[label]
            log(f"[{n}/{len(plan)}] {robot} across {label} ({facts['walkers_mean']:.0f} walkers on average) ...")
            load_before, cpu_before = os.getloadavg()[0], cpu_times()
            try:
                result = run_closed_loop(run_dir, bag=bag, params_file=_root() / ROBOTS[robot], speed=speed,
                                         time_limit_s=facts["span_s"] / speed + START_UP_MARGIN_S,
                                         log=lambda text: log(f"    {text}"))
                times = read_solve_ms(run_dir / "recorded")
            except BagError as error:   # the run left no usable recording: a failed run, the suite goes on
                log(f"    FAILED: {error}")
                rows.append(_failed_row(robot, label, facts, str(error), run_dir))
                continue
            cpu_share = busy_share(cpu_before, cpu_times())
            solve_ms[robot].extend(times.tolist())
            row = _row(robot, label, facts, result, times, load_before, os.getloadavg()[0], cpu_share)
            rows.append(row)
            log(f"    {'passed' if result.passed else 'FAILED'}: " + _row_line(row))
    finally:
        if spinner is not None:
            stop_spinner(spinner)
    table = suite_table(rows, solve_ms)
    machine = {"cores": os.cpu_count(), "busy_core": busy_core, "speed": speed,
               "load_1min_mean": float(np.mean([r["load_1min_end"] for r in rows])) if rows else None,
               "cpu_busy_share_mean": float(np.nanmean([r["cpu_busy_share"] for r in rows])) if rows else None,
               "wall_s": time.monotonic() - started}
    suite = {"settings": {"crowds": crowds, "first_seed": first_seed, "robots": list(robots), "speed": speed,
                          "duration_s": duration_s, "committed": committed, "busy_core": busy_core,
                          "parameter_files": {r: ROBOTS[r] for r in robots}, "scenarios": list(SCENARIOS)},
             "machine": machine, "crowds": {label: dict(crowd_info[label], bag=str(bag)) for label, bag in bags},
             "runs": rows, "table": table, "criteria": suite_criteria(table)}
    suite["markdown"] = suite_markdown(suite)
    (out_dir / "suite.json").write_text(json.dumps({k: v for k, v in suite.items() if k != "markdown"}, indent=2,
                                                   default=float) + "\n", encoding="utf-8")
    (out_dir / "suite.md").write_text(suite["markdown"] + "\n", encoding="utf-8")
    plot_suite(rows, out_dir / "suite.png")
    log(f"suite took {machine['wall_s'] / 60:.1f} min; wrote {out_dir / 'suite.md'}, suite.json, suite.png")
    return suite


def _row(robot, label, walkers, result, solve_times, load_before, load_after, cpu_share):
    s = result.summary
    return {
        "robot": robot, "robot_model": s.robot_model, "crowd": label, "walkers_min": walkers["walkers_min"],
        "walkers_mean": walkers["walkers_mean"],
        "passed": bool(result.passed), "failures": s.failures(), "launch_exit_code": result.launch_exit_code,
        "goal_reached": s.goal_reached, "time_to_goal_s": s.time_to_goal_s,
        "min_distance_to_goal_m": s.min_distance_to_goal_m,
        "walker_contacts": [dict(vars(c)) for c in s.walker_contacts],
        "robot_into_walker": s.robot_into_walker_contacts, "walker_into_robot": s.walker_into_robot_contacts,
        "contact_frames": s.collisions, "min_clearance_m": s.min_clearance_m,
        "static_map_checked": s.static_map_checked, "static_contacts": s.static_contacts,
        "min_static_clearance_m": s.min_static_clearance_m, "time_outside_bounds_s": s.time_outside_bounds_s,
        "longest_stop_s": s.longest_stop_s, "start_wait_s": s.start_wait_s,
        "solves": int(len(solve_times)),
        "solve_ms_median": float(np.median(solve_times)) if len(solve_times) else float("nan"),
        "solve_ms_p99": float(np.percentile(solve_times, 99)) if len(solve_times) else float("nan"),
        "planner_status_counts": s.planner_status_counts, "watchdog_stops": s.watchdog_stops_total,
        "load_1min_start": load_before, "load_1min_end": load_after, "cpu_busy_share": cpu_share,
        "wall_s": result.wall_s, "report": str(result.out_dir),
    }


def _failed_row(robot, label, walkers, error, run_dir):
    """A run without a usable recording: it fails every criterion it could not show it met."""
    from riskbound.closed_loop import read_parameter_file, robot_model_of

    nan = float("nan")
    return {
        "robot": robot, "robot_model": robot_model_of(read_parameter_file(_root() / ROBOTS[robot]).get("planner", {})),
        "crowd": label, "walkers_min": walkers["walkers_min"], "walkers_mean": walkers["walkers_mean"],
        "passed": False, "failures": [error], "launch_exit_code": None, "goal_reached": False, "time_to_goal_s": nan,
        "min_distance_to_goal_m": nan, "walker_contacts": [], "robot_into_walker": 0, "walker_into_robot": 0,
        "contact_frames": 0, "min_clearance_m": nan, "static_map_checked": False, "static_contacts": 0,
        "min_static_clearance_m": nan, "time_outside_bounds_s": 0.0, "longest_stop_s": 0.0, "start_wait_s": nan,
        "solves": 0, "solve_ms_median": nan, "solve_ms_p99": nan, "planner_status_counts": {}, "watchdog_stops": 0,
        "load_1min_start": nan, "load_1min_end": os.getloadavg()[0], "cpu_busy_share": nan, "wall_s": nan,
        "report": str(run_dir),
    }


def _row_line(row):
    return (f"goal {'reached' if row['goal_reached'] else 'NOT reached'}"
            + (f" in {row['time_to_goal_s']:.1f} s" if row["goal_reached"] else "")
            + f", contacts {row['robot_into_walker']} robot→walker / {row['walker_into_robot']} walker→robot, "
            f"min clearance {row['min_clearance_m']:.2f} m, static {row['static_contacts']}, outside "
            f"{row['time_outside_bounds_s']:.1f} s, longest stop {row['longest_stop_s']:.1f} s, solve ms median "
            f"{row['solve_ms_median']:.1f} p99 {row['solve_ms_p99']:.1f}; load {row['load_1min_end']:.2f}, CPU busy "
            f"{100 * row['cpu_busy_share']:.0f} %, {row['wall_s']:.0f} s")

