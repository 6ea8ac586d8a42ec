"""Who moved into whom, and when the robot stood: the geometry of a run's contacts and stops (no ROS).

A walker contact is one interval of consecutive truth frames in which the clearance
(riskbound.clearance.disc_box_clearance: the robot's disc against that walker's box) is below zero.
It is classified at its onset, the first frame of the interval, with u the unit vector from the
robot's centre to the walker's:

- robot_toward_walker_mps = v_robot · u: how fast the robot closes in on the walker;
- walker_toward_robot_mps = −v_walker · u: how fast the walker closes in on the robot;
- "robot_into_walker" when robot_toward_walker_mps > ROBOT_INTO_WALKER_MPS, else
  "walker_into_robot" (the robot stood, moved away or slid past and the walker closed the gap).

v_robot is the robot's true velocity (the simulated robot's odometry twist, turned into the world
frame, interpolated to the frame's time); v_walker is the walker's ground-truth velocity, a
central difference of its neighbouring truth frames (one-sided at the ends of its track; NaN for a
walker seen once, which leaves the classification to the robot's velocity alone).

A stop is an interval in which the robot's linear speed is below STANDING_SPEED_MPS while the goal
is open (before the first arrival, or to the end of the run when it never arrives). Turning on the
spot counts as standing: the robot makes no way. The robot at rest from the first odometry until
it first moves is the start wait (the nodes starting and the tracker confirming walkers), reported
apart and not a stop.
"""

from dataclasses import dataclass

import numpy as np

from riskbound.clearance import disc_box_clearance

# The robot closes in faster than this on a walker at contact onset: it moved into the walker.
# Our own choice, no source: above the simulated odometry's velocity noise (0.02 m/s sd) and the
# creep of a robot braking to a stop, below any deliberate approach.
ROBOT_INTO_WALKER_MPS = 0.1
# The robot stands below this linear speed: our own choice, no source (as the offline crowd loop's
# STANDING_SPEED_MPS in riskbound.bench.crowd_loop).
STANDING_SPEED_MPS = 0.05
ROBOT_INTO_WALKER, WALKER_INTO_ROBOT = "robot_into_walker", "walker_into_robot"


@dataclass(frozen=True)
class WalkerContact:
    """One contact with one walker; times in seconds after the run's first odometry."""

    walker_id: int
    onset_s: float
    end_s: float                     # the last truth frame in contact
    frames: int
    min_clearance_m: float           # smallest clearance over the interval's frames
    robot_speed_mps: float           # at onset
    walker_speed_mps: float          # at onset; NaN for a walker seen in one frame only
    robot_toward_walker_mps: float   # v_robot · u at onset
    walker_toward_robot_mps: float   # −v_walker · u at onset; NaN as walker_speed_mps
    who: str                         # ROBOT_INTO_WALKER or WALKER_INTO_ROBOT


def runs_of(flags):
    """(start, stop) index pairs of the runs of True in a boolean sequence (stop exclusive)."""
    flags = np.asarray(flags, dtype=bool).reshape(-1)
    edges = np.diff(np.r_[0, flags.astype(np.int8), 0])
    return list(zip(np.flatnonzero(edges == 1).tolist(), np.flatnonzero(edges == -1).tolist()))


def frame_clearances(robot_xy_at_frames, robot_radius_m, positions, headings, half_extents):
    """Per truth frame, the clearance (n_k,) of the robot's disc to each walker's box."""
    extents = np.asarray(half_extents, dtype=float)
    return [disc_box_clearance(robot, robot_radius_m, walkers, np.nan_to_num(walker_headings), extents)
            if len(walkers) else np.zeros(0)
            for robot, walkers, walker_headings in zip(robot_xy_at_frames, positions, headings)]


def walker_velocities(times_s, ids, positions):
    """Per truth frame, each walker's velocity (n_k, 2) [m/s] from its own track (module docstring)."""
    tracks = {}
    for k, (frame_ids, frame_positions) in enumerate(zip(ids, positions)):
        for j, walker_id in enumerate(np.asarray(frame_ids).tolist()):
            tracks.setdefault(walker_id, []).append((k, j, times_s[k], frame_positions[j]))
    velocities = [np.full((len(frame_ids), 2), np.nan) for frame_ids in ids]
    for samples in tracks.values():
        if len(samples) < 2:
            continue
        t = np.array([s[2] for s in samples], dtype=float)
        xy = np.array([s[3] for s in samples], dtype=float)
        if np.any(np.diff(t) <= 0.0):
            continue
        velocity = np.column_stack([np.gradient(xy[:, 0], t), np.gradient(xy[:, 1], t)])
        for (k, j, _, _), v in zip(samples, velocity):
            velocities[k][j] = v
    return velocities


