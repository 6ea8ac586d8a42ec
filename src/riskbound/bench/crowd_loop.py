"""`riskbound bench crowdloop`: the closed loop on a synthetic crowd without ROS, for offline tuning.

    riskbound bench crowdloop [--params-file F] [--scenario S] [--seeds 7 ...] [--start-s 1 4 ...]
                              [--set NAME=VALUE ...] [--tracker-set NAME=VALUE ...] [--out DIR]

For every crowd seed and robot start time one crossing: the scenario's social-force crowd is
simulated and reported by the synthetic detector exactly as `riskbound crowd SCENARIO --seed N`
does (seed 7 of config/crowd_courtyard_40.yaml is the committed test bag), the tracker
(riskbound.tracking) forecasts it, the planner core plans on the tracker's newest forecast, and a
simulated robot follows the command for one control period in 50 Hz steps. The planner is given the
scenario's walls and fixed obstacles as the planner node gets them from a crowd bag's map
(riskbound.crowd.static_map.scenario_occupancy, riskbound.world.static_world.StaticWorld). A cycle
without a plan sends no command and the robot brakes at its acceleration limit, as under the
watchdog's stop. The robot leaves `--start-s` seconds into the recording, after one second of
tracking, from the scenario's robot_start towards its robot_goal.

Ground truth is checked at every frame: a contact is the robot's disc (the planner's
robot_radius_m) overlapping a walker's box (the tracker's footprint along the walker's heading):
riskbound.clearance, as in `riskbound closedloop` and `riskbound review`. Parameters come from the
planner, tracker and sim_robot sections of a ROS parameter file (default
config/drone.yaml); --set and --tracker-set override them.

The same engine runs one cell of `riskbound sweep` (`run_cell`): there the walkers may react to
the robot (`reaction_strength_m2_s2` > 0, riskbound.crowd.social_force.RobotPresence; the crowd is
then simulated frame by frame around the robot where it stands at the start of each frame
interval, instead of replayed), a crossing may be capped at a number of cycles, and the outcome is
one flat record (`CellOutcome`).

What it leaves out: message latency. The ROS graph hands the planner a forecast up to one control
period old; here it is always fresh, so the closed loop through `riskbound closedloop` is the
judge, and this command is for comparing settings quickly (about 1–3 s per crossing on these 2-core
machines).

Prints one line per crossing and a summary, writes DIR/crowdloop.json and DIR/crowdloop_clearance.png
(clearance over time, one line per crossing). Exit status 0, or 2 for bad options.
"""

import json
import math
import sys
import time
from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np
import yaml

from riskbound.clearance import disc_box_clearance
from riskbound.planning.settings import PlannerSettings

DEFAULT_PARAMS = "config/drone.yaml"
DEFAULT_SCENARIO = "config/crowd_courtyard_40.yaml"
FRAME_RATE_HZ = 10.0   # the crowd recording rate and the control rate of the loop
ROBOT_SUBSTEPS = 5     # simulated-robot steps per control period (50 Hz, as the sim_robot node)
TRACKING_LEAD_S = 1.0  # tracking before the robot leaves, so that the walkers around it are confirmed
GOAL_TOLERANCE_M = 0.3
EXIT_USAGE = 2
# A near miss: a walker's disc within this gap of the robot's, the threshold `riskbound review` flags
# by default (its --clearance-m); one near miss per walker per approach, approaches of one walker
# closer together than NEAR_MISS_MERGE_S counted once (the review's merge gap).
NEAR_MISS_CLEARANCE_M = 0.5
NEAR_MISS_MERGE_S = 0.5
# The robot stands (for the longest stop) below this speed: our choice, no source; the simulated
# robot braking at 6 m/s² passes it within one 50 Hz substep of reaching zero.
STANDING_SPEED_MPS = 0.05
# Statuses whose plan the robot follows; every other status is a failed cycle (no command, brake).
_PLAN_FOLLOWED = ("solved", "feasible_not_converged", "least_violation")


