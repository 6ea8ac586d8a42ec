"""Run a crowd scenario: walkers arrive, follow their branching routes under the social force
model and leave at exits. The result is a time series of true poses and ids.

Deterministic for a seed: every random draw comes from one generator in a fixed order.

Groups (friends, families) share their route choices, their desired speed and their next target
point, and a spring pulls a member back towards the group's centre when it strays further than
`GROUP_SPREAD_M`. The attraction terms of the 1995 model are not used; this spring and its
constants are our own choice, no source.

Walkers who react to a robot: `CrowdSimulation` runs the same simulation one frame at a time, and
each frame interval can be given where the robot is (`RobotPresence` of riskbound.crowd.social_force,
held for the interval's integration steps). With strength 0, or with no robot, every frame is the
one `simulate` gives for the same seed, bit for bit.
"""

from dataclasses import dataclass, field

import numpy as np

from riskbound.crowd.social_force import Geometry, SocialForceParameters, boundary_clearance, crossed_walls, step

GROUP_SPREAD_M = 0.8         # a member this far from its group's centre feels the spring
GROUP_STIFFNESS_PER_S2 = 1.0  # spring constant per metre beyond the spread [1/s²]
SPAWN_CLEARANCE_M = 0.1      # free gap around a new walker's disc
SPAWN_ATTEMPTS = 30          # tries to place an arriving walker before turning it away
HEADING_SPEED_M_S = 0.05     # below this speed a walker keeps its last heading


@dataclass
class CrowdFrame:
    """Walkers present at one instant, all arrays in the same order."""

    time_s: float
    ids: np.ndarray         # (n,) uint32, unique per walker for the whole run
    positions: np.ndarray   # (n, 2) [m]
    headings: np.ndarray    # (n,) [rad], direction of walking
    velocities: np.ndarray  # (n, 2) [m/s]


@dataclass
class CrowdRun:
    """A simulated crowd at the recording rate, plus counts for the summary."""

    scenario_name: str
    walker_radius_m: float
    frames: list
    spawned: int = 0
    exited: int = 0
    turned_away: int = 0
    max_present: int = 0
    contacts: int = 0  # disc–disc or disc–boundary contacts the hard-contact step resolved
    min_gap_m: float = float("inf")           # smallest gap between two walkers' discs
    min_boundary_gap_m: float = float("inf")  # smallest gap between a disc and a wall or obstacle
    group_sizes: dict = field(default_factory=dict)


