"""A synthetic people detector: turns true walker poses into what a detector would report.

Each true walker is missed with probability `miss_prob`; a detected one is reported at its true
position plus zero-mean Gaussian noise (standard deviation `noise_m` per axis) and its heading plus
Gaussian noise (`heading_noise_rad`). Clutter (false detections) arrives as a Poisson number with
mean `clutter_rate` per frame, uniform over the scene's bounds with a uniform heading. The output
order is shuffled, as a detector's order says nothing about identity.
"""

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class DetectorModel:
    noise_m: float = 0.05
    miss_prob: float = 0.05
    clutter_rate: float = 0.2
    heading_noise_rad: float = 0.1

    def __post_init__(self):
        checks = (
            ("noise_m", self.noise_m, 0.0, 5.0),
            ("miss_prob", self.miss_prob, 0.0, 0.99),
            ("clutter_rate", self.clutter_rate, 0.0, 100.0),
            ("heading_noise_rad", self.heading_noise_rad, 0.0, 3.2),
        )
        for name, value, low, high in checks:
            if not (isinstance(value, (int, float)) and np.isfinite(value) and low <= value <= high):
                raise ValueError(f"{name}={value!r}: out of range, allowed values are [{low}, {high}]")

    def detect(self, positions, headings, bounds, rng):
        """One frame: true positions (n, 2) and headings (n,) → reported positions (m, 2), headings
        (m,), and the counts (missed, clutter). bounds = (x_min, x_max, y_min, y_max) for clutter."""
        positions = np.asarray(positions, dtype=float).reshape(-1, 2)
        headings = np.asarray(headings, dtype=float).reshape(-1)
        kept = rng.uniform(size=len(positions)) >= self.miss_prob
        found = positions[kept] + rng.normal(0.0, self.noise_m, (int(kept.sum()), 2))
        found_headings = headings[kept] + rng.normal(0.0, self.heading_noise_rad, int(kept.sum()))
        clutter_count = int(rng.poisson(self.clutter_rate))
        x_min, x_max, y_min, y_max = bounds
        clutter = np.column_stack([rng.uniform(x_min, x_max, clutter_count), rng.uniform(y_min, y_max, clutter_count)])
        clutter_headings = rng.uniform(-np.pi, np.pi, clutter_count)
        reported = np.vstack([found, clutter.reshape(-1, 2)])
        reported_headings = np.angle(np.exp(1j * np.concatenate([found_headings, clutter_headings])))
        order = rng.permutation(len(reported))
        return reported[order], reported_headings[order], int((~kept).sum()), clutter_count
