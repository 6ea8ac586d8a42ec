"""`riskbound closedloop`: the whole stack closed-loop on a replayed crowd, then a report.

    riskbound closedloop [--bag BAG] [--out DIR] [--params-file F] [--speed S] [--time-limit-s T]

Runs launch/crowd_replay.launch.xml through `riskbound launch` (real processes, one per node):
the crowd bag is replayed on its own clock, the tracker, planner and watchdog run on it, the
simulated robot crosses from the bag's robot_start to its robot_goal, and the recorder writes
every topic. The run ends when the robot has reached the goal (plus 1 s), when the bag has been
played, or at the wall-time limit. Then riskbound.logs.run_summary reads the recorded bag and the
crowd bag's ground truth and writes DIR/summary.txt, DIR/summary.json, DIR/trajectories.png and
DIR/clearance.png, and `riskbound review` writes its near-miss report of the recording into
DIR/review (report.md, figures, events.json; --no-review skips it); the recorded bag is
DIR/recorded, the node logs DIR/logs. `make demo` is this command with its defaults.

Default bag: the committed test/data/crowd_courtyard_40 when running from the source tree,
otherwise a fresh one generated from config/crowd_courtyard_40.yaml with its committed seed.
Default parameters: config/drone.yaml, the shipped multirotor file, replayed in real time
(--speed 1.0), as on a robot: every node keeps to the bag's clock on the machine's own time. The
crossing takes about 20 s of bag time, so about half a minute of wall time plus start-up.

The verdict (riskbound.logs.run_summary.RunSummary.failures) knows the robot type from the
parameter file's planner robot_model (the planner's default, double_integrator, when the file does
not set it): the run passes when the goal is reached, the robot's disc never overlaps the map's
walls and obstacles, its centre never leaves the scenario's bounds, and no walker's footprint
overlaps it, except that a unicycle (a ground robot, slower than a brisk walker) is allowed
contacts in which a replayed walker, who cannot react to it, moved into it; one in which the
robot moved toward the walker fails it (riskbound.logs.contact_geometry).

Exit codes: 0 passed (above); 1 failed: goal not reached, a walker contact the robot type is not
allowed, a static contact, time outside the bounds, or the launch failed; 2 bad arguments or
unreadable bags.
DDS discovery stays on this machine (ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST is set for the
nodes when the caller has not set it).
"""

import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import yaml

from riskbound.logs.bag_io import BagError, read_custom_data
from riskbound.logs.run_summary import plot_run, summarise_run, summary_text

COMMITTED_BAG = "test/data/crowd_courtyard_40"
SCENARIO = "config/crowd_courtyard_40.yaml"
SCENARIO_SEED = 7  # the committed bag's seed (test/data/crowd_courtyard_40/metadata.yaml)
DEFAULT_PARAMS = "config/drone.yaml"
# Real time: the planner's solves and the nodes' timers are judged as on the robot.
DEFAULT_SPEED = 1.0
LAUNCH_FILE = "crowd_replay.launch.xml"
EXIT_FAILED, EXIT_USAGE = 1, 2
# After SIGINT the runner needs its own stop timeouts (5 s + 5 s) and a margin to report.
RUNNER_STOP_TIMEOUT_S = 30.0
_STARTED = re.compile(r"^\[launch\] started '([^']+)' \(pid (\d+)\)")


@dataclass
class ClosedLoopResult:
    summary: object          # riskbound.logs.run_summary.RunSummary
    launch_exit_code: int
    wall_s: float
    out_dir: Path
    files: list

    @property
    def passed(self):
        return self.launch_exit_code == 0 and self.summary.passed


def _package_root():
    from riskbound.launching.xml_description import package_share

    return package_share("riskbound")


def read_parameter_file(params_file):
    """{node name: its ros__parameters} of a ROS 2 parameter file; ValueError when unreadable."""
    try:
        document = yaml.safe_load(Path(params_file).read_text(encoding="utf-8")) or {}
        return {node: dict((section or {}).get("ros__parameters", {}) or {}) for node, section in document.items()}
    except (OSError, yaml.YAMLError, AttributeError) as error:
        raise ValueError(f"params_file={str(params_file)!r}: unreadable ({error})") from None


def _point(text, name):
    try:
        values = yaml.safe_load(text)
        return [float(values[0]), float(values[1])]
    except (TypeError, ValueError, IndexError, KeyError, yaml.YAMLError):
        raise ValueError(f"{name}={text!r} in the bag's metadata is not an [x, y] pair") from None


