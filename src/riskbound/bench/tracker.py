"""`riskbound bench tracker`: time per scan of the obstacle tracker with 100 detections.

A synthetic crowd (people walking at 0.8–1.6 m/s with slowly wandering headings inside a square,
turning back at its edges) is detected at a fixed rate with position noise, missed detections
and clutter. After a warm-up that confirms the tracks, every scan is timed: the update (predict,
gate, associate, update, start/delete tracks) and the forecast of the confirmed tracks over the
planner grid. Prints median / p90 / max of the wall time per model and whether the target
(median ≤ 2 ms for the constant-velocity model, the default) is met; writes tracker.json and
tracker_ms.png. `total_cpu` is the process CPU time of the same work: on a machine shared with
other jobs the wall time also counts the waits for a core, the CPU time does not.
"""

import json
import os
import platform
import sys
import time

import numpy as np

from riskbound.bench.time_histogram import write_time_histogram

TARGET_MEDIAN_MS = 2.0


def add_arguments(parser):
    parser.add_argument("--detections", type=int, default=100, help="people in the crowd (one detection each)")
    parser.add_argument("--scans", type=int, default=500, help="timed scans per model")
    parser.add_argument("--warmup", type=int, default=30, help="untimed scans first (tracks confirm)")
    parser.add_argument("--models", nargs="+", default=["constant_velocity", "unicycle"],
                        choices=["constant_velocity", "unicycle"])
    parser.add_argument("--forecast-steps", type=int, default=20)
    parser.add_argument("--rate-hz", type=float, default=10.0, help="scan rate")
    parser.add_argument("--area-m", type=float, default=30.0, help="side of the square the crowd walks in")
    parser.add_argument("--noise-m", type=float, default=0.1, help="detection position noise (std per axis)")
    parser.add_argument("--miss-rate", type=float, default=0.05, help="fraction of people not detected per scan")
    parser.add_argument("--clutter", type=float, default=2.0, help="mean false detections per scan")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", default="out/bench", help="directory for tracker.json and tracker_ms.png")


class SyntheticCrowd:
    """People walking inside a square; `scan()` returns the noisy detections of the next period."""

    def __init__(self, people, area_m, rate_hz, noise_m, miss_rate, clutter, seed):
        self.rng = np.random.default_rng(seed)
        self.area_m, self.dt, self.noise_m = area_m, 1.0 / rate_hz, noise_m
        self.miss_rate, self.clutter = miss_rate, clutter
        self.position = self.rng.uniform(0.0, area_m, (people, 2))
        self.heading = self.rng.uniform(-np.pi, np.pi, people)
        self.speed = self.rng.uniform(0.8, 1.6, people)
        self.time_s = 0.0

    def scan(self):
        self.heading += self.rng.normal(0.0, 0.3, len(self.heading)) * np.sqrt(self.dt)
        step = self.speed[:, None] * self.dt * np.column_stack([np.cos(self.heading), np.sin(self.heading)])
        self.position += step
        outside = (self.position < 0.0) | (self.position > self.area_m)
        # Turn back at the edges: mirror the heading's component across the wall that was crossed.
        self.heading = np.where(outside[:, 0], np.pi - self.heading, self.heading)
        self.heading = np.where(outside[:, 1], -self.heading, self.heading)
        self.position = np.clip(self.position, 0.0, self.area_m)
        self.time_s += self.dt
        seen = self.rng.random(len(self.position)) >= self.miss_rate
        detections = self.position[seen] + self.rng.normal(0.0, self.noise_m, (int(seen.sum()), 2))
        clutter = self.rng.uniform(0.0, self.area_m, (self.rng.poisson(self.clutter), 2))
        rows = np.concatenate([detections, clutter])
        return self.time_s, rows[self.rng.permutation(len(rows))]


def summarise(ms):
    ms = np.asarray(ms, dtype=float)
    return {"scans": int(ms.size), "median_ms": float(np.median(ms)), "p90_ms": float(np.percentile(ms, 90)),
            "max_ms": float(ms.max())}


