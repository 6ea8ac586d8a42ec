"""Rolling solve-time statistics over a window of the most recent solves.

Percentiles use linear interpolation between order statistics, definition 7 of "Sample Quantiles
in Statistical Packages", The American Statistician 50(4), 1996 (numpy.percentile's default
method "linear"): for n sorted values x₀ ≤ … ≤ x_{n−1} and a fraction q, h = (n − 1) q and
Q(q) = x_⌊h⌋ + (h − ⌊h⌋)(x_⌊h⌋+1 − x_⌊h⌋).

The window is kept twice: in arrival order (to drop the oldest) and sorted (bisect insertion), so a
percentile costs O(1) and a new sample O(window) memory moves, cheap at a few hundred samples.
"""

import bisect
import math
from collections import deque
from dataclasses import dataclass


@dataclass(frozen=True)
class SolveTimeSummary:
    """Statistics of the solves in the window (times in ms; NaN when the window is empty)."""

    samples: int
    median_ms: float
    p95_ms: float
    p99_ms: float
    max_ms: float
    deadline_ms: float
    deadline_misses: int
    deadline_misses_total: int
    samples_total: int


class SolveTimeStatistics:
    """Median, 95th and 99th percentile, maximum and deadline misses of the last `window` solve times."""

    def __init__(self, window, deadline_ms):
        if not isinstance(window, int) or isinstance(window, bool) or window < 1:
            raise ValueError(f"window={window!r} must be an integer ≥ 1")
        self.window = window
        self.deadline_ms = self._checked_deadline(deadline_ms)
        self._arrival = deque()
        self._sorted = []
        self._misses = 0
        self.samples_total = 0
        self.deadline_misses_total = 0

    @staticmethod
    def _checked_deadline(deadline_ms):
        if not (isinstance(deadline_ms, (int, float)) and math.isfinite(deadline_ms) and deadline_ms > 0.0):
            raise ValueError(f"deadline_ms={deadline_ms!r} must be a finite number > 0")
        return float(deadline_ms)

    def set_deadline(self, deadline_ms):
        """New deadline; misses in the window are recounted against it (the totals keep their history)."""
        self.deadline_ms = self._checked_deadline(deadline_ms)
        self._misses = len(self._sorted) - bisect.bisect_right(self._sorted, self.deadline_ms)

    def add(self, solve_ms):
        """Add one solve time [ms]; returns True when it missed the deadline. NaN/negative raise ValueError."""
        if not (isinstance(solve_ms, (int, float)) and math.isfinite(solve_ms) and solve_ms >= 0.0):
            raise ValueError(f"solve_ms={solve_ms!r} must be a finite number ≥ 0")
        solve_ms = float(solve_ms)
        if len(self._arrival) == self.window:
            oldest = self._arrival.popleft()
            del self._sorted[bisect.bisect_left(self._sorted, oldest)]
            if oldest > self.deadline_ms:
                self._misses -= 1
        self._arrival.append(solve_ms)
        bisect.insort(self._sorted, solve_ms)
        missed = solve_ms > self.deadline_ms
        self._misses += missed
        self.samples_total += 1
        self.deadline_misses_total += missed
        return missed

    def __len__(self):
        return len(self._sorted)

    def percentile(self, percent):
        """Percentile of the window, `percent` in [0, 100]; NaN when the window is empty."""
        if not 0.0 <= percent <= 100.0:
            raise ValueError(f"percent={percent!r} must be in [0, 100]")
        n = len(self._sorted)
        if n == 0:
            return float("nan")
        h = (n - 1) * percent / 100.0
        low = math.floor(h)
        high = min(low + 1, n - 1)
        return self._sorted[low] + (h - low) * (self._sorted[high] - self._sorted[low])

    @property
    def deadline_misses(self):
        """Solves in the window that took longer than the deadline."""
        return self._misses

    def summary(self):
        return SolveTimeSummary(
            samples=len(self._sorted),
            median_ms=self.percentile(50.0),
            p95_ms=self.percentile(95.0),
            p99_ms=self.percentile(99.0),
            max_ms=self._sorted[-1] if self._sorted else float("nan"),
            deadline_ms=self.deadline_ms,
            deadline_misses=self._misses,
            deadline_misses_total=self.deadline_misses_total,
            samples_total=self.samples_total,
        )
