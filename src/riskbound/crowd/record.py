"""Scenario file → simulated crowd → synthetic detections → crowd bag (see riskbound.logs.bag_io).

Two random streams come from the seed: one drives the crowd, the other the detector, so changing
the detector's settings leaves the walkers' paths unchanged.
"""

import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from riskbound.crowd.scenario import load_scenario
from riskbound.crowd.sensor import DetectorModel
from riskbound.crowd.simulate import simulate
from riskbound.crowd.static_map import scenario_occupancy
from riskbound.logs import bag_io


@dataclass
class RecordingSummary:
    scenario: str
    seed: int
    bag_path: Path
    bag_format: str
    frames: int
    duration_s: float
    spawned: int
    exited: int
    turned_away: int
    max_present: int
    mean_present: float
    contacts: int
    min_gap_m: float
    min_boundary_gap_m: float
    detections: int
    missed: int
    clutter: int
    clock_messages: int
    simulate_s: float
    write_s: float
    size_bytes: int


def seeded_generators(seed):
    """(crowd generator, detector generator) for a bag's seed: the crowd is simulated with the first
    and the detector's noise, misses and clutter are drawn from the second, frame by frame."""
    crowd_seed, detector_seed = np.random.SeedSequence(seed).spawn(2)
    return np.random.default_rng(crowd_seed), np.random.default_rng(detector_seed)


def generate_crowd_bag(scenario_path, bag_path, seed=0, duration_s=None, rate_hz=10.0, sim_time_hz=100.0,
                       detector=None, frame_id="odom", bag_format="mcap", progress=None):
    """Simulate the scenario and write the bag. Returns a RecordingSummary.

    Raises ValueError for a bad scenario or argument and BagError when the bag cannot be written.
    `progress(stage, fraction)` is called with stage "simulating" or "writing".
    """
    if not isinstance(frame_id, str) or not frame_id:
        raise ValueError(f"frame_id={frame_id!r}: must be a non-empty frame name")
    if not (np.isfinite(sim_time_hz) and sim_time_hz > 0.0):
        raise ValueError(f"sim_time_hz={sim_time_hz!r}: must be > 0")
    if bag_format not in bag_io.STORAGE_FORMATS:
        raise ValueError(f"bag_format={bag_format!r}: allowed values are {', '.join(bag_io.STORAGE_FORMATS)}")
    detector = DetectorModel() if detector is None else detector
    scenario = load_scenario(scenario_path)
    crowd_rng, rng = seeded_generators(seed)

    started = time.perf_counter()
    run = simulate(scenario, crowd_rng, duration_s=duration_s, rate_hz=rate_hz,
                   progress=None if progress is None else (lambda f: progress("simulating", f)))
    simulated = time.perf_counter()

    bounds = scenario.bounds()
    frame_ns = [bag_io.seconds_to_ns(frame.time_s) for frame in run.frames]
    clock_step_ns = bag_io.seconds_to_ns(1.0 / sim_time_hz)
    clock_ns = list(range(frame_ns[0], frame_ns[-1] + 1, clock_step_ns))
    custom_data = {
        "generator": "riskbound crowd",
        "scenario": scenario.name,
        "scenario_file": Path(scenario_path).name,
        "seed": str(seed),
        "walker_radius_m": repr(scenario.walker_radius_m),
        "frame_id": frame_id,
        "rate_hz": repr(float(rate_hz)),
        "noise_m": repr(detector.noise_m),
        "miss_prob": repr(detector.miss_prob),
        "clutter_rate": repr(detector.clutter_rate),
        "heading_noise_rad": repr(detector.heading_noise_rad),
        "bounds": repr(list(bounds)),
    }
    for name in ("robot_start", "robot_goal"):
        hint = getattr(scenario, name)
        if hint is not None:
            custom_data[name] = repr([float(hint[0]), float(hint[1])])

    missed = clutter = detections = 0
    topics = {**bag_io.CROWD_TOPICS, **bag_io.MAP_TOPICS}
    with bag_io.BagWriter(bag_path, topics, storage=bag_format, custom_data=custom_data) as writer:
        static_map = scenario_occupancy(scenario, frame_id=frame_id)
        writer.write(bag_io.TOPIC_MAP, frame_ns[0], bag_io.occupancy_grid_cdr(frame_ns[0], static_map))
        clock_index = 0
        for k, (frame, time_ns) in enumerate(zip(run.frames, frame_ns)):
            while clock_index < len(clock_ns) and clock_ns[clock_index] <= time_ns:
                writer.write(bag_io.TOPIC_CLOCK, clock_ns[clock_index], bag_io.clock_cdr(clock_ns[clock_index]))
                clock_index += 1
            writer.write(bag_io.TOPIC_TRUTH, time_ns,
                         bag_io.pose_array_cdr(time_ns, frame_id, frame.positions, frame.headings))
            writer.write(bag_io.TOPIC_TRUTH_IDS, time_ns, bag_io.ids_cdr(frame.ids))
            positions, headings, frame_missed, frame_clutter = detector.detect(frame.positions, frame.headings, bounds, rng)
            writer.write(bag_io.TOPIC_DETECTIONS, time_ns, bag_io.pose_array_cdr(time_ns, frame_id, positions, headings))
            missed += frame_missed
            clutter += frame_clutter
            detections += len(positions)
            if progress is not None and k % 50 == 0:
                progress("writing", k / len(run.frames))
        clock_messages = writer.counts[bag_io.TOPIC_CLOCK]
    if progress is not None:
        progress("writing", 1.0)
    written = time.perf_counter()

    present = [len(frame.ids) for frame in run.frames]
    return RecordingSummary(
        scenario=scenario.name, seed=seed, bag_path=Path(bag_path), bag_format=bag_format, frames=len(run.frames),
        duration_s=run.frames[-1].time_s - run.frames[0].time_s, spawned=run.spawned, exited=run.exited,
        turned_away=run.turned_away, max_present=run.max_present, mean_present=float(np.mean(present)),
        contacts=run.contacts, min_gap_m=run.min_gap_m, min_boundary_gap_m=run.min_boundary_gap_m,
        detections=detections, missed=missed, clutter=clutter, clock_messages=clock_messages,
        simulate_s=simulated - started, write_s=written - simulated, size_bytes=bag_io.bag_size_bytes(bag_path))
