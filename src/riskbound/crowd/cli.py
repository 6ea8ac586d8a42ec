"""`riskbound crowd`: write a synthetic crowd bag from a scenario file (`riskbound bagcheck` reads
one back: riskbound.crowd.bag_check).

    riskbound crowd SCENARIO --out BAG [--bag-format mcap|sqlite3] [--seed N] [--duration-s T]
                    [--rate-hz 10] [--sim-time-hz 100] [--noise-m 0.05] [--miss-prob 0.05]
                    [--clutter-rate 0.2] [--frame odom] [--overwrite]

Errors (bad scenario, bad option, unreadable bag) print one line and exit with status 2.
"""

import shutil
import sys
from pathlib import Path

from riskbound.crowd.record import generate_crowd_bag
from riskbound.crowd.sensor import DetectorModel
from riskbound.logs import bag_io

EXIT_ERROR = 2
# Only these may be deleted by --overwrite: a bag directory and nothing else.
_BAG_FILE_SUFFIXES = (".mcap", ".db3", ".yaml", ".db3-shm", ".db3-wal")


def add_arguments(parser):
    parser.epilog = "exit codes: 0 written; 2 a bad scenario or option, or the bag could not be written"
    parser.add_argument("scenario", help="scenario YAML file (see config/crowd_*.yaml)")
    parser.add_argument("--out", metavar="BAG", required=True, help="bag directory to create")
    parser.add_argument("--bag-format", choices=bag_io.STORAGE_FORMATS, default="mcap",
                        help="rosbag2 storage format (default mcap)")
    parser.add_argument("--seed", type=int, default=0, help="random seed; the same seed gives the same bag (default 0)")
    parser.add_argument("--duration-s", type=float, default=None,
                        help="recorded seconds after the warm-up (default: the scenario's duration_s)")
    parser.add_argument("--rate-hz", type=float, default=10.0, help="frames per second of truth and detections (default 10)")
    parser.add_argument("--sim-time-hz", type=float, default=100.0,
                        help="/clock messages per second of bag time (default 100)")
    parser.add_argument("--noise-m", type=float, default=0.05, help="detection position noise, sd per axis [m] (default 0.05)")
    parser.add_argument("--heading-noise-rad", type=float, default=0.1, help="detection heading noise, sd [rad] (default 0.1)")
    parser.add_argument("--miss-prob", type=float, default=0.05, help="probability a walker is not detected in a frame (default 0.05)")
    parser.add_argument("--clutter-rate", type=float, default=0.2,
                        help="mean number of false detections per frame, Poisson (default 0.2)")
    parser.add_argument("--frame", default="odom", help="frame_id of the poses (default odom)")
    parser.add_argument("--overwrite", action="store_true", help="replace BAG if it is an existing bag directory")


def run(args):
    try:
        return _generate(args)
    except (ValueError, bag_io.BagError, OSError) as error:
        _end_progress()
        print(f"riskbound crowd: error: {error}", file=sys.stderr)
        return EXIT_ERROR


def _generate(args):
    output = Path(args.out)
    if output.exists():
        if not args.overwrite:
            raise ValueError(f"--out {output}: already exists; choose another path or pass --overwrite")
        _remove_bag_directory(output)
    detector = DetectorModel(noise_m=args.noise_m, miss_prob=args.miss_prob, clutter_rate=args.clutter_rate,
                             heading_noise_rad=args.heading_noise_rad)
    summary = generate_crowd_bag(args.scenario, output, seed=args.seed, duration_s=args.duration_s,
                                 rate_hz=args.rate_hz, sim_time_hz=args.sim_time_hz, detector=detector,
                                 frame_id=args.frame, bag_format=args.bag_format, progress=_progress)
    _end_progress()
    simulated_s = summary.duration_s
    total_s = summary.simulate_s + summary.write_s
    print(f"wrote {summary.bag_path} ({summary.bag_format}, {summary.size_bytes / 1e6:.2f} MB)")
    print(f"  scenario {summary.scenario!r}, seed {summary.seed}: {summary.frames} frames over {simulated_s:.1f} s "
          f"at {args.rate_hz:g} Hz, frame {args.frame!r}")
    print(f"  walkers: {summary.spawned} appeared, {summary.exited} left, {summary.turned_away} turned away, "
          f"{summary.mean_present:.1f} present on average (max {summary.max_present})")
    print(f"  closest approach between walkers {round(summary.min_gap_m, 3) + 0.0:.3f} m, to walls/obstacles "
          f"{round(summary.min_boundary_gap_m, 3) + 0.0:.3f} m (disc gaps); {summary.contacts} contacts resolved")
    print(f"  detections: {summary.detections} reported, {summary.missed} missed, {summary.clutter} clutter; "
          f"{summary.clock_messages} /clock messages")
    print(f"  took {total_s:.1f} s (simulate {summary.simulate_s:.1f} s, write {summary.write_s:.1f} s): "
          f"{simulated_s / max(total_s, 1e-9):.0f}x real time")
    return 0


def _remove_bag_directory(path):
    contents = list(path.iterdir()) if path.is_dir() else []
    looks_like_bag = (path / "metadata.yaml").is_file() and all(
        p.is_file() and p.name.endswith(_BAG_FILE_SUFFIXES) for p in contents)
    if not looks_like_bag:
        raise ValueError(f"--out {path}: exists and is not a bag directory; not removing it")
    shutil.rmtree(path)


_progress_state = {"stage": None, "percent": None}


def _progress(stage, fraction):
    """One stderr line per stage, redrawn in place when the whole percentage changes."""
    percent = int(100 * min(max(fraction, 0.0), 1.0))
    if stage == _progress_state["stage"] and percent == _progress_state["percent"]:
        return
    if _progress_state["stage"] not in (None, stage):
        sys.stderr.write("\n")
    width = 30
    filled = width * percent // 100
    sys.stderr.write(f"\r{stage:<10} [{'#' * filled}{'.' * (width - filled)}] {percent:3d}%")
    sys.stderr.flush()
    _progress_state.update(stage=stage, percent=percent)


def _end_progress():
    if _progress_state["stage"] is not None:
        sys.stderr.write("\n")
        sys.stderr.flush()
        _progress_state.update(stage=None, percent=None)