def add_arguments(parser):
    parser.add_argument("--params-file", default=None, help=f"ROS parameter file (default {DEFAULT_PARAMS})")
    parser.add_argument("--scenario", default=None, help=f"crowd scenario (default {DEFAULT_SCENARIO})")
    parser.add_argument("--seeds", type=int, nargs="+", default=[7], help="crowd seeds (as riskbound crowd --seed)")
    parser.add_argument("--start-s", type=float, nargs="+", default=[1.0, 4.0, 8.0, 12.0],
                        help="robot start times into the recording, ≥ 1 s (tracking comes first) [s]")
    parser.add_argument("--duration-s", type=float, default=60.0, help="crowd recording length [s]")
    parser.add_argument("--set", nargs="*", default=[], metavar="NAME=VALUE", help="planner setting overrides")
    parser.add_argument("--tracker-set", nargs="*", default=[], metavar="NAME=VALUE",
                        help="tracker setting overrides")
    parser.add_argument("--out", default="out/bench", help="directory for crowdloop.json and crowdloop_clearance.png")


def parse_name_values(items, option):
    values = {}
    for item in items:
        name, separator, text = item.partition("=")
        if not separator or not name:
            raise ValueError(f"{option} {item!r}: expected NAME=VALUE")
        values[name] = yaml.safe_load(text)
    return values


def load_settings(params_file, planner_overrides, tracker_overrides):
    """(PlannerSettings, TrackerSettings, simulated-robot max acceleration) from a parameter file."""
    from riskbound.closed_loop import read_parameter_file
    from riskbound.tracking.settings import TrackerSettings

    sections = read_parameter_file(params_file)
    planner_names = {f.name for f in fields(PlannerSettings)}
    tracker_names = {f.name for f in fields(TrackerSettings)}
    for name in planner_overrides:
        if name not in planner_names:
            raise ValueError(f"--set {name}: not a planner setting")
    for name in tracker_overrides:
        if name not in tracker_names:
            raise ValueError(f"--tracker-set {name}: not a tracker setting")
    planner = {k: v for k, v in sections.get("planner", {}).items() if k in planner_names}
    planner = PlannerSettings(**dict(planner, **planner_overrides))
    tracker = {k: v for k, v in sections.get("tracker", {}).items() if k in tracker_names}
    tracker.update(tracker_overrides)
    tracker.update(forecast_steps=planner.horizon_steps, forecast_step_s=planner.step_s)  # the planner's grid
    tracker = TrackerSettings(**tracker)
    max_accel = float(sections.get("sim_robot", {}).get("max_accel_mps2", planner.max_accel_mps2))
    return planner, tracker, max_accel


def crowd_frames(scenario_path, seed, duration_s):
    """(scenario, frames, detections): the crowd and detector output of `riskbound crowd --seed`."""
    from riskbound.crowd.record import seeded_generators
    from riskbound.crowd.scenario import load_scenario
    from riskbound.crowd.sensor import DetectorModel
    from riskbound.crowd.simulate import simulate

    scenario = load_scenario(scenario_path)
    if scenario.robot_start is None or scenario.robot_goal is None:
        raise ValueError(f"{scenario_path}: needs robot_start and robot_goal for a crossing")
    crowd_rng, rng = seeded_generators(seed)
    run = simulate(scenario, crowd_rng, duration_s=duration_s, rate_hz=FRAME_RATE_HZ)
    detector, bounds = DetectorModel(), scenario.bounds()
    detections = [detector.detect(frame.positions, frame.headings, bounds, rng)[0:2] for frame in run.frames]
    return scenario, run.frames, detections


class ReplayedCrowd:
    """A crowd simulated beforehand (walkers who ignore the robot): frames and detections by index."""

    def __init__(self, frames, detections):
        self.frames, self.detections = frames, detections

    @property
    def frame_count(self):
        return len(self.frames)

    def frame(self, k, robot=None):
        """(frame, (detected positions, headings)) number k; `robot` is not seen by these walkers."""
        return self.frames[k], self.detections[k]


