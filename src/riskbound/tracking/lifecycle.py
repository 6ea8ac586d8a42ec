"""Track lifecycle: tentative → confirmed after M hits in the first N scans; deleted when stale.

Per track, the hits of the last N scans are kept as a bit mask (newest scan in bit 0). A track
starts tentative with its first detection as one hit. It is confirmed as soon as M of its scans
are hits and stays confirmed until deleted. A tentative track that has seen N scans without
reaching M hits is deleted (it cannot be confirmed by the M-of-N rule any more), and any track
without a detection for longer than the deletion time is deleted. A late scan (older than the
newest) adds hits to the newest window slot without starting a new scan.
"""

import numpy as np


class TrackLifecycle:
    """Lifecycle state of J tracks, kept as arrays aligned with the tracker's state arrays."""

    def __init__(self, confirm_hits, confirm_window, delete_after_s):
        self.history = np.zeros(0, dtype=np.int64)
        self.scans_seen = np.zeros(0, dtype=np.int64)
        self.confirmed = np.zeros(0, dtype=bool)
        self.last_hit_s = np.zeros(0)
        self.configure(confirm_hits, confirm_window, delete_after_s)

    def configure(self, confirm_hits, confirm_window, delete_after_s):
        """New M, N and deletion time; they apply to the tracks already held from the next scan."""
        if not 1 <= confirm_hits <= confirm_window <= 62:
            raise ValueError(f"confirm_hits={confirm_hits}, confirm_window={confirm_window}: "
                             "need 1 <= confirm_hits <= confirm_window <= 62")
        if not delete_after_s > 0.0:
            raise ValueError(f"delete_after_s={delete_after_s!r} must be > 0")
        self.confirm_hits = int(confirm_hits)
        self.confirm_window = int(confirm_window)
        self.delete_after_s = float(delete_after_s)
        self._window_mask = (1 << self.confirm_window) - 1
        self.history &= self._window_mask

    @property
    def count(self):
        return len(self.history)

    def hits_in_window(self):
        return np.bitwise_count(self.history).astype(np.int64)

    def add(self, count, stamp_s):
        """Start `count` tentative tracks whose first detection is at `stamp_s`."""
        self.history = np.concatenate([self.history, np.ones(count, dtype=np.int64)])
        self.scans_seen = np.concatenate([self.scans_seen, np.ones(count, dtype=np.int64)])
        self.confirmed = np.concatenate([self.confirmed, np.full(count, self.confirm_hits <= 1)])
        self.last_hit_s = np.concatenate([self.last_hit_s, np.full(count, float(stamp_s))])

    def record_scan(self, hit, stamp_s):
        """A new scan at `stamp_s`; hit (J,) marks the tracks that got a detection."""
        hit = np.asarray(hit, dtype=bool)
        self.history = ((self.history << 1) | hit) & self._window_mask
        self.scans_seen += 1
        self.confirmed |= self.hits_in_window() >= self.confirm_hits
        self.last_hit_s = np.where(hit, float(stamp_s), self.last_hit_s)

    def record_late_hits(self, hit, stamp_s):
        """Hits from a late scan at `stamp_s` (older than the newest scan)."""
        hit = np.asarray(hit, dtype=bool)
        self.history = self.history | hit
        self.confirmed |= self.hits_in_window() >= self.confirm_hits
        self.last_hit_s = np.where(hit, np.maximum(self.last_hit_s, float(stamp_s)), self.last_hit_s)

    def stale(self, now_s):
        """Tracks without a detection for longer than the deletion time at `now_s`."""
        return now_s - self.last_hit_s > self.delete_after_s

    def failed(self):
        """Tentative tracks that have seen N scans without M hits."""
        return ~self.confirmed & (self.scans_seen >= self.confirm_window)

    def keep(self, mask):
        """Drop the tracks where `mask` is False."""
        self.history = self.history[mask]
        self.scans_seen = self.scans_seen[mask]
        self.confirmed = self.confirmed[mask]
        self.last_hit_s = self.last_hit_s[mask]
