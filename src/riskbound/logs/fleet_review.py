"""`riskbound fleetreview`: the near-miss review of every bag under a directory, on the sweep's engine.

    riskbound fleetreview ROOT [--out DIR] [--clearance-m M] [--robot-radius-m R] [--namespace NS]
                               [--max-figures N] [--workers N | --scheduler ADDRESS | --serial]

Every rosbag2 bag under ROOT (a directory holding metadata.yaml, or a lone .mcap / .db3 file) is
reviewed by `riskbound review` (its `review` function, unchanged, with its own defaults for the
options not given here), one bag per task on Dask distributed (an embedded local cluster on
127.0.0.1 by default, --scheduler for an existing one, --serial for none). Each bag's report goes to
DIR/bags/<the bag's path under ROOT>/, and DIR/fleet.md and DIR/fleet.csv hold one line per bag:
events, collisions, closest approach, where its obstacles came from, its missing topics.

A bag is in one of three states, and the table says which: examined (its counts are what was
found, zero included); not examined (it was read, but the review could not judge it: no robot
path, no obstacles, ...; the reason is given, and its counts are left empty, never shown as zero);
unreadable (missing, truncated, corrupt: the error is given). A progress bar on stderr counts the
bags done, failed and remaining.

Exit status: 0 every bag was examined; 3 at least one was not examined or unreadable (listed);
2 bad options or no bag under ROOT; 130 interrupted.
"""

import csv
import logging
import os
import sys
from dataclasses import asdict, dataclass, fields
from pathlib import Path

EXIT_EXAMINED, EXIT_USAGE, EXIT_NOT_ALL = 0, 2, 3
EXAMINED, NOT_EXAMINED, UNREADABLE = "examined", "not examined", "unreadable"
BAG_FILE_SUFFIXES = (".mcap", ".db3")


@dataclass
class BagVerdict:
    """One bag's line of the fleet table. Counts are None unless the bag was examined."""

    bag: str                  # path under ROOT
    state: str                # EXAMINED, NOT_EXAMINED or UNREADABLE
    reason: str               # why it was not examined / could not be read ("" when examined)
    events: int = None
    collisions: int = None
    closest_approach_m: float = None
    closest_approach_at_s: float = None  # seconds after the bag's start
    obstacle_source: str = ""
    missing_topics: str = ""
    report: str = ""


def add_arguments(parser):
    parser.add_argument("root", help="directory searched for bags (recursively), or one bag")
    parser.add_argument("--out", default="out/fleet", help="directory for fleet.md, fleet.csv and bags/")
    parser.add_argument("--clearance-m", type=float, default=None, help="as riskbound review (its default if omitted)")
    parser.add_argument("--robot-radius-m", type=float, default=None, help="as riskbound review")
    parser.add_argument("--namespace", default=None, help="as riskbound review")
    parser.add_argument("--max-figures", type=int, default=None, help="as riskbound review")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=2, help="worker processes of the embedded cluster")
    where.add_argument("--scheduler", default=None, metavar="ADDRESS", help="existing Dask scheduler, tcp://HOST:PORT")
    where.add_argument("--serial", action="store_true", help="review here, one bag after another, without Dask")


def find_bags(root):
    """Bags under root, sorted: directories with a metadata.yaml (not searched further) and lone
    .mcap / .db3 files. Raises ValueError when root does not exist."""
    root = Path(root)
    if not root.exists():
        raise ValueError(f"root {root}: no such file or directory")
    if root.is_file() or (root / "metadata.yaml").is_file():
        return [root]
    bags = []

    def walk(directory):
        for entry in sorted(directory.iterdir()):
            if entry.is_dir():
                if (entry / "metadata.yaml").is_file():
                    bags.append(entry)
                else:
                    walk(entry)
            elif entry.suffix in BAG_FILE_SUFFIXES:
                bags.append(entry)

    walk(root)
    return bags


def review_options(args):
    """The `riskbound review` options given on this command line, as its own argument list."""
    options = []
    for name in ("clearance_m", "robot_radius_m", "namespace", "max_figures"):
        value = getattr(args, name)
        if value is not None:
            options += ["--" + name.replace("_", "-"), str(value)]
    return options


def review_bag(task):
    """Review one bag (on a worker, or here): task = (bag path, its name under ROOT, report directory,
    review options). Returns a BagVerdict; never raises for a bad bag."""
    import argparse

    from riskbound.logs.bag_io import BagError
    from riskbound.logs.review import cli as single_review

    bag, name, out, options = task
    parser = argparse.ArgumentParser(prog="riskbound review")
    single_review.add_arguments(parser)
    args = parser.parse_args([str(bag), "--out", str(out), "--quiet", *options])
    try:
        data, events, files, _ = single_review.review(args, single_review.Progress(enabled=False))
    except (ValueError, BagError, OSError) as error:
        return BagVerdict(name, UNREADABLE, str(error))
    report = next((str(f) for f in files if Path(f).name == "report.md"), "")
    missing = ", ".join(entry[0] for entry in getattr(data, "missing", ()))
    reasons = list(getattr(data, "not_examined", ()) or ())
    if reasons:
        return BagVerdict(name, NOT_EXAMINED, "; ".join(reasons), missing_topics=missing, report=report)
    closest = getattr(data, "closest", None)
    obstacles = getattr(data, "obstacles", None)
    return BagVerdict(name, EXAMINED, "", events=len(events), collisions=sum(bool(e.collision) for e in events),
                      closest_approach_m=None if closest is None else float(closest.clearance_m),
                      closest_approach_at_s=None if closest is None else float(closest.time_s - data.start_s),
                      obstacle_source=getattr(obstacles, "source", ""), missing_topics=missing, report=report)