def walker_contacts(times_s, ids, positions, clearances, robot_xy_at_frames, robot_velocity_at_frames,
                    toward_threshold_mps=ROBOT_INTO_WALKER_MPS):
    """Every walker contact of a run, classified at its onset (module docstring), in onset order.

    times_s (K,) truth frame times; ids, positions, clearances: per frame (n_k,), (n_k, 2), (n_k,)
    (frame_clearances); robot_xy_at_frames and robot_velocity_at_frames (K, 2) at the frames."""
    if not toward_threshold_mps >= 0.0:
        raise ValueError(f"toward_threshold_mps={toward_threshold_mps!r}: must be >= 0 [m/s]")
    times_s = np.asarray(times_s, dtype=float)
    frames_of = {}
    for k, (frame_ids, frame_clearance) in enumerate(zip(ids, clearances)):
        for j, walker_id in enumerate(np.asarray(frame_ids).tolist()):
            frames_of.setdefault(walker_id, []).append((k, j, bool(frame_clearance[j] < 0.0)))
    velocities = walker_velocities(times_s, ids, positions)
    contacts = []
    for walker_id, seen in frames_of.items():
        # Consecutive frames of this walker: a frame it is missing from ends the interval.
        cuts = [0] + [i for i in range(1, len(seen)) if seen[i][0] != seen[i - 1][0] + 1] + [len(seen)]
        for segment in (seen[a:b] for a, b in zip(cuts[:-1], cuts[1:])):
            for start, stop in runs_of([in_contact for _, _, in_contact in segment]):
                contacts.append(_contact(walker_id, segment[start:stop], times_s, positions, clearances,
                                         robot_xy_at_frames, robot_velocity_at_frames, velocities,
                                         toward_threshold_mps))
    return sorted(contacts, key=lambda c: (c.onset_s, c.walker_id))


def _contact(walker_id, seen, times_s, positions, clearances, robot_xy, robot_velocity, velocities, threshold):
    k, j, _ = seen[0]
    offset = np.asarray(positions[k][j], dtype=float) - np.asarray(robot_xy[k], dtype=float)
    v_robot = np.asarray(robot_velocity[k], dtype=float)
    v_walker = velocities[k][j]
    distance = float(np.hypot(*offset))
    # Centres on top of each other (never at an onset in practice): judge by the robot's own speed.
    u = offset / distance if distance > 1e-9 else (v_robot / max(float(np.hypot(*v_robot)), 1e-12))
    robot_toward = float(v_robot @ u)
    return WalkerContact(
        walker_id=int(walker_id), onset_s=float(times_s[k]), end_s=float(times_s[seen[-1][0]]), frames=len(seen),
        min_clearance_m=float(min(clearances[kk][jj] for kk, jj, _ in seen)),
        robot_speed_mps=float(np.hypot(*v_robot)), walker_speed_mps=float(np.hypot(*v_walker)),
        robot_toward_walker_mps=robot_toward, walker_toward_robot_mps=float(-(v_walker @ u)),
        who=ROBOT_INTO_WALKER if robot_toward > threshold else WALKER_INTO_ROBOT)


@dataclass(frozen=True)
class Stops:
    """The robot standing while the goal is open (module docstring)."""

    longest_stop_s: float
    longest_stop_onset_s: float   # NaN without a stop; seconds after the first odometry
    stops: int
    start_wait_s: float


def stops(times_s, speeds_mps, goal_reached_s=None, standing_speed_mps=STANDING_SPEED_MPS):
    """Stops of a run from its speed samples (sample and hold: each sample lasts until the next).

    times_s (N,) increasing, speeds_mps (N,) linear speeds; goal_reached_s: time of the first arrival,
    which closes the goal (None or NaN: the goal stays open to the last sample)."""
    t = np.asarray(times_s, dtype=float).reshape(-1)
    speed = np.asarray(speeds_mps, dtype=float).reshape(-1)
    if len(t) != len(speed):
        raise ValueError(f"times_s has {len(t)} entries for {len(speed)} speeds_mps")
    if not standing_speed_mps > 0.0:
        raise ValueError(f"standing_speed_mps={standing_speed_mps!r}: must be > 0 [m/s]")
    open_until_s = t[-1] if len(t) else 0.0
    if goal_reached_s is not None and np.isfinite(goal_reached_s):
        keep = t < goal_reached_s
        t, speed, open_until_s = t[keep], speed[keep], float(goal_reached_s)
    if len(t) == 0:
        return Stops(0.0, float("nan"), 0, 0.0)
    end = np.r_[t[1:], open_until_s]
    intervals = runs_of(speed < standing_speed_mps)
    start_wait_s = 0.0
    if intervals and intervals[0][0] == 0:
        first, stop = intervals.pop(0)
        start_wait_s = float(end[stop - 1] - t[first])
    durations = [float(end[stop - 1] - t[start]) for start, stop in intervals]
    if not durations:
        return Stops(0.0, float("nan"), 0, start_wait_s)
    longest = int(np.argmax(durations))
    return Stops(durations[longest], float(t[intervals[longest][0]]), len(durations), start_wait_s)