class ReactingCrowd:
    """A crowd simulated frame by frame around the robot (riskbound.crowd.simulate.CrowdSimulation),
    seen by the synthetic detector as `crowd_frames` does, from the same two seeded streams."""

    def __init__(self, scenario, seed, duration_s, strength_m2_s2, robot_radius_m):
        from riskbound.crowd.record import seeded_generators
        from riskbound.crowd.sensor import DetectorModel
        from riskbound.crowd.simulate import CrowdSimulation

        crowd_rng, self._rng = seeded_generators(seed)
        self._simulation = CrowdSimulation(scenario, crowd_rng, duration_s=duration_s, rate_hz=FRAME_RATE_HZ)
        self._detector, self._bounds = DetectorModel(), scenario.bounds()
        self.strength_m2_s2, self.robot_radius_m = float(strength_m2_s2), float(robot_radius_m)
        self.frame_count = int(round(duration_s * FRAME_RATE_HZ)) + 1
        self.frames, self.detections = [], []
        self._keep(self._simulation.first_frame())

    def _keep(self, frame):
        self.frames.append(frame)
        self.detections.append(self._detector.detect(frame.positions, frame.headings, self._bounds, self._rng)[0:2])

    def frame(self, k, robot=None):
        """Frame k, simulating the intervals still missing with `robot` (position, velocity) held."""
        from riskbound.crowd.social_force import RobotPresence

        presence = None if robot is None else RobotPresence(robot[0], robot[1], self.robot_radius_m,
                                                            self.strength_m2_s2)
        while len(self.frames) <= k:
            self._keep(self._simulation.next_frame(presence))
        return self.frames[k], self.detections[k]


def _world_velocity(robot):
    """The simulated robot's velocity in the world frame (2,) [m/s]."""
    if robot.model.name == "unicycle":
        return robot.state[3] * np.array([math.cos(robot.state[2]), math.sin(robot.state[2])])
    return robot.state[2:4].copy()


def _onsets(below, ids, times_s, merge_s):
    """Approaches: per walker, runs of `below` frames, runs closer than merge_s apart counted once."""
    last_seen, count = {}, 0
    for flags, frame_ids, time_s in zip(below, ids, times_s):
        for walker in frame_ids[flags]:
            walker = int(walker)
            if walker not in last_seen or time_s - last_seen[walker] > merge_s + 0.5 / FRAME_RATE_HZ:
                count += 1
            last_seen[walker] = time_s
    return count