def _cell(value, digits=3):
    if value is None:
        return "—"
    return f"{value:.{digits}f}" if isinstance(value, float) else str(value)


def fleet_markdown(root, verdicts, out):
    examined = [v for v in verdicts if v.state == EXAMINED]
    lines = [f"# Fleet review of {root}", "",
             f"{len(verdicts)} bag(s): {len(examined)} examined, "
             f"{sum(v.state == NOT_EXAMINED for v in verdicts)} not examined, "
             f"{sum(v.state == UNREADABLE for v in verdicts)} unreadable. "
             f"In the examined bags: {sum(v.events for v in examined)} event(s), "
             f"{sum(v.collisions for v in examined)} collision(s).", "",
             "A bag that was not examined or could not be read has no counts (—): nothing is known about it, "
             "which is not the same as nothing having happened.", "",
             "| bag | state | events | collisions | closest approach m | at s | obstacles from | missing topics | "
             "reason | report |",
             "|---|---|---|---|---|---|---|---|---|---|"]
    for v in verdicts:
        reason = v.reason.replace("|", "/").replace("\n", " ")
        report = f"[report]({Path(os.path.relpath(v.report, out.resolve())).as_posix()})" if v.report else ""
        lines.append(f"| {v.bag} | {v.state} | {_cell(v.events)} | {_cell(v.collisions)} | "
                     f"{_cell(v.closest_approach_m)} | {_cell(v.closest_approach_at_s, 2)} | {v.obstacle_source} | "
                     f"{v.missing_topics} | {reason} | {report} |")
    return "\n".join(lines) + "\n"


def review_fleet(root, out, options=(), workers=2, scheduler=None, serial=False, stream=None):
    """Review every bag under root; returns the BagVerdicts in bag order and writes out/fleet.md,
    out/fleet.csv and out/bags/. Raises ValueError when root holds no bag."""
    from riskbound.sweep.runner import ProgressBar, run_tasks

    root, out = Path(root), Path(out)
    bags = find_bags(root)
    if not bags:
        raise ValueError(f"root {root}: no bag found (a directory with metadata.yaml, or a .mcap / .db3 file)")
    tasks = []
    for bag in bags:
        name = bag.name if bag == root else bag.relative_to(root).as_posix()
        tasks.append((str(bag.resolve()), name, str((out / "bags" / name).resolve()), tuple(options)))
    verdicts, bar = {}, ProgressBar(len(tasks), stream)

    def finished(task, verdict):
        verdicts[task[1]] = verdict
        bar.update(done=1) if verdict.state == EXAMINED else bar.update(failed=1)

    def crashed(task, message):
        verdicts[task[1]] = BagVerdict(task[1], UNREADABLE, f"the review stopped: {message}")
        bar.update(failed=1)

    try:
        run_tasks(tasks, review_bag, finished, crashed, key=lambda task: f"fleet-review-{task[1]}",
                  workers=workers, scheduler=scheduler, serial=serial)
    finally:
        bar.close()
    ordered = [verdicts[task[1]] for task in tasks]
    out.mkdir(parents=True, exist_ok=True)
    (out / "fleet.md").write_text(fleet_markdown(root, ordered, out), encoding="utf-8")
    with open(out / "fleet.csv", "w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=[f.name for f in fields(BagVerdict)])
        writer.writeheader()
        writer.writerows(asdict(v) for v in ordered)
    return ordered


def run(args):
    logging.basicConfig(level=logging.WARNING, format="%(message)s")
    if not args.serial and args.scheduler is None:
        import distributed  # noqa: F401 - sets its loggers' levels on import; quieten them afterwards

        logging.getLogger("distributed").setLevel(logging.WARNING)
    try:
        verdicts = review_fleet(args.root, args.out, review_options(args), workers=args.workers,
                                scheduler=args.scheduler, serial=args.serial)
    except ValueError as error:
        print(f"riskbound fleetreview: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    for v in verdicts:
        if v.state == EXAMINED:
            closest = "" if v.closest_approach_m is None else f", closest approach {v.closest_approach_m:.3f} m"
            print(f"{v.bag}: {v.events} event(s), {v.collisions} collision(s){closest}")
        else:
            print(f"{v.bag}: {v.state.upper()}: {v.reason}")
    print(f"wrote {Path(args.out) / 'fleet.md'} and {Path(args.out) / 'fleet.csv'}")
    return EXIT_EXAMINED if all(v.state == EXAMINED for v in verdicts) else EXIT_NOT_ALL
