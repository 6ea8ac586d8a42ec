"""Time `riskbound review` on a long synthetic bag (default: 10 minutes, 40 walkers, 10 Hz).

    python -m riskbound.logs.review.benchmark [--minutes 10] [--walkers 40] [--rate-hz 10]
                                              [--odom-rate-hz 50] [--bag-format mcap] [--keep DIR]
                                              [--without-truth]

Writes a bag with every topic a recorded run has (riskbound.logs.review.synthetic): walkers
crossing a 20 m × 20 m square on straight lines, each replaced by a new walker (new id) when it
leaves; the robot driving a figure-eight through them at 1 m/s. Then runs the review on it
(without re-solving) and prints the wall times. --without-truth leaves crowd_truth out, so the
review takes its obstacles from the forecasts, as on a real robot. The target on the project's
machines (2 cores) is a review of ≤ 30 s for the default bag.
"""

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from riskbound.logs.review import cli, synthetic

HALF_SIZE_M = 10.0


def crowd_run(minutes, walkers, rate_hz, odom_rate_hz, seed=0):
    """A SyntheticRun of `walkers` straight-line walkers and a robot on a figure-eight."""
    rng = np.random.default_rng(seed)
    duration = 60.0 * minutes
    t0 = 1000.0
    frames = t0 + np.arange(int(round(duration * rate_hz)) + 1) / rate_hz
    odom = t0 + np.arange(int(round(duration * odom_rate_hz)) + 1) / odom_rate_hz
    K = len(frames)
    # Each slot holds one walker at a time: it enters on one edge, crosses at 0.8–1.6 m/s and is
    # replaced (new id) when it leaves the square.
    columns, ids = [], []
    next_id = 1
    for _ in range(walkers):
        k = 0
        while k < K:
            start = rng.uniform(-HALF_SIZE_M, HALF_SIZE_M, 2)
            start[rng.integers(2)] = rng.choice([-HALF_SIZE_M, HALF_SIZE_M])
            target = -start + rng.normal(0.0, 3.0, 2)
            speed = rng.uniform(0.8, 1.6)
            direction = (target - start) / np.linalg.norm(target - start)
            span = int(np.linalg.norm(target - start) / speed * rate_hz)
            end = min(K, k + max(span, 2))
            column = np.full((K, 2), np.nan)
            column[k:end] = start + np.outer((np.arange(end - k)) / rate_hz, speed * direction)
            columns.append(column)
            ids.append(next_id)
            next_id += 1
            k = end
    positions = np.stack(columns, axis=1)
    phase = 2.0 * np.pi * (odom - t0) / 60.0  # one figure-eight per minute, ~1 m/s
    robot = np.stack([8.0 * np.sin(phase), 4.0 * np.sin(2.0 * phase)], axis=-1)
    return synthetic.SyntheticRun(odom, robot, frames, np.array(ids), positions, goal=(0.0, 0.0))


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m riskbound.logs.review.benchmark",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=10.0)
    parser.add_argument("--walkers", type=int, default=40)
    parser.add_argument("--rate-hz", type=float, default=10.0)
    parser.add_argument("--odom-rate-hz", type=float, default=50.0)
    parser.add_argument("--bag-format", choices=("mcap", "sqlite3"), default="mcap")
    parser.add_argument("--keep", metavar="DIR", help="write the bag and report here instead of a temporary directory")
    parser.add_argument("--without-truth", action="store_true", help="no crowd_truth topics in the bag")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="review_bench_") as scratch:
        root = Path(args.keep) if args.keep else Path(scratch)
        root.mkdir(parents=True, exist_ok=True)
        bag = root / "bench_bag"
        started = time.perf_counter()
        run = crowd_run(args.minutes, args.walkers, args.rate_hz, args.odom_rate_hz)
        progress = cli.Progress()
        topics = [t for t in synthetic.ALL_TOPICS if not (args.without_truth and t.startswith("crowd_truth"))]
        synthetic.write_review_bag(bag, run, topics=topics, storage=args.bag_format, progress=progress)
        progress.end()
        written = time.perf_counter()
        review_parser = argparse.ArgumentParser()
        cli.add_arguments(review_parser)
        review_args = review_parser.parse_args([str(bag), "--out", str(root / "review")])
        data, events, files, elapsed = cli.review(review_args, progress)
        progress.end()
        size_mb = sum(p.stat().st_size for p in bag.rglob("*") if p.is_file()) / 1e6
        print(f"bag: {args.minutes:g} min, {args.walkers} walkers at {args.rate_hz:g} Hz "
              f"({len(run.walker_ids)} walker ids), odom {args.odom_rate_hz:g} Hz, {size_mb:.0f} MB {args.bag_format}; "
              f"written in {written - started:.1f} s")
        print(f"review: {elapsed:.1f} s wall ({len(events)} events, {sum(e.figure is not None for e in events)} "
              f"figures, {len(data.obstacles)} obstacle observations from {data.obstacles.source})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
