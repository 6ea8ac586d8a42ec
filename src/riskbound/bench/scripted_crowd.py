"""A scripted crowd for the planner demo and benchmark: walkers on near-constant velocities.

Our own invented scene, a square plaza crossed by the robot. Walkers start uniformly inside the
plaza (none within `clear_start_m` of the robot's start), walk at speeds from N(1.3, 0.2²) m/s,
clipped to [0.6, 2.0] m/s (typical walking speeds, value from memory), with a small random
acceleration, and wrap around at the plaza edge. Walkers do not react to the robot (the usual
non-reactive benchmark assumption, harder than real people who step aside). Forecasts are
constant-velocity predictions with covariance σ_p² + σ_v² t² per axis, which matches how far the
random acceleration lets the true position drift over the horizon.
"""

from dataclasses import dataclass

import numpy as np

from riskbound.motion.forecast import ObstacleForecast

WALKER_HALF_EXTENTS_M = (0.25, 0.2)  # a walking adult's footprint, value from memory


@dataclass
class PlazaScenario:
    walkers: int = 12
    seed: int = 0
    half_size_m: float = 15.0
    start: tuple = (-12.0, 0.0)
    goal: tuple = (12.0, 0.0)
    clear_start_m: float = 3.0
    accel_noise_mps2: float = 0.15
    position_sigma_m: float = 0.1
    velocity_sigma_mps: float = 0.15


class ScriptedCrowd:
    """Ground-truth walkers and their forecasts, stepped at a fixed period."""

    def __init__(self, scenario):
        self.scenario = scenario
        self.rng = np.random.default_rng(scenario.seed)
        s = scenario
        positions = []
        while len(positions) < s.walkers:
            p = self.rng.uniform(-s.half_size_m, s.half_size_m, 2)
            if np.linalg.norm(p - np.asarray(s.start)) > s.clear_start_m and \
                    np.linalg.norm(p - np.asarray(s.goal)) > 1.0:
                positions.append(p)
        self.positions = np.array(positions).reshape(-1, 2)
        heading = self.rng.uniform(-np.pi, np.pi, s.walkers)
        speed = np.clip(self.rng.normal(1.3, 0.2, s.walkers), 0.6, 2.0)
        self.velocities = speed[:, None] * np.stack([np.cos(heading), np.sin(heading)], axis=-1)
        self.half_extents = np.tile(WALKER_HALF_EXTENTS_M, (s.walkers, 1))
        self.ids = np.arange(s.walkers)

    @property
    def headings(self):
        return np.arctan2(self.velocities[:, 1], self.velocities[:, 0])

    def advance(self, dt):
        """Move the walkers by one period: random acceleration, wrap at the plaza edge."""
        s = self.scenario
        accel = self.rng.normal(0.0, s.accel_noise_mps2, self.velocities.shape)
        self.positions = self.positions + self.velocities * dt + 0.5 * accel * dt**2
        self.velocities = self.velocities + accel * dt
        size = 2.0 * s.half_size_m
        self.positions = (self.positions + s.half_size_m) % size - s.half_size_m

    def forecast(self, times):
        """Constant-velocity forecast at `times` (s from now) with growing covariance."""
        s = self.scenario
        times = np.asarray(times, dtype=float)
        positions = self.positions[:, None, :] + self.velocities[:, None, :] * times[None, :, None]
        variance = s.position_sigma_m**2 + (s.velocity_sigma_mps * times) ** 2
        covariances = variance[None, :, None, None] * np.eye(2)[None, None] * np.ones((len(self.ids), 1, 1, 1))
        headings = np.repeat(self.headings[:, None], len(times), axis=1)
        return ObstacleForecast(self.ids, times, positions, headings, covariances, self.half_extents)