def default_bag(out_dir, log):
    """The committed crowd bag, or one generated into out_dir from the committed scenario and seed."""
    root = _package_root()
    committed = root / COMMITTED_BAG
    if (committed / "metadata.yaml").is_file():
        return committed
    from riskbound.crowd.record import generate_crowd_bag

    generated = Path(out_dir) / "crowd"
    if generated.exists():
        shutil.rmtree(generated)
    log(f"generating a crowd bag from {root / SCENARIO} (seed {SCENARIO_SEED}) ...")
    generate_crowd_bag(root / SCENARIO, generated, seed=SCENARIO_SEED)
    return generated


def _remove_previous_recording(path):
    if not path.exists():
        return
    if not (path / "metadata.yaml").is_file() and any(path.iterdir()):
        raise ValueError(f"{path} exists and is not a bag directory: not overwriting it")
    shutil.rmtree(path)


def _stop_leftovers(log_path, log):
    """Kill (by pid) any node process the runner reported starting that is still alive."""
    pids = []
    for line in log_path.read_text(encoding="utf-8", errors="replace").splitlines():
        match = _STARTED.match(line)
        if match:
            pids.append((match.group(1), int(match.group(2))))
    left = []
    for name, pid in pids:
        try:
            # The pid may have been reused since: only a process still running a node of ours is killed.
            if b"riskbound.ros." not in Path(f"/proc/{pid}/cmdline").read_bytes():
                continue
            os.killpg(pid, signal.SIGKILL)
            left.append(name)
        except (OSError, ProcessLookupError):
            continue
    if left:
        log(f"killed left-over node processes: {', '.join(left)}")
    return left


