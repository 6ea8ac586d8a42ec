"""`riskbound bench crowdloop`: the closed loop on a synthetic crowd without ROS, for offline tuning.

    riskbound bench crowdloop [--params-file F] [--scenario S] [--seeds 7 ...] [--start-s 1 4 ...]
                              [--set NAME=VALUE ...] [--tracker-set NAME=VALUE ...] [--out DIR]

For every crowd seed and robot start time one crossing: the scenario's social-force crowd is
simulated and reported by the synthetic detector exactly as `riskbound crowd SCENARIO --seed N`
does (seed 7 of config/crowd_courtyard_40.yaml is the committed test bag), the tracker
(riskbound.tracking) forecasts it, the planner core plans on the tracker's newest forecast, and a
simulated robot follows the command for one control period in 50 Hz steps. A cycle without a plan
sends no command and the robot brakes at its acceleration limit, as under the watchdog's stop. The
robot leaves `--start-s` seconds into the recording, after one second of tracking, from the
scenario's robot_start towards its robot_goal.

Ground truth is checked at every frame: a contact is the robot's disc (the planner's
robot_radius_m) overlapping a walker's disc (the scenario's walker_radius_m), the same test as
`riskbound closedloop`. Parameters come from the planner, tracker and sim_robot sections of a ROS
parameter file (default config/drone_closed_loop.yaml); --set and --tracker-set override them.

What it leaves out: message latency. The ROS graph hands the planner a forecast up to one control
period old; here it is always fresh, so the closed loop through `riskbound closedloop` is the
judge, and this command is for comparing settings quickly (about 10 s per crossing).

Prints one line per crossing and a summary, writes DIR/crowdloop.json and DIR/crowdloop_clearance.png
(clearance over time, one line per crossing). Exit status 0, or 2 for bad options.
"""

import json
import sys
import time
from dataclasses import fields
from pathlib import Path

import numpy as np
import yaml

from riskbound.planning.settings import PlannerSettings

DEFAULT_PARAMS = "config/drone_closed_loop.yaml"
DEFAULT_SCENARIO = "config/crowd_courtyard_40.yaml"
FRAME_RATE_HZ = 10.0   # the crowd recording rate and the control rate of the loop
ROBOT_SUBSTEPS = 5     # simulated-robot steps per control period (50 Hz, as the sim_robot node)
TRACKING_LEAD_S = 1.0  # tracking before the robot leaves, so that the walkers around it are confirmed
GOAL_TOLERANCE_M = 0.3
EXIT_USAGE = 2


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


def _overrides(items, option):
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


def crossing(planner, tracker_settings, max_accel, scenario, frames, detections, start_s, mpc):
    """One crossing from start_s into the recording. Returns a dict of figures and the clearance series."""
    from riskbound.motion.forecast import ObstacleForecast
    from riskbound.motion.simulated_robot import SimRobotSettings, SimulatedRobot
    from riskbound.tracking.tracker import MultiTargetTracker

    start, goal = np.asarray(scenario.robot_start, float), np.asarray(scenario.robot_goal, float)
    robot = SimulatedRobot(SimRobotSettings(robot_model=planner.robot_model, initial_x=float(start[0]),
                                            initial_y=float(start[1]), max_accel_mps2=max_accel))
    tracker = MultiTargetTracker(tracker_settings)
    mpc.reset()
    grid = planner.step_s * np.arange(1, planner.horizon_steps + 1)
    period = 1.0 / FRAME_RATE_HZ
    # Odometry covariance: 0.02 m position and 0.02 m/s velocity std, the sim_robot node's pose_std_m
    # and twist_std_mps in config/drone_closed_loop.yaml.
    P0 = np.diag([0.02**2, 0.02**2, 0.02**2, 0.02**2])
    first = int(round((start_s - TRACKING_LEAD_S) * FRAME_RATE_HZ))
    leave = int(round(start_s * FRAME_RATE_HZ))
    if first < 0 or leave >= len(frames):
        raise ValueError(f"--start-s {start_s}: must be in [{TRACKING_LEAD_S}, {(len(frames) - 1) / FRAME_RATE_HZ}] "
                         f"s (one second of tracking comes first)")
    times, clearance, solve_ms, statuses = [], [], [], {}
    reached_s = None
    for k in range(first, len(frames)):
        frame = frames[k]
        positions, headings = detections[k]
        tracker.process(frame.time_s, positions, headings)
        if k < leave:
            continue
        x0 = robot.state.copy()
        gaps = np.linalg.norm(frame.positions - x0[0:2], axis=1) - planner.robot_radius_m - scenario.walker_radius_m
        times.append(frame.time_s - frames[leave].time_s)
        clearance.append(float(gaps.min()) if len(gaps) else float("inf"))
        if np.linalg.norm(goal - x0[0:2]) <= GOAL_TOLERANCE_M:
            reached_s = times[-1]
            break
        forecast = tracker.forecast().resampled(grid)
        forecast = ObstacleForecast(forecast.track_ids, grid, forecast.positions, forecast.headings,
                                    forecast.covariances, forecast.half_extents)
        result = mpc.solve(x0, P0, goal, forecast, elapsed_s=period)
        solve_ms.append(result.solve_ms)
        statuses[result.status] = statuses.get(result.status, 0) + 1
        command = mpc.model.command(result.states, result.inputs, robot.yaw) if result.success else None
        for _ in range(ROBOT_SUBSTEPS):
            robot.step(command, period / ROBOT_SUBSTEPS)
    clearance_arr = np.asarray(clearance)
    figures = {
        "start_s": start_s, "reached_goal": reached_s is not None, "time_to_goal_s": reached_s,
        "contact_frames": int(np.sum(clearance_arr < 0.0)), "min_clearance_m": float(clearance_arr.min()),
        "cycles": len(solve_ms), "statuses": statuses,
        "solve_ms_median": float(np.median(solve_ms)) if solve_ms else None,
        "solve_ms_p95": float(np.percentile(solve_ms, 95)) if solve_ms else None,
    }
    return figures, np.asarray(times), clearance_arr


def _plot(series, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figure, axes = plt.subplots(figsize=(9, 4.5))
    for label, times, clearance in series:
        axes.plot(times, clearance, linewidth=1.0, label=label)
    axes.axhline(0.0, color="black", linewidth=1.0)
    axes.set_xlabel("time since the robot left [s]")
    axes.set_ylabel("clearance to the nearest walker [m]\n(disc to disc; below 0: contact)")
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
                                                    _overrides(args.set, "--set"),
                                                    _overrides(args.tracker_set, "--tracker-set"))
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
                figures, times, clearance = crossing(planner, tracker, max_accel, scenario, frames, detections,
                                                     start_s, mpc)
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
        failed = sum(n for status, n in row["statuses"].items()
                     if status not in ("solved", "feasible_not_converged", "least_violation"))
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