def crossing(planner, tracker_settings, max_accel, scenario, crowd, start_s, mpc, max_cycles=None):
    """One crossing from start_s into the recording of `crowd` (ReplayedCrowd or ReactingCrowd),
    at most `max_cycles` planning cycles (None: until the recording ends). Returns a dict of
    figures and the clearance series (times, clearance)."""
    from riskbound.crowd.static_map import scenario_occupancy, static_contacts
    from riskbound.world.static_world import StaticWorld
    from riskbound.motion.forecast import ObstacleForecast
    from riskbound.motion.simulated_robot import SimRobotSettings, SimulatedRobot
    from riskbound.tracking.tracker import MultiTargetTracker

    start, goal = np.asarray(scenario.robot_start, float), np.asarray(scenario.robot_goal, float)
    heading = math.atan2(goal[1] - start[1], goal[0] - start[0])
    robot = SimulatedRobot(SimRobotSettings(robot_model=planner.robot_model, initial_x=float(start[0]),
                                            initial_y=float(start[1]), initial_yaw=heading,
                                            max_accel_mps2=max_accel))
    tracker = MultiTargetTracker(tracker_settings)
    footprint = (tracker_settings.footprint_half_length_m, tracker_settings.footprint_half_width_m)
    occupancy = scenario_occupancy(scenario)
    static_world = StaticWorld(occupancy)  # the walls, as the planner node gets them from the crowd bag's map
    mpc.reset()
    grid = planner.step_s * np.arange(1, planner.horizon_steps + 1)
    period = 1.0 / FRAME_RATE_HZ
    # Odometry covariance: 0.02 m position and 0.02 m/s velocity std, the sim_robot node's pose_std_m
    # and twist_std_mps in config/drone.yaml.
    P0 = np.diag([0.02**2, 0.02**2, 0.02**2, 0.02**2])
    first = int(round((start_s - TRACKING_LEAD_S) * FRAME_RATE_HZ))
    leave = int(round(start_s * FRAME_RATE_HZ))
    if first < 0 or leave >= crowd.frame_count:
        last_s = (crowd.frame_count - 1) / FRAME_RATE_HZ
        raise ValueError(f"--start-s {start_s}: must be in [{TRACKING_LEAD_S}, {last_s}] s "
                         f"(one second of tracking comes first)")
    if max_cycles is not None and max_cycles < 1:
        raise ValueError(f"max_cycles={max_cycles!r}: must be >= 1 or None")
    times, clearance, robot_path, solve_ms, statuses = [], [], [], [], {}
    contact_flags, near_flags, frame_ids, speeds = [], [], [], []
    reached_s = None
    for k in range(first, crowd.frame_count):
        frame, (positions, headings) = crowd.frame(k, (robot.state[0:2].copy(), _world_velocity(robot)))
        tracker.process(frame.time_s, positions, headings)
        if k < leave:
            continue
        x0 = robot.state.copy()
        gaps = disc_box_clearance(x0[0:2], planner.robot_radius_m, frame.positions, frame.headings, footprint)
        times.append(frame.time_s - crowd.frames[leave].time_s)
        clearance.append(float(gaps.min()) if len(gaps) else float("inf"))
        robot_path.append(x0[0:2])
        contact_flags.append(gaps < 0.0)
        near_flags.append(gaps < NEAR_MISS_CLEARANCE_M)
        frame_ids.append(frame.ids)
        speeds.append(float(np.linalg.norm(_world_velocity(robot))))
        if np.linalg.norm(goal - x0[0:2]) <= GOAL_TOLERANCE_M:
            reached_s = times[-1]
            break
        if max_cycles is not None and len(solve_ms) >= max_cycles:
            break
        forecast = tracker.forecast().resampled(grid)
        forecast = ObstacleForecast(forecast.track_ids, grid, forecast.positions, forecast.headings,
                                    forecast.covariances, forecast.half_extents)
        result = mpc.solve(x0, P0, goal, forecast, elapsed_s=period, static_world=static_world)
        solve_ms.append(float(getattr(result, "solve_ms", float("nan"))))
        status = str(getattr(result, "status", "unknown"))
        statuses[status] = statuses.get(status, 0) + 1
        followed = bool(getattr(result, "success", False))
        command = mpc.model.command(result.states, result.inputs, robot.yaw) if followed else None
        for _ in range(ROBOT_SUBSTEPS):
            robot.step(command, period / ROBOT_SUBSTEPS)
    clearance_arr = np.asarray(clearance)
    static = static_contacts(times, np.asarray(robot_path), planner.robot_radius_m, occupancy, scenario.bounds())
    figures = {
        "start_s": start_s, "reached_goal": reached_s is not None, "time_to_goal_s": reached_s,
        "contact_frames": int(np.sum(clearance_arr < 0.0)), "min_clearance_m": float(clearance_arr.min()),
        "walker_contacts": _onsets(contact_flags, frame_ids, times, 0.0),
        "near_misses": _onsets(near_flags, frame_ids, times, NEAR_MISS_MERGE_S),
        "static_contact_frames": static.contact_samples, "min_static_clearance_m": static.min_clearance_m,
        "time_outside_bounds_s": static.time_outside_bounds_s,
        "longest_stop_s": _longest_run(np.asarray(speeds) < STANDING_SPEED_MPS, skip_first=True) * period,
        "cycles": len(solve_ms), "statuses": statuses,
        "failed_cycles": sum(n for status, n in statuses.items() if status not in _PLAN_FOLLOWED),
        "least_violation_cycles": statuses.get("least_violation", 0),
        "solve_ms_median": float(np.median(solve_ms)) if solve_ms else None,
        "solve_ms_p95": float(np.percentile(solve_ms, 95)) if solve_ms else None,
        "solve_ms_max": float(np.max(solve_ms)) if solve_ms else None,
    }
    return figures, np.asarray(times), clearance_arr