class _Crowd:
    """Mutable walker state of one run (arrays grow and shrink as walkers come and go)."""

    def __init__(self, scenario, rng, params):
        self.scenario = scenario
        self.rng = rng
        self.params = params
        self.geometry = Geometry.build(scenario.walls, scenario.obstacle_centres, scenario.obstacle_radii)
        self.ids = np.zeros(0, dtype=np.uint32)
        self.positions = np.zeros((0, 2))
        self.velocities = np.zeros((0, 2))
        self.desired_speeds = np.zeros(0)
        self.headings = np.zeros(0)
        self.groups = np.zeros(0, dtype=np.int64)
        self.routes = []      # route name per walker
        self.goals = []       # waypoint name each walker heads for
        self.targets = np.zeros((0, 2))
        self.next_id = 1
        self.next_group = 0
        self.group_choices = {}  # (group, leg) → (next waypoint or None, target point)
        self.legs = np.zeros(0, dtype=np.int64)  # legs each walker has completed
        self.run = CrowdRun(scenario.name, scenario.walker_radius_m, [])

    @property
    def radii(self):
        return np.full(len(self.ids), self.scenario.walker_radius_m)

    def choose(self, group, route, waypoint, leg, arriving=True):
        """The group's next waypoint after `waypoint`, reached at the end of leg number `leg`,
        and the point it aims for there (shared by members: they pass the same waypoints in the
        same order); (None, None) when a walker arriving there leaves the scene."""
        key = (group, leg)
        if key not in self.group_choices:
            route = self.scenario.routes[route]
            table = route.links.get(waypoint)
            if arriving and route.is_exit(waypoint):
                self.group_choices[key] = (None, None)
            else:
                names = list(table)
                goal = names[self.rng.choice(len(names), p=np.array([table[n] for n in names]))]
                self.group_choices[key] = (goal, self._point_in_waypoint(goal))
        return self.group_choices[key]

    def _point_in_waypoint(self, name):
        waypoint = self.scenario.waypoints[name]
        # Uniform over the disc, kept off its rim so walkers are inside when they aim at it.
        radius = 0.6 * waypoint.radius_m * np.sqrt(self.rng.uniform())
        angle = self.rng.uniform(0.0, 2.0 * np.pi)
        return waypoint.centre + radius * np.array([np.cos(angle), np.sin(angle)])

    def _is_free(self, point, placed, anchor):
        """Room for a new walker at `point`, on the same side of every wall as `anchor`."""
        radius = self.scenario.walker_radius_m
        if len(crossed_walls(anchor, point, self.geometry.walls)):
            return False
        others = np.vstack([self.positions] + placed) if placed else self.positions
        if len(others) and np.min(np.linalg.norm(others - point, axis=1)) < 2 * radius + SPAWN_CLEARANCE_M:
            return False
        return boundary_clearance(point[None, :], np.array([radius]), self.geometry)[0] >= SPAWN_CLEARANCE_M

    def _draw_group_size(self, table):
        sizes = list(table)
        return int(sizes[self.rng.choice(len(sizes), p=np.array([table[s] for s in sizes]))])

    def add_group(self, route, start_waypoint, group_sizes, sample_point, anchor=None, max_size=None):
        """Place one group whose members appear at points drawn by `sample_point(first member or
        None)`, each in sight of `anchor` (the first member when None) with no wall between;
        members that find no free spot are turned away. Returns how many were placed."""
        size = self._draw_group_size(group_sizes)
        if max_size is not None:
            size = min(size, max_size)
        room = self.scenario.max_walkers - len(self.ids)
        if room < size:
            self.run.turned_away += size
            return 0
        group = self.next_group
        self.next_group += 1
        goal, target = self.choose(group, route, start_waypoint, 0, arriving=False)
        speed = float(self.scenario.desired_speed.sample(self.rng, 1)[0])
        placed = []
        for member in range(size):
            for _ in range(SPAWN_ATTEMPTS):
                candidate = sample_point(placed[0] if placed else None)
                seen_from = anchor if anchor is not None else (placed[0] if placed else candidate)
                if self._is_free(candidate, [p[None, :] for p in placed], seen_from):
                    placed.append(candidate)
                    break
        self.run.turned_away += size - len(placed)
        if not placed:
            return 0
        points = np.array(placed)
        direction = target - points
        direction /= np.maximum(np.linalg.norm(direction, axis=1), 1e-9)[:, None]
        count = len(points)
        self.ids = np.concatenate([self.ids, np.arange(self.next_id, self.next_id + count, dtype=np.uint32)])
        self.next_id += count
        self.positions = np.vstack([self.positions, points])
        self.velocities = np.vstack([self.velocities, speed * direction])
        self.desired_speeds = np.concatenate([self.desired_speeds, np.full(count, speed)])
        self.headings = np.concatenate([self.headings, np.arctan2(direction[:, 1], direction[:, 0])])
        self.groups = np.concatenate([self.groups, np.full(count, group)])
        self.legs = np.concatenate([self.legs, np.zeros(count, dtype=np.int64)])
        self.routes += [route] * count
        self.goals += [goal] * count
        self.targets = np.vstack([self.targets, np.repeat(target[None, :], count, axis=0)])
        self.run.spawned += count
        self.run.group_sizes[count] = self.run.group_sizes.get(count, 0) + 1
        return count

    def spawn_at_source(self, source):
        waypoint = self.scenario.waypoints[source.waypoint]

        def sample_point(first):
            centre = waypoint.centre if first is None else first
            spread = waypoint.radius_m if first is None else 1.0
            radius = spread * np.sqrt(self.rng.uniform())
            angle = self.rng.uniform(0.0, 2.0 * np.pi)
            return centre + radius * np.array([np.cos(angle), np.sin(angle)])

        self.add_group(source.route, source.waypoint, source.group_sizes, sample_point, anchor=waypoint.centre)

    def spawn_initial(self, crowd, label):
        x_min, x_max, y_min, y_max = crowd.region
        starts = sorted(self.scenario.routes[crowd.route].links)
        placed_total = failures = 0
        while placed_total < crowd.count:
            start = starts[self.rng.choice(len(starts))]

            def sample_point(first):
                if first is None:
                    return np.array([self.rng.uniform(x_min, x_max), self.rng.uniform(y_min, y_max)])
                offset = self.rng.uniform(-1.0, 1.0, 2)
                return np.clip(first + offset, [x_min, y_min], [x_max, y_max])

            placed = self.add_group(crowd.route, start, crowd.group_sizes, sample_point,
                                    max_size=crowd.count - placed_total)
            placed_total += placed
            failures = 0 if placed else failures + 1
            if failures > SPAWN_ATTEMPTS:
                raise ValueError(f"{label}.region: no room for {crowd.count} walkers of radius "
                                 f"{self.scenario.walker_radius_m} m (placed {placed_total})")

    def group_forces(self):
        forces = np.zeros_like(self.positions)
        groups, member_of = np.unique(self.groups, return_inverse=True)
        sizes = np.bincount(member_of, minlength=len(groups))
        if sizes.max(initial=0) < 2:
            return forces
        centres = np.column_stack([np.bincount(member_of, weights=self.positions[:, axis], minlength=len(groups))
                                   for axis in range(2)]) / sizes[:, None]
        offset = centres[member_of] - self.positions
        distance = np.linalg.norm(offset, axis=1)
        pull = GROUP_STIFFNESS_PER_S2 * np.maximum(distance - GROUP_SPREAD_M, 0.0)
        pull[sizes[member_of] < 2] = 0.0
        return offset / np.maximum(distance, 1e-9)[:, None] * pull[:, None]

    def advance(self, dt_s, robot=None):
        if len(self.ids) == 0:
            return
        self.positions, self.velocities, contacts = step(
            self.positions, self.velocities, self.targets, self.desired_speeds, self.radii,
            self.geometry, self.params, dt_s, extra_forces=self.group_forces(), robot=robot)
        self.run.contacts += contacts
        speed = np.linalg.norm(self.velocities, axis=1)
        moving = speed > HEADING_SPEED_M_S
        self.headings = np.where(moving, np.arctan2(self.velocities[:, 1], self.velocities[:, 0]), self.headings)
        self._update_goals()

    def _update_goals(self):
        goal_centres = np.array([self.scenario.waypoints[g].centre for g in self.goals]).reshape(-1, 2)
        goal_radii = np.array([self.scenario.waypoints[g].radius_m for g in self.goals])
        arrived = np.flatnonzero(np.linalg.norm(self.positions - goal_centres, axis=1) <= goal_radii)
        leaving = np.zeros(len(self.ids), dtype=bool)
        for i in arrived:
            self.legs[i] += 1
            next_goal, target = self.choose(int(self.groups[i]), self.routes[i], self.goals[i], int(self.legs[i]))
            if next_goal is None:
                leaving[i] = True
            else:
                self.goals[i] = next_goal
                self.targets[i] = target
        if leaving.any():
            self.run.exited += int(leaving.sum())
            self._remove(leaving)

    def _remove(self, mask):
        keep = ~mask
        self.ids = self.ids[keep]
        self.positions = self.positions[keep]
        self.velocities = self.velocities[keep]
        self.desired_speeds = self.desired_speeds[keep]
        self.headings = self.headings[keep]
        self.groups = self.groups[keep]
        self.legs = self.legs[keep]
        self.targets = self.targets[keep]
        self.routes = [r for r, k in zip(self.routes, keep) if k]
        self.goals = [g for g, k in zip(self.goals, keep) if k]

    def record(self, time_s):
        self.run.frames.append(CrowdFrame(time_s, self.ids.copy(), self.positions.copy(),
                                          self.headings.copy(), self.velocities.copy()))
        self.run.max_present = max(self.run.max_present, len(self.ids))
        if len(self.ids) >= 2:
            distance = np.linalg.norm(self.positions[:, None] - self.positions[None], axis=2)
            np.fill_diagonal(distance, np.inf)
            self.run.min_gap_m = min(self.run.min_gap_m, float(distance.min()) - 2 * self.scenario.walker_radius_m)
        if len(self.ids):
            clearance = boundary_clearance(self.positions, self.radii, self.geometry)
            self.run.min_boundary_gap_m = min(self.run.min_boundary_gap_m, float(clearance.min()))


