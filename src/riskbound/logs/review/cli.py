"""`riskbound review`: find near-misses in a recorded bag, explain them, and re-solve them.

    riskbound review BAG [--out DIR] [--clearance-m 0.5] [--robot-radius-m R]
                     [--obstacle-half-extents-m L W] [--namespace NS] [--merge-gap-s 0.5]
                     [--replan-risk A] [--replan-param name=value ...] [--max-figures 10] [--quiet]

Writes DIR/report.md, DIR/events.json and PNG figures (see riskbound.logs.review.report). Progress
goes to stderr, a short summary to stdout.

Exit codes (EPILOG): 0 the run was examined (whatever was found); 2 an invalid option or a bag
that cannot be read (missing, truncated, corrupt), one line on stderr naming the problem;
3 the run could not be examined (no robot path, no obstacles, a --namespace that matches nothing,
or robot and obstacles never overlapping in time): the summary line and the report say why, and
neither claims that nothing happened.
"""

import sys
import time
from pathlib import Path

from riskbound.clearance import NEIGHBOUR_GAP_PERIODS, closest_approach
from riskbound.logs.bag_io import BagError
from riskbound.logs.review import events as event_search
from riskbound.logs.review.coverage import not_examined_reasons
from riskbound.logs.review.forecast_check import check_event
from riskbound.logs.review.load import load_review_data

EXIT_EXAMINED, EXIT_ERROR, EXIT_NOT_EXAMINED = 0, 2, 3
EPILOG = ("exit codes: 0 the run was examined (events or none); 2 an invalid option or an unreadable bag "
          "(one line on stderr); 3 the run could not be examined: no robot path, no obstacles, a --namespace "
          "that matches no topic, or robot and obstacles never overlapping in time (the reason is in the "
          "summary line and in report.md)")


def _risk_range():
    from riskbound.planning.settings import SPECS_BY_NAME  # the planner's own range for risk_level

    return SPECS_BY_NAME["risk_level"].allowed()


