"""The pruning check of `riskbound bench compare`: our median solve time with many walkers against
few, in the exhibition hall of suite (b) (`compare_hall`); `run_pruning` says how the two ratios
are measured.
"""

import numpy as np

from riskbound.bench.compare_hall import Concourse, run_episode
from riskbound.bench.compare_methods import make_planner
from riskbound.motion.forecast import ObstacleForecast


def _first_tracks(forecast, count):
    return ObstacleForecast(forecast.track_ids[:count], forecast.times, forecast.positions[:count],
                            forecast.headings[:count], forecast.covariances[:count], forecast.half_extents[:count])


def run_pruning(settings, low, high, seeds, scene_options, log):
    """Our median solve ms with `high` against `low` walkers, two ways.

    Same hall: closed loops with `high` and with `low` walkers in the exhibition hall (at 200 vs 40 the
    local density is five times higher, so more walkers are in reach, not only more to prune).
    Far walkers: the closed loop with `low` walkers is recorded, its forecasts carrying also
    `high − low` walkers in a far hall; every cycle is then re-solved twice, interleaved so both
    see the same machine load, by two planners warm-started alike: with all walkers and with the
    `low` in the hall only. The problems are identical after pruning, so the ratio is its cost.
    """
    planner = make_planner("ours", settings, 3.0)

    def closed_loop_ms(walkers):
        solve_ms = []
        for seed in range(seeds):
            solve_ms.extend(run_episode(planner, settings, Concourse(walkers, seed, **scene_options), 0)["solve_ms"])
        log(f"pruning: {walkers} walkers in the hall, closed loop, median solve {np.median(solve_ms):.1f} ms "
            f"over {len(solve_ms)} cycles")
        return float(np.median(solve_ms))

    at_low, same_hall = closed_loop_ms(low), closed_loop_ms(high)
    with_far, without_far = [], []
    replay_all, replay_hall = make_planner("ours", settings, 3.0), make_planner("ours", settings, 3.0)
    for seed in range(seeds):
        scene = Concourse(low, seed, far_walkers=high - low, **scene_options)
        episode = run_episode(planner, settings, scene, 0, record=True)
        replay_all.reset()
        replay_hall.reset()
        for x, forecast in episode["recorded"]:
            with_far.append(replay_all.solve(x, episode["P0"], episode["goal"], forecast).solve_ms)
            without_far.append(replay_hall.solve(x, episode["P0"], episode["goal"],
                                                 _first_tracks(forecast, low)).solve_ms)
    far, hall = float(np.median(with_far)), float(np.median(without_far))
    log(f"pruning: replay of {len(with_far)} cycles, {low} walkers + {high - low} far away {far:.1f} ms, "
        f"{low} only {hall:.1f} ms")
    return {"walkers_low": low, "walkers_high": high, "solve_ms_median_low": at_low,
            "solve_ms_median_high": same_hall, "ratio": same_hall / at_low,
            "solve_ms_median_replay_low": hall, "solve_ms_median_replay_high_far": far, "ratio_far": far / hall}