class CrowdSimulation:
    """A scenario's crowd advanced one recorded frame at a time (see the module docstring).

        simulation = CrowdSimulation(scenario, seed, duration_s, rate_hz)
        frame = simulation.first_frame()          # runs the warm-up
        while not simulation.finished:
            frame = simulation.next_frame(robot)  # robot: RobotPresence or None

    seed: an int, a numpy SeedSequence or Generator; the same seed gives the same run.
    Time zero is the start of the warm-up; frames cover [warmup_s, warmup_s + duration_s].
    `progress(fraction)` is called now and then with the share of simulated time done.
    """

    def __init__(self, scenario, seed, duration_s=None, rate_hz=10.0, params=None, progress=None):
        duration_s = scenario.duration_s if duration_s is None else float(duration_s)
        if not np.isfinite(duration_s) or duration_s <= 0.0:
            raise ValueError(f"duration_s={duration_s!r}: must be > 0")
        dt = scenario.sim_step_s
        steps_per_frame = 1.0 / (rate_hz * dt) if rate_hz > 0 else 0.0
        if rate_hz <= 0 or abs(steps_per_frame - round(steps_per_frame)) > 1e-6 or round(steps_per_frame) < 1:
            raise ValueError(f"rate_hz={rate_hz!r}: must be 1 / (a whole multiple of sim_step_s = {dt} s), "
                             f"e.g. {1.0 / dt:g}, {1.0 / (2 * dt):g} or {1.0 / (4 * dt):g}")
        self.scenario = scenario
        self.dt_s = dt
        self.steps_per_frame = int(round(steps_per_frame))
        self.progress = progress
        self.rng = np.random.default_rng(seed)
        self.crowd = _Crowd(scenario, self.rng, SocialForceParameters() if params is None else params)
        self.warmup_steps = int(round(scenario.warmup_s / dt))
        self.total_steps = self.warmup_steps + int(round(duration_s * rate_hz)) * self.steps_per_frame
        self.k = None  # integration steps done; None before the warm-up
        self.next_arrival = []

    @property
    def run(self):
        """The CrowdRun recorded so far."""
        return self.crowd.run

    @property
    def finished(self):
        return self.k is not None and self.k >= self.total_steps

    def _arrivals(self):
        time_s = self.k * self.dt_s
        for j, source in enumerate(self.scenario.sources):
            # Poisson arrivals: exponential gaps between groups.
            while self.next_arrival[j] <= time_s:
                self.crowd.spawn_at_source(source)
                self.next_arrival[j] += self.rng.exponential(1.0 / source.rate_per_s)

    def _report(self):
        if self.progress is not None and self.k % 100 == 0:
            self.progress(self.k / max(self.total_steps, 1))

    def first_frame(self):
        """Place the initial crowd, run the warm-up (no robot) and record the first frame."""
        if self.k is not None:
            raise RuntimeError("first_frame: the simulation has already started")
        crowd = self.crowd
        for i, initial in enumerate(self.scenario.initial):
            crowd.spawn_initial(initial, f"initial[{i}]")
        # Retries while packing the initial crowd are not arrivals that were turned away.
        crowd.run.turned_away = 0
        self.next_arrival = [self.rng.exponential(1.0 / source.rate_per_s) for source in self.scenario.sources]
        self.k = 0
        while True:
            self._arrivals()
            if self.k == self.warmup_steps:
                crowd.record(self.k * self.dt_s)
                self._report()
                return crowd.run.frames[-1]
            crowd.advance(self.dt_s)
            self._report()
            self.k += 1

    def next_frame(self, robot=None):
        """Advance one frame interval with `robot` (a RobotPresence, or None) held in place and
        record the frame; returns it."""
        if self.k is None:
            raise RuntimeError("next_frame: call first_frame first")
        if self.finished:
            raise RuntimeError(f"next_frame: the recording of {len(self.run.frames)} frames is complete")
        for _ in range(self.steps_per_frame):
            self.crowd.advance(self.dt_s, robot)
            self.k += 1
            self._arrivals()
            if self.k < self.total_steps:
                self._report()
        self.crowd.record(self.k * self.dt_s)
        if self.finished and self.progress is not None:
            self.progress(1.0)
        return self.run.frames[-1]


def simulate(scenario, seed, duration_s=None, rate_hz=10.0, params=None, progress=None):
    """Simulate `scenario` without a robot and return a CrowdRun with frames at `rate_hz`
    (arguments as CrowdSimulation)."""
    simulation = CrowdSimulation(scenario, seed, duration_s, rate_hz, params, progress)
    simulation.first_frame()
    while not simulation.finished:
        simulation.next_frame()
    return simulation.run