def bench_model(model, args):
    from riskbound.tracking.settings import TrackerSettings
    from riskbound.tracking.tracker import MultiTargetTracker

    settings = TrackerSettings(motion_model=model, position_noise_m=args.noise_m,
                               forecast_steps=args.forecast_steps)
    tracker = MultiTargetTracker(settings)
    crowd = SyntheticCrowd(args.detections, args.area_m, args.rate_hz, args.noise_m, args.miss_rate,
                           args.clutter, args.seed)
    update_ms, forecast_ms, cpu_ms, confirmed, detections = [], [], [], [], []
    for k in range(args.warmup + args.scans):
        stamp, rows = crowd.scan()
        cpu_started = time.process_time()
        started = time.perf_counter()
        tracker.process(stamp, rows)
        updated = time.perf_counter()
        tracker.forecast()
        finished = time.perf_counter()
        cpu_finished = time.process_time()
        if k >= args.warmup:
            update_ms.append(1e3 * (updated - started))
            forecast_ms.append(1e3 * (finished - updated))
            cpu_ms.append(1e3 * (cpu_finished - cpu_started))
            confirmed.append(tracker.confirmed_count)
            detections.append(len(rows))
        if k % 50 == 0:
            sys.stderr.write(f"\r{model}: scan {k + 1}/{args.warmup + args.scans}   ")
            sys.stderr.flush()
    total_ms = np.add(update_ms, forecast_ms)
    return {"total": summarise(total_ms), "update": summarise(update_ms), "forecast": summarise(forecast_ms),
            "total_cpu": summarise(cpu_ms),
            "mean_detections_per_scan": float(np.mean(detections)),
            "mean_confirmed_tracks": float(np.mean(confirmed)), "total_ms": total_ms.tolist()}


def run(args):
    os.makedirs(args.out, exist_ok=True)
    results = {model: bench_model(model, args) for model in args.models}
    sys.stderr.write("\r" + " " * 60 + "\r")
    print(f"tracker time per scan: {args.detections} people ({args.miss_rate:.0%} missed, {args.clutter:g} clutter "
          f"per scan), update + forecast of {args.forecast_steps} steps, {args.scans} scans "
          f"({platform.processor() or platform.machine()}, {os.cpu_count()} cores)")
    print(f"{'model':>18} {'part':>10} {'median':>8} {'p90':>8} {'max':>8}   [ms]   detections  confirmed")
    for model, result in results.items():
        for part in ("total", "update", "forecast", "total_cpu"):
            row = result[part]
            extra = (f"   {result['mean_detections_per_scan']:10.1f} {result['mean_confirmed_tracks']:10.1f}"
                     if part == "total" else "")
            print(f"{model:>18} {part:>10} {row['median_ms']:>8.3f} {row['p90_ms']:>8.3f} {row['max_ms']:>8.3f}"
                  f"         {extra}")
    if "constant_velocity" in results:
        median = results["constant_velocity"]["total"]["median_ms"]
        print(f"target: median ≤ {TARGET_MEDIAN_MS} ms (constant_velocity): "
              f"{'met' if median <= TARGET_MEDIAN_MS else 'MISSED'} ({median:.3f} ms)")
    report = {"people": args.detections, "scans": args.scans, "forecast_steps": args.forecast_steps,
              "rate_hz": args.rate_hz, "noise_m": args.noise_m, "miss_rate": args.miss_rate,
              "clutter": args.clutter, "seed": args.seed, "target_median_ms": TARGET_MEDIAN_MS,
              "machine": {"cores": os.cpu_count(), "processor": platform.processor()},
              "results": {model: {k: v for k, v in r.items() if k != "total_ms"} for model, r in results.items()}}
    json_path = os.path.join(args.out, "tracker.json")
    with open(json_path, "w") as handle:
        json.dump(report, handle, indent=2)
    png_path = os.path.join(args.out, "tracker_ms.png")
    write_time_histogram({model: r["total_ms"] for model, r in results.items()}, png_path, TARGET_MEDIAN_MS,
                         f"target median {TARGET_MEDIAN_MS} ms", "update + forecast per scan [ms]", "scans",
                         "tracker time per scan")
    print(f"wrote {json_path} and {png_path}")
    return 0