def _longest_run(flags, skip_first=False):
    """Length of the longest run of True in `flags`; with skip_first, a run from index 0 (the robot at
    rest before its first command) does not count."""
    longest = current = 0
    leading = skip_first
    for flag in flags:
        if flag and not leading:
            current += 1
            longest = max(longest, current)
        else:
            current = 0
            leading = leading and flag
    return longest


@dataclass(frozen=True)
class CellOutcome:
    """What one closed-loop run of a sweep cell gives (see `crossing` for the definitions)."""

    reached_goal: bool
    time_to_goal_s: float       # None when the goal was not reached
    walker_contacts: int        # approaches of a walker ending in discs overlapping
    contact_frames: int         # 10 Hz frames with a walker's disc overlapping the robot's
    static_contact_frames: int  # 10 Hz frames with the robot's disc on a wall or fixed obstacle
    min_clearance_m: float
    min_static_clearance_m: float  # riskbound.crowd.static_map: on the scenario's occupancy grid
    time_outside_bounds_s: float
    near_misses: int
    longest_stop_s: float
    cycles: int
    least_violation_cycles: int
    failed_cycles: int
    solve_ms_median: float
    solve_ms_p95: float
    solve_ms_max: float
    cell_s: float               # wall time of the cell on its worker, crowd simulation included


def run_cell(params_file, scenario_path, seed, start_s, duration_s, planner_overrides, tracker_overrides=None,
             reaction_strength_m2_s2=0.0, max_cycles=None):
    """One closed loop for a sweep: returns a CellOutcome. Raises ValueError for bad input.

    The planner is built afresh for every cell (a few milliseconds once the process has built one):
    a planner kept from an earlier cell carries solver state that changes the last digits of the
    next cell's plans, and a closed loop turns those into different runs.
    """
    from riskbound.planning.mpc import ChanceConstrainedMPC

    started = time.perf_counter()
    planner, tracker, max_accel = load_settings(params_file, dict(planner_overrides), dict(tracker_overrides or {}))
    if not (np.isfinite(reaction_strength_m2_s2) and reaction_strength_m2_s2 >= 0.0):
        raise ValueError(f"reaction_strength_m2_s2={reaction_strength_m2_s2!r}: must be a finite number >= 0")
    mpc = ChanceConstrainedMPC(planner)
    if reaction_strength_m2_s2 > 0.0:
        from riskbound.crowd.scenario import load_scenario

        scenario = load_scenario(scenario_path)
        if scenario.robot_start is None or scenario.robot_goal is None:
            raise ValueError(f"{scenario_path}: needs robot_start and robot_goal for a crossing")
        crowd = ReactingCrowd(scenario, seed, duration_s, reaction_strength_m2_s2, planner.robot_radius_m)
    else:
        scenario, frames, detections = crowd_frames(scenario_path, seed, duration_s)
        crowd = ReplayedCrowd(frames, detections)
    figures, _, _ = crossing(planner, tracker, max_accel, scenario, crowd, start_s, mpc, max_cycles)
    values = {f.name: figures[f.name] for f in fields(CellOutcome) if f.name != "cell_s"}
    return CellOutcome(**values, cell_s=time.perf_counter() - started)


