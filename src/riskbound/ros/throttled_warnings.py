"""Warnings throttled per kind of problem.

The logger's own `throttle_duration_sec` throttles per call site, so one recurring problem could
hide a different one reported from the same place; here each kind has its own clock.
"""

import time

WARN_THROTTLE_S = 2.0


class ThrottledWarnings:
    """`warn(kind, message)` logs at most once per `period_s` for each `kind`."""

    def __init__(self, logger, period_s=WARN_THROTTLE_S):
        self._logger = logger
        self._period_s = period_s
        self._last_warned = {}

    def warn(self, kind, message):
        now = time.monotonic()
        if now - self._last_warned.get(kind, -float("inf")) >= self._period_s:
            self._last_warned[kind] = now
            self._logger.warning(message)