def add_arguments(parser):
    parser.epilog = EPILOG
    parser.add_argument("bag", help="rosbag2 bag: directory, or a .mcap / .db3 file")
    parser.add_argument("--out", metavar="DIR", help="output directory (default: ./review_<bag name>)")
    parser.add_argument("--clearance-m", type=float, default=0.5,
                        help="an event is a clearance below this [m] between robot disc and obstacle box (default 0.5)")
    parser.add_argument("--robot-radius-m", type=float, default=None,
                        help="robot disc radius [m] (default: planner_status robot_radius_m if recorded, else 0.3)")
    parser.add_argument("--obstacle-half-extents-m", type=float, nargs=2, metavar=("LENGTH", "WIDTH"), default=None,
                        help="obstacle box half-length and half-width [m] (default: from the forecasts, else 0.25 0.2)")
    parser.add_argument("--namespace", default="",
                        help="read the topics under this namespace (bags with several robots)")
    parser.add_argument("--merge-gap-s", type=float, default=0.5,
                        help="approaches of one obstacle closer together than this are one event [s] (default 0.5)")
    parser.add_argument("--replan-risk", type=float, default=None, metavar="A",
                        help=f"re-solve the planner at each event onset with risk level A in {_risk_range()} "
                             "and overlay the plans")
    parser.add_argument("--replan-param", action="append", default=[], metavar="NAME=VALUE",
                        help="another planner setting for the re-solve (repeatable), e.g. max_speed_mps=0.8")
    parser.add_argument("--max-figures", type=int, default=10,
                        help="draw figures for at most this many events, closest first (default 10)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


class Progress:
    """One stderr line per stage, redrawn in place when the whole percentage changes."""

    def __init__(self, enabled=True, stream=None):
        self.enabled = enabled
        self.stream = stream or sys.stderr
        self.stage = None
        self.percent = None

    def __call__(self, stage, fraction):
        if not self.enabled:
            return
        percent = int(100 * min(max(fraction, 0.0), 1.0))
        if stage == self.stage and percent == self.percent:
            return
        if self.stage not in (None, stage):
            self.stream.write("\n")
        filled = 30 * percent // 100
        self.stream.write(f"\r{stage:<10} [{'#' * filled}{'.' * (30 - filled)}] {percent:3d}%")
        self.stream.flush()
        self.stage, self.percent = stage, percent

    def end(self):
        if self.enabled and self.stage is not None:
            self.stream.write("\n")
            self.stream.flush()
        self.stage = self.percent = None


def _check(args):
    if not (args.clearance_m >= 0.0 and args.clearance_m < float("inf")):
        raise ValueError(f"--clearance-m {args.clearance_m}: must be a finite number ≥ 0")
    if args.robot_radius_m is not None and not 0.0 <= args.robot_radius_m <= 5.0:
        raise ValueError(f"--robot-radius-m {args.robot_radius_m}: must be in [0, 5]")
    if args.obstacle_half_extents_m is not None and not all(0.0 <= v <= 10.0 for v in args.obstacle_half_extents_m):
        raise ValueError(f"--obstacle-half-extents-m {args.obstacle_half_extents_m}: each must be in [0, 10]")
    if not (args.merge_gap_s >= 0.0 and args.merge_gap_s < float("inf")):
        raise ValueError(f"--merge-gap-s {args.merge_gap_s}: must be a finite number ≥ 0")
    if args.max_figures < 0:
        raise ValueError(f"--max-figures {args.max_figures}: must be ≥ 0")
    if args.out and Path(args.out).exists() and not Path(args.out).is_dir():
        raise ValueError(f"--out {args.out}: exists and is not a directory; name a directory (new or existing)")


def review(args, progress):
    """The whole review; returns (data, events, output files, elapsed seconds). data.not_examined
    holds the reasons the run could not be examined (empty when it was)."""
    started = time.perf_counter()
    _check(args)
    overrides = {}
    replanner = None
    if args.replan_risk is not None or args.replan_param:
        from riskbound.logs.review.replan import Replanner, parse_overrides  # builds CasADi problems

        overrides = parse_overrides(args.replan_risk, args.replan_param)
        replanner = Replanner(overrides)
    bag = Path(args.bag)
    out = Path(args.out) if args.out else Path.cwd() / f"review_{bag.stem or bag.name}"
    data = load_review_data(bag, namespace=args.namespace, robot_radius_m=args.robot_radius_m,
                            half_extents_m=args.obstacle_half_extents_m, progress=progress)
    events, series = event_search.find_events(data, args.clearance_m, args.merge_gap_s)
    clearance = event_search.observation_clearances(data)
    data.not_examined = not_examined_reasons(data, clearance)
    data.closest = None
    if not data.not_examined and not data.obstacles.anonymous:
        obs = data.obstacles
        data.closest = closest_approach(data.robot.times_s, data.robot.positions, data.robot_radius_m, obs.times_s,
                                        obs.ids, obs.positions, obs.headings, obs.half_extents,
                                        NEIGHBOUR_GAP_PERIODS * event_search.nominal_frame_period_s(obs))
    for i, event in enumerate(events):
        event.forecast_checks = check_event(event, data)
        event.planner = event_search.planner_context(data, event)
        event.watchdog = event_search.watchdog_context(data, event)
        progress("events", (i + 1) / len(events))
    if replanner is not None:
        for i, event in enumerate(events):
            event.replan = replanner.replan(data, event)
            progress("replanning", (i + 1) / len(events))
    from riskbound.logs.review.report import write_outputs  # matplotlib: only once there is a bag to draw

    try:
        files = write_outputs(out, data, events, series, clearance, args.clearance_m, overrides, args.max_figures,
                              progress)
    except OSError as error:
        raise ValueError(f"--out {out}: cannot write the report there ({error.strerror or error})") from None
    return data, events, files, time.perf_counter() - started


def run(args):
    progress = Progress(enabled=not args.quiet)
    try:
        data, events, files, elapsed = review(args, progress)
    except (ValueError, BagError, OSError) as error:
        progress.end()
        print(f"riskbound review: error: {error}", file=sys.stderr)
        return EXIT_ERROR
    progress.end()
    report = next(f for f in files if f.name == "report.md")
    if data.not_examined:
        print(f"{data.path}: NOT EXAMINED: {'; '.join(data.not_examined)}")
    else:
        collisions = sum(e.collision for e in events)
        closest = (f"; closest approach {data.closest.clearance_m:.3f} m at {data.closest.time_s - data.start_s:.2f} s"
                   if data.closest is not None else "")
        print(f"{data.path}: {len(events)} event(s), {collisions} collision(s){closest}; "
              f"obstacles from {data.obstacles.source}")
    for name, msgtype, _ in data.missing:
        print(f"  missing topic: {name} ({msgtype})")
    for role, count in sorted(data.rejected.items()):
        print(f"  rejected: {count} {role} message(s) with implausible values")
    print(f"report: {report} ({len(files)} files, {elapsed:.1f} s)")
    return EXIT_NOT_EXAMINED if data.not_examined else EXIT_EXAMINED
