"""Time free_space_halfplanes on a hall-sized map (default: 40 m × 30 m at 0.05 m, 20 points, K = 4).

    python -m riskbound.world.benchmark [--points 20] [--planes 4] [--search-radius-m 2.0]
                                        [--robot-radius-m 0.3] [--calls 2000]

The hall has outer walls two cells thick, six round pillars, two long interior walls and a
shelf block (our own invented layout). Three plans of `points` steps are timed, each for
`calls` calls after the map's KD-trees are built: along a wall at 0.5 m, through the open middle,
and through a door in an interior wall. Prints the build time and the median / p90 / max per call
[ms]. The planner calls this once per solver iteration, so the target is well under 1 ms.
"""

import argparse
import sys
import time

import numpy as np

from riskbound.world.corridor import free_space_halfplanes
from riskbound.world.occupancy import OccupancyMap

WIDTH_M, HEIGHT_M, RESOLUTION_M = 40.0, 30.0, 0.05


def hall_map():
    """The benchmark hall as an OccupancyMap (module docstring)."""
    columns, rows = int(WIDTH_M / RESOLUTION_M), int(HEIGHT_M / RESOLUTION_M)
    x = (np.arange(columns) + 0.5) * RESOLUTION_M
    y = (np.arange(rows) + 0.5) * RESOLUTION_M
    x, y = np.meshgrid(x, y)
    occupied = np.zeros((rows, columns), dtype=bool)
    occupied[:2], occupied[-2:], occupied[:, :2], occupied[:, -2:] = True, True, True, True
    for px, py in [(8, 8), (16, 8), (24, 8), (8, 22), (16, 22), (24, 22)]:
        occupied |= np.hypot(x - px, y - py) <= 0.6
    occupied |= (np.abs(x - 30.0) < 0.1) & ((y < 13.0) | (y > 15.0))     # interior wall with a 2 m door
    occupied |= (np.abs(y - 15.0) < 0.1) & (x > 2.0) & (x < 12.0)
    occupied |= (x > 33.0) & (x < 38.0) & (y > 4.0) & (y < 6.0)            # shelf block
    values = np.where(occupied, 100, 0).astype(np.int8)
    return OccupancyMap(RESOLUTION_M, columns, rows, 0.0, 0.0, 0.0, "map", values)


def plans(points):
    """Three plans of `points` steps (name → (points, 2) positions [m])."""
    t = np.linspace(0.0, 1.0, points)[:, None]
    return {
        "along a wall": np.array([3.0, 0.6]) + t * [4.0, 0.0],
        "open middle": np.array([18.0, 13.0]) + t * [4.0, 2.0],
        "through a door": np.array([28.0, 14.0]) + t * [4.0, 0.0],
    }


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m riskbound.world.benchmark", description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=20)
    parser.add_argument("--planes", type=int, default=4)
    parser.add_argument("--search-radius-m", type=float, default=2.0)
    parser.add_argument("--robot-radius-m", type=float, default=0.3)
    parser.add_argument("--calls", type=int, default=2000)
    args = parser.parse_args(argv)

    started = time.perf_counter()
    occupancy = hall_map()
    occupancy.occupied_surface, occupancy.free_surface  # build the KD-trees now, not in the first call
    print(f"map {occupancy.width} x {occupancy.height} cells, {len(occupancy.occupied_surface)} surface cells: "
          f"built in {(time.perf_counter() - started) * 1e3:.0f} ms")
    for name, positions in plans(args.points).items():
        times_ms = np.empty(args.calls)
        for k in range(args.calls):
            tic = time.perf_counter()
            halfplanes = free_space_halfplanes(positions, occupancy, args.robot_radius_m, args.planes,
                                               args.search_radius_m)
            times_ms[k] = (time.perf_counter() - tic) * 1e3
        print(f"{name:>15}: {args.points} points, K={args.planes}: median {np.median(times_ms):.3f} ms, "
              f"p90 {np.percentile(times_ms, 90):.3f} ms, max {times_ms.max():.3f} ms; "
              f"{int(halfplanes.active.sum())} planes, {int(halfplanes.uncovered.sum())} cells uncovered")
    return 0


if __name__ == "__main__":
    sys.exit(main())