def _plot(series, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figure, axes = plt.subplots(figsize=(9, 4.5))
    for label, times, clearance in series:
        axes.plot(times, clearance, linewidth=1.0, label=label)
    axes.axhline(0.0, color="black", linewidth=1.0)
    axes.set_xlabel("time since the robot left [s]")
    axes.set_ylabel("clearance to the nearest walker [m]\n(disc to box; below 0: contact)")
    axes.set_title("offline closed loop on the synthetic crowd")
    axes.grid(alpha=0.3)
    if len(series) <= 12:
        axes.legend(fontsize=7, ncol=2)
    figure.tight_layout()
    figure.savefig(path, dpi=110)
    plt.close(figure)


def run(args):
    from riskbound.launching.xml_description import package_share
    from riskbound.planning.mpc import ChanceConstrainedMPC

    root = package_share("riskbound")
    try:
        planner, tracker, max_accel = load_settings(args.params_file or root / DEFAULT_PARAMS,
                                                    parse_name_values(args.set, "--set"),
                                                    parse_name_values(args.tracker_set, "--tracker-set"))
        scenario_path = args.scenario or root / DEFAULT_SCENARIO
        if not (np.isfinite(args.duration_s) and args.duration_s > 0.0):
            raise ValueError(f"--duration-s {args.duration_s}: must be > 0")
    except ValueError as error:
        print(f"riskbound bench crowdloop: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    mpc = ChanceConstrainedMPC(planner)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rows, series = [], []
    total = len(args.seeds) * len(args.start_s)
    started = time.perf_counter()
    for seed in args.seeds:
        try:
            scenario, frames, detections = crowd_frames(scenario_path, seed, args.duration_s)
        except ValueError as error:
            print(f"riskbound bench crowdloop: error: {error}", file=sys.stderr)
            return EXIT_USAGE
        for start_s in args.start_s:
            sys.stderr.write(f"\r[{len(rows) + 1}/{total}] seed {seed}, start {start_s:g} s   ")
            sys.stderr.flush()
            try:
                figures, times, clearance = crossing(planner, tracker, max_accel, scenario,
                                                     ReplayedCrowd(frames, detections), start_s, mpc)
            except ValueError as error:
                sys.stderr.write("\n")
                print(f"riskbound bench crowdloop: error: {error}", file=sys.stderr)
                return EXIT_USAGE
            rows.append(dict(figures, seed=seed))
            series.append((f"seed {seed}, start {start_s:g} s", times, clearance))
    sys.stderr.write(f"\rdone in {time.perf_counter() - started:.0f} s{' ' * 40}\n")

    print(f"offline closed loop: {Path(scenario_path).name}, {planner.robot_model}, {planner.horizon_steps} steps, "
          f"risk {planner.risk_level} ({planner.risk_allocation}), infeasible_response {planner.infeasible_response}, "
          f"tracker accel noise {tracker.accel_noise_mps2} m/s²")
    print(f"{'seed':>5} {'start s':>8} {'goal s':>7} {'contact':>8} {'min clear m':>12} {'least viol.':>12} "
          f"{'failed':>7} {'solve ms med/p95':>17}")
    for row in rows:
        failed = row["failed_cycles"]
        goal = f"{row['time_to_goal_s']:.1f}" if row["reached_goal"] else "—"
        print(f"{row['seed']:>5} {row['start_s']:>8g} {goal:>7} {row['contact_frames']:>8} "
              f"{row['min_clearance_m']:>12.3f} {row['statuses'].get('least_violation', 0):>12} {failed:>7} "
              f"{row['solve_ms_median']:>8.1f}/{row['solve_ms_p95']:<8.1f}")
    clean = sum(r["contact_frames"] == 0 and r["reached_goal"] for r in rows)
    smallest = min(r["min_clearance_m"] for r in rows)
    print(f"{clean} of {len(rows)} crossings reached the goal without contact; smallest clearance {smallest:.3f} m")
    report = {"scenario": str(scenario_path), "planner": {f.name: getattr(planner, f.name) for f in fields(planner)},
              "tracker_accel_noise_mps2": tracker.accel_noise_mps2, "crossings": rows}
    json_path, png_path = out / "crowdloop.json", out / "crowdloop_clearance.png"
    json_path.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    _plot(series, png_path)
    print(f"wrote {json_path} and {png_path}")
    return 0
