"""`riskbound sweep`: closed loops over a grid on Dask distributed, results in SQLite, a report.

    riskbound sweep run --db FILE [--risk-levels A ...] [--allocations M ...] [--scenarios F ...]
                        [--seeds N ...] [--params-files F ...] [--robot-models M ...]
                        [--reaction-strengths S ...] [--start-s T] [--duration-s T] [--max-cycles N]
                        [--set NAME=VALUE ...] [--workers N | --scheduler ADDRESS | --serial]
    riskbound sweep report --db FILE [--out DIR]
    riskbound sweep export --db FILE --csv FILE
    riskbound sweep timing [--seeds N ...] [--risk-levels A ...] [--workers 1 2]

`run` runs every combination not yet in the database (one ROS-free closed loop each, the engine
of `riskbound bench crowdloop`) and writes a row per run as it finishes; run the same command again
after an interruption and only the missing cells run. A cell is known by its parameters and the
contents of its files, not by the code version (a column of its row): after changing the code,
start a new database. By default an embedded Dask cluster of
--workers processes on 127.0.0.1 does the work; --scheduler tcp://HOST:PORT sends it to an
existing cluster (its workers need this package and the same files at the same paths); --serial
runs here without Dask. A progress bar on stderr shows cells done, failed and remaining.
Reaction strength is how strongly walkers avoid the robot [m²/s²]: 0 replays walkers who ignore
it, 2.1 makes it as repulsive as a person (the social force model's V⁰).

`report` writes DIR/report.md and PNG figures (outcome rates, minimum clearance and time to goal
against α). `export` writes every run to a CSV file. `timing` runs the same cells on fresh
embedded clusters of 1 and 2 workers and prints throughput and scheduling overhead (nothing kept).

Exit status: 0 done (run: every cell has a row), 1 some cells failed, 2 bad options or files,
130 interrupted (the finished runs are kept).
"""

import logging
import sys
from pathlib import Path

EXIT_FAILED, EXIT_USAGE = 1, 2
DEFAULT_RISK_LEVELS = (0.01, 0.05, 0.1, 0.2)
DEFAULT_SCENARIO = "config/crowd_courtyard_40.yaml"
DEFAULT_PARAMS = "config/drone.yaml"
PERSON_REACTION_M2_S2 = 2.1  # the pedestrian V⁰ of riskbound.crowd.social_force


def add_arguments(parser):
    commands = parser.add_subparsers(dest="action", required=True, metavar="ACTION")
    run = commands.add_parser("run", help="run the grid's missing cells")
    run.add_argument("--db", required=True, help="SQLite results file (created when missing)")
    run.add_argument("--risk-levels", type=float, nargs="+", default=list(DEFAULT_RISK_LEVELS),
                     help=f"α values (default {' '.join(map(str, DEFAULT_RISK_LEVELS))})")
    run.add_argument("--allocations", nargs="+", default=["per_constraint"], help="risk allocation modes")
    run.add_argument("--scenarios", nargs="+", default=None, help=f"crowd scenarios (default {DEFAULT_SCENARIO})")
    run.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3, 4, 5], help="crowd seeds")
    run.add_argument("--params-files", nargs="+", default=None, help=f"ROS parameter files (default {DEFAULT_PARAMS})")
    run.add_argument("--robot-models", nargs="+", default=["from_file"],
                     help="double_integrator, unicycle or from_file (the parameter file's)")
    run.add_argument("--reaction-strengths", type=float, nargs="+", default=[0.0, PERSON_REACTION_M2_S2],
                     help="how strongly walkers react to the robot [m²/s²], 0 = not at all")
    run.add_argument("--start-s", type=float, default=2.0, help="robot leaves this long into the recording [s]")
    run.add_argument("--duration-s", type=float, default=30.0, help="crowd recording length [s]")
    run.add_argument("--max-cycles", type=int, default=0, help="planning cycles per crossing at most (0: no cap)")
    run.add_argument("--set", nargs="*", default=[], metavar="NAME=VALUE", help="planner settings for every cell")
    where = run.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=2, help="worker processes of the embedded cluster")
    where.add_argument("--scheduler", default=None, metavar="ADDRESS", help="existing Dask scheduler, tcp://HOST:PORT")
    where.add_argument("--serial", action="store_true", help="run here, one cell after another, without Dask")
    report = commands.add_parser("report", help="write the operator's report from a results file")
    report.add_argument("--db", required=True, help="SQLite results file")
    report.add_argument("--out", default="out/sweep", help="directory for report.md and the figures")
    timing = commands.add_parser("timing", help="throughput of 1 and 2 worker processes on the same cells")
    timing.add_argument("--seeds", type=int, nargs="+", default=list(range(1, 11)), help="crowd seeds")
    timing.add_argument("--risk-levels", type=float, nargs="+", default=[0.05, 0.2], help="α values")
    timing.add_argument("--duration-s", type=float, default=30.0, help="crowd recording length [s]")
    timing.add_argument("--max-cycles", type=int, default=0, help="planning cycles per crossing at most (0: no cap)")
    timing.add_argument("--workers", type=int, nargs="+", default=[1, 2], help="worker counts to compare")
    export = commands.add_parser("export", help="write every run to CSV")
    export.add_argument("--db", required=True, help="SQLite results file")
    export.add_argument("--csv", required=True, help="CSV file to write")