def run_closed_loop(out_dir, bag=None, params_file=None, speed=DEFAULT_SPEED, time_limit_s=240.0, goal_tolerance_m=0.3,
                    log=print, review=False):
    """Run the closed loop and write its report into out_dir. Returns a ClosedLoopResult.

    bag: crowd bag (None: default_bag); params_file: ROS parameter file with planner, tracker,
    watchdog and sim_robot sections (None: DEFAULT_PARAMS); speed: replay speed factor;
    time_limit_s: wall-time limit of the run, start-up included; review: also write the review
    tool's report of the recording into out_dir/review.
    The verdict (ClosedLoopResult.passed) takes the robot type from the parameter file's planner
    robot_model (module docstring). ValueError / BagError for bad arguments or bags.
    """
    started = time.monotonic()
    out_dir = Path(out_dir).resolve()
    out_dir.mkdir(parents=True, exist_ok=True)
    bag = Path(bag).resolve() if bag is not None else default_bag(out_dir, log)
    params_file = Path(params_file).resolve() if params_file is not None else _package_root() / DEFAULT_PARAMS
    if not speed > 0.0:
        raise ValueError(f"speed={speed!r} must be > 0")
    parameters = read_parameter_file(params_file)
    planner = parameters.get("planner", {})
    robot_radius_m = float(planner.get("robot_radius_m", 0.3))
    walker_half_extents_m = _walker_footprint(parameters.get("tracker", {}))
    control_rate_hz = float(planner.get("control_rate_hz", 10.0))
    robot_model = robot_model_of(planner)
    metadata = read_custom_data(bag)
    if "robot_start" not in metadata or "robot_goal" not in metadata:
        raise BagError(f"{bag}: no robot_start/robot_goal in the bag's metadata (write it with riskbound crowd)")
    start = _point(metadata["robot_start"], "robot_start")
    goal = _point(metadata["robot_goal"], "robot_goal")
    recorded = out_dir / "recorded"
    _remove_previous_recording(recorded)
    logs = out_dir / "logs"
    if logs.exists():
        shutil.rmtree(logs)

    command = [sys.executable, "-m", "riskbound.cli", "launch", LAUNCH_FILE, f"bag:={bag}",
               f"recorded_bag:={recorded}", f"params_file:={params_file}", f"speed:={float(speed)}",
               f"start_x:={start[0]}", f"start_y:={start[1]}", f"goal_x:={goal[0]}", f"goal_y:={goal[1]}",
               "end_at_goal:=true", "--log-dir", str(logs)]
    environment = dict(os.environ)
    environment.setdefault("ROS_AUTOMATIC_DISCOVERY_RANGE", "LOCALHOST")
    environment.setdefault("ROS_DOMAIN_ID", str(random.randint(1, 101)))
    launch_log = out_dir / "launch.log"
    log(f"running {LAUNCH_FILE} on {bag.name}: robot {start} → goal {goal}, parameters {params_file.name}, "
        f"speed {speed}, ROS_DOMAIN_ID={environment['ROS_DOMAIN_ID']} (logs: {launch_log})")
    with open(launch_log, "w", encoding="utf-8") as output:
        runner = subprocess.Popen(command, stdout=output, stderr=subprocess.STDOUT, env=environment,
                                  start_new_session=True)
        try:
            code = runner.wait(timeout=max(time_limit_s - (time.monotonic() - started), 1.0))
        except subprocess.TimeoutExpired:
            log(f"time limit of {time_limit_s:.0f} s reached: stopping the run")
            os.killpg(runner.pid, signal.SIGINT)
            try:
                runner.wait(timeout=RUNNER_STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                os.killpg(runner.pid, signal.SIGKILL)
                runner.wait()
            code = runner.returncode
        except BaseException:
            os.killpg(runner.pid, signal.SIGINT)
            runner.wait(timeout=RUNNER_STOP_TIMEOUT_S)
            raise
        finally:
            _stop_leftovers(launch_log, log)
    log(f"launch ended with exit code {code} after {time.monotonic() - started:.0f} s; analysing {recorded}")

    summary, series = summarise_run(recorded, bag, goal, robot_radius_m, control_rate_hz, goal_tolerance_m,
                                    walker_half_extents_m, robot_model=robot_model)
    text = summary_text(summary)
    files = [out_dir / "summary.txt", out_dir / "summary.json"]
    files[0].write_text(text + "\n", encoding="utf-8")
    files[1].write_text(summary.to_json() + "\n", encoding="utf-8")
    files += plot_run(summary, series, out_dir)
    if review:
        files.append(_review(recorded, out_dir / "review", robot_radius_m, walker_half_extents_m, log))
    return ClosedLoopResult(summary, code, time.monotonic() - started, out_dir, files + [recorded, logs])


def robot_model_of(planner):
    """The planner section's robot_model, or the planner's default: the verdict's robot type."""
    from riskbound.planning.settings import SPECS_BY_NAME

    spec = SPECS_BY_NAME["robot_model"]
    value = planner.get("robot_model", spec.default)
    if value not in spec.choices:
        raise ValueError(f"planner robot_model={value!r} in the parameter file: must be one of {list(spec.choices)}")
    return value


def _walker_footprint(tracker):
    """(half_length, half_width) of a walker's box: the tracker's footprint from the parameter file,
    else the tracker's defaults. The summary and the review both measure clearance to this box."""
    from riskbound.tracking.settings import SPECS_BY_NAME

    return tuple(float(tracker.get(name, SPECS_BY_NAME[name].default))
                 for name in ("footprint_half_length_m", "footprint_half_width_m"))


def _review(recorded, out, robot_radius_m, walker_half_extents_m, log):
    """`riskbound review` of the recording (near-miss events against the replayed ground truth),
    with the summary's footprints, so both report the same closest approach."""
    from riskbound.cli import main  # the review's own command line, so the report is the one users get

    log(f"reviewing {recorded}")
    code = main(["review", str(recorded), "--out", str(out), "--robot-radius-m", str(robot_radius_m),
                 "--obstacle-half-extents-m", *map(str, walker_half_extents_m), "--quiet"])
    if code != 0:
        raise BagError(f"the review of {recorded} failed (exit code {code})")
    return out / "report.md"


def add_arguments(parser):
    parser.epilog = ("exit codes: 0 passed; 1 failed: goal not reached, a walker contact the robot type is not "
                     "allowed (any for a multirotor, one moving into the walker for a ground robot), a contact "
                     "with walls or obstacles, time outside the bounds, or a failed launch; 2 bad arguments or "
                     "unreadable bags")
    parser.add_argument("--bag", default=None, help="crowd bag to replay (default: the committed courtyard bag, "
                                                    "or one generated from its scenario)")
    parser.add_argument("--out", default="out/closed_loop", help="output directory (default out/closed_loop)")
    parser.add_argument("--params-file", default=None, help=f"ROS parameter file (default {DEFAULT_PARAMS})")
    parser.add_argument("--speed", type=float, default=DEFAULT_SPEED,
                        help=f"replay speed factor (default {DEFAULT_SPEED}, see the module help)")
    parser.add_argument("--time-limit-s", type=float, default=240.0,
                        help="wall-time limit of the run, start-up included (default 240)")
    parser.add_argument("--no-review", action="store_true",
                        help="skip the review tool's report of the recording (DIR/review)")


def run(args):
    try:
        result = run_closed_loop(args.out, bag=args.bag, params_file=args.params_file, speed=args.speed,
                                 time_limit_s=args.time_limit_s, review=not args.no_review)
    except (ValueError, BagError, OSError) as error:
        print(f"riskbound closedloop: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    print(summary_text(result.summary))
    if result.launch_exit_code != 0:
        print(f"the launch exited with code {result.launch_exit_code}: see {result.out_dir / 'launch.log'}")
    print(f"took {result.wall_s:.0f} s; wrote:")
    for path in result.files:
        print(f"  {path}")
    return 0 if result.passed else EXIT_FAILED