def _error(message):
    print(f"riskbound sweep: error: {message}", file=sys.stderr)
    return EXIT_USAGE


def _run(args):
    from riskbound.bench.crowd_loop import parse_name_values
    from riskbound.launching.xml_description import package_share
    from riskbound.sweep.grid import build_grid
    from riskbound.sweep.runner import run_sweep

    root = package_share("riskbound")
    # Absolute paths: the workers of a cluster need not share this shell's working directory.
    scenarios = [str(Path(p).resolve()) for p in args.scenarios or [root / DEFAULT_SCENARIO]]
    params_files = [str(Path(p).resolve()) for p in args.params_files or [root / DEFAULT_PARAMS]]
    try:
        overrides = parse_name_values(args.set, "--set")
        for name in ("risk_level", "risk_allocation", "robot_model"):
            if name in overrides:
                raise ValueError(f"--set {name}: is a grid dimension, use its own option")
        cells = build_grid(args.risk_levels, args.allocations, scenarios, args.seeds, params_files,
                           args.robot_models, args.reaction_strengths, args.start_s, args.duration_s,
                           args.max_cycles, overrides)
        _check_settings(cells)
        summary = run_sweep(cells, args.db, workers=args.workers, scheduler=args.scheduler, serial=args.serial)
    except ValueError as error:
        return _error(error)
    print(f"{summary.cells} cells: {summary.skipped} already in {args.db}, {summary.done} run now, "
          f"{summary.failed} failed ({summary.wall_s:.0f} s)")
    return EXIT_FAILED if summary.failed else 0


def _check_settings(cells):
    """Every distinct setting set loads (bad --set values are reported before any work starts)."""
    from riskbound.bench.crowd_loop import load_settings

    seen = set()
    for cell in cells:
        key = (cell.params_file, cell.overrides, cell.risk_level, cell.risk_allocation, cell.robot_model)
        if key not in seen:
            seen.add(key)
            load_settings(cell.params_file, cell.planner_overrides(), {})


def _timing(args):
    from riskbound.launching.xml_description import package_share
    from riskbound.sweep.grid import build_grid
    from riskbound.sweep.runner import time_cluster

    root = package_share("riskbound")
    try:
        cells = build_grid(args.risk_levels, ["per_constraint"], [str(root / DEFAULT_SCENARIO)], args.seeds,
                           [str(root / DEFAULT_PARAMS)], ["from_file"], [0.0], 2.0, args.duration_s, args.max_cycles)
        if any(w < 1 for w in args.workers):
            raise ValueError(f"--workers {args.workers}: each must be >= 1")
    except ValueError as error:
        return _error(error)
    timings = [time_cluster(cells, workers) for workers in args.workers]
    print(f"{len(cells)} cells (courtyard crossings, seeds {args.seeds[0]}..{args.seeds[-1]}, α {args.risk_levels})")
    print(f"{'workers':>7} {'start-up s':>10} {'wall s':>7} {'cells/s':>8} {'mean cell s':>11} "
          f"{'overhead/cell s':>15} {'overhead %':>10}")
    for t in timings:
        mean_cell = t.busy_s / t.cells
        print(f"{t.workers:>7} {t.startup_s:>10.1f} {t.wall_s:>7.1f} {t.cells_per_s:>8.3f} {mean_cell:>11.2f} "
              f"{t.overhead_per_cell_s:>15.3f} {100 * t.overhead_per_cell_s / mean_cell:>10.1f}")
    for t in timings[1:]:
        print(f"throughput {t.workers} workers / {timings[0].workers}: {t.cells_per_s / timings[0].cells_per_s:.2f}x")
    return 0


def run(args):
    logging.basicConfig(level=logging.WARNING, format="%(message)s")
    logging.getLogger("riskbound").setLevel(logging.INFO)
    if args.action == "timing" or (args.action == "run" and not args.serial):
        import distributed  # noqa: F401 - sets its loggers' levels on import; quieten them afterwards

        logging.getLogger("distributed").setLevel(logging.WARNING)
    if args.action == "run":
        return _run(args)
    if args.action == "timing":
        return _timing(args)
    if not Path(args.db).is_file():
        return _error(f"--db {args.db}: no such file")
    if args.action == "report":
        from riskbound.sweep.report import write_report

        try:
            paths = write_report(args.db, args.out)
        except ValueError as error:
            return _error(error)
        print("wrote " + ", ".join(str(p) for p in paths))
        return 0
    from riskbound.sweep.store import ResultStore

    with ResultStore(args.db) as store:
        count = store.export_csv(args.csv)
    print(f"wrote {count} runs to {args.csv}")
    return 0
