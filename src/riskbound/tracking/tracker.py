"""Multi-target tracker: predict to the scan stamp, associate, update, start and delete tracks.

One call per scan (all detections sharing one stamp, in the planning frame):

1. Time. A scan newer than (or as new as) the newest one is processed in order. A scan older by
   at most `late_tolerance_s` updates the tracks it matches through a late-measurement update
   (the tracks stay at the newest time; no track starts from it). A scan older by more is
   dropped with the reason; older by more than `backward_jump_reset_s` means time went
   backwards (a bag loop, a clock reset): every track is dropped, a warning is logged, and the
   scan starts afresh.
2. Tracks without a detection for longer than `delete_after_s` are deleted; the others are
   predicted to the stamp.
3. Association: global nearest neighbour inside chi-square gates (association.py, gating.py),
   confirmed tracks first, tentative ones with the detections left over: a track that missed a
   scan is not robbed of its person by the track that miss started.
4. Update: the Kalman update (motion_model.py). A track starts in the constant-velocity filter with a
   prior on its unknown velocity; with the unicycle model it moves to the unicycle state once its
   direction of travel is known (or its heading was measured).
5. Lifecycle: M-of-N confirmation, deletion of tracks that failed it (lifecycle.py); unmatched
   detections start tentative tracks, up to `max_tracks`.

Only confirmed tracks are forecast. Rows with a NaN or Inf position are dropped and counted.
"""

import logging
from dataclasses import dataclass, field

import numpy as np

from riskbound.motion.forecast import ObstacleForecast
from riskbound.tracking.association import associate
from riskbound.tracking.filters import make_motion_model
from riskbound.tracking.forecast import TrackForecaster
from riskbound.tracking.gating import gate_threshold, gated_pairs
from riskbound.tracking.lifecycle import TrackLifecycle
from riskbound.tracking.settings import TrackerSettings

LOGGER = logging.getLogger(__name__)

@dataclass
class ScanReport:
    """What one scan did.

    status: "updated" (processed in order), "late" (older than the newest scan, within the
    tolerance), "dropped" (not used; `reason` says why) or "reset" (time went backwards; the
    tracker restarted from this scan). detection_track_ids: track id per input row, −1 where the
    row was not used.
    """

    stamp_s: float
    status: str
    reason: str = ""
    detection_track_ids: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    invalid_detections: int = 0
    started: int = 0
    deleted: int = 0
    unmatched_late: int = 0
    refused_starts: int = 0


@dataclass
class TrackSnapshot:
    """All tracks at the tracker's time (for viewers and tests)."""

    track_ids: np.ndarray
    positions: np.ndarray
    position_covariances: np.ndarray
    velocities: np.ndarray
    confirmed: np.ndarray


class MultiTargetTracker:
    """Tracks people from scans of position detections (optionally with heading).

    Track states live in two sets of arrays aligned by row: `_X`, `_P` in the motion model's
    state, `_Xs`, `_Ps` in the starting (constant-velocity) model's; `_converted` says which one
    holds a row. With the constant-velocity model every row is in `_X` from its birth.
    """

    def __init__(self, settings=None):
        self.settings = settings if settings is not None else TrackerSettings()
        self.lifecycle = TrackLifecycle(self.settings.confirm_hits, self.settings.confirm_window,
                                        self.settings.delete_after_s)
        self._build()
        # Ids keep counting across resets: a viewer or planner must never see an old id on a new person.
        self._next_id = 1
        self.reset()

    def _build(self):
        s = self.settings
        self.model = make_motion_model(s)
        self.start_model = self.model.starting_model()
        self.forecaster = TrackForecaster(self.model, s.forecast_steps, s.forecast_step_s)
        self.start_forecaster = TrackForecaster(self.start_model, s.forecast_steps, s.forecast_step_s)
        self.gate = gate_threshold(s.gate_probability, 2)
        self.lifecycle.configure(s.confirm_hits, s.confirm_window, s.delete_after_s)

    def configure(self, settings):
        """Apply new settings; a change of motion model restarts every track."""
        restart = self.settings.needs_reset(settings)
        self.settings = settings
        self._build()
        if restart:
            self.reset()

    def reset(self):
        """Drop every track and forget the time (track ids are not reused)."""
        n, ns = self.model.dim_x, self.start_model.dim_x
        self.time_s = None
        self._ids = np.zeros(0, dtype=np.int64)
        self._X, self._P = np.zeros((0, n)), np.zeros((0, n, n))
        self._Xs, self._Ps = np.zeros((0, ns)), np.zeros((0, ns, ns))
        self._converted = np.zeros(0, dtype=bool)
        self._birth_s = np.zeros(0)
        self._heading = np.zeros(0)
        self.lifecycle.keep(np.zeros(self.lifecycle.count, dtype=bool))

    @property
    def track_count(self):
        return len(self._ids)

    @property
    def confirmed_count(self):
        return int(np.count_nonzero(self.lifecycle.confirmed))

    def process(self, stamp_s, positions, headings=None):
        """Process one scan: positions (D, 2) [m], headings (D,) [rad] or NaN where unknown."""
        positions = np.asarray(positions, dtype=float)
        if positions.size == 0:
            positions = positions.reshape(0, 2)
        if positions.ndim != 2 or positions.shape[1] != 2:
            raise ValueError(f"positions has shape {positions.shape}, expected (D, 2)")
        count = len(positions)
        if headings is None or not self.settings.use_heading:
            headings = np.full(count, np.nan)
        headings = np.asarray(headings, dtype=float).reshape(-1)
        if len(headings) != count:
            raise ValueError(f"headings has {len(headings)} entries, expected {count} (one per position)")
        stamp_s = float(stamp_s)
        report = ScanReport(stamp_s=stamp_s, status="updated",
                            detection_track_ids=np.full(count, -1, dtype=np.int64))
        valid = np.all(np.isfinite(positions), axis=1)
        report.invalid_detections = int(count - np.count_nonzero(valid))
        rows = np.flatnonzero(valid)
        if not np.isfinite(stamp_s):
            report.status, report.reason = "dropped", f"scan stamp {stamp_s} is not finite"
            return report
        if self.time_s is not None:
            lag = self.time_s - stamp_s
            if lag > self.settings.backward_jump_reset_s:
                report.status = "reset"
                report.reason = (f"time went backwards by {lag:.3f} s (more than backward_jump_reset_s="
                                 f"{self.settings.backward_jump_reset_s}): all {self.track_count} tracks dropped")
                LOGGER.warning("tracker reset: %s", report.reason)
                self.reset()
            elif lag > self.settings.late_tolerance_s:
                report.status = "dropped"
                report.reason = (f"scan is {lag:.3f} s older than the newest, beyond late_tolerance_s="
                                 f"{self.settings.late_tolerance_s}")
                return report
            elif lag > 0.0:
                report.status = "late"
                self._process_late(stamp_s, lag, positions[rows], headings[rows], rows, report)
                return report
        self._process_in_order(stamp_s, positions[rows], headings[rows], rows, report)
        return report

    def _parts(self, rows=None):
        """(model, X, P, row indices) for the rows held by each model, skipping empty ones.

        `rows` restricts to those track indices; None means all tracks (then a model holding
        every row gets a slice, which avoids copies on the hot path).
        """
        converted = self._converted if rows is None else self._converted[rows]
        if np.all(converted):
            held = slice(None) if rows is None else rows
            return ((self.model, self._X, self._P, held),) if len(converted) else ()
        every = np.arange(len(self._ids)) if rows is None else rows
        parts = []
        for model, X, P, mask in ((self.model, self._X, self._P, converted),
                                  (self.start_model, self._Xs, self._Ps, ~converted)):
            if np.any(mask):
                parts.append((model, X, P, every[mask]))
        return tuple(parts)

    def _keep(self, mask):
        self._ids = self._ids[mask]
        self._X, self._P = self._X[mask], self._P[mask]
        self._Xs, self._Ps = self._Xs[mask], self._Ps[mask]
        self._converted = self._converted[mask]
        self._birth_s = self._birth_s[mask]
        self._heading = self._heading[mask]
        self.lifecycle.keep(mask)

    def _predict(self, dt):
        if dt <= 0.0:
            return
        if len(self._ids) and np.all(self._converted):
            self._X, self._P = self.model.predict(self._X, self._P, dt)
            return
        for model, X, P, rows in self._parts():
            X[rows], P[rows] = model.predict(X[rows], P[rows], dt)

    def _measurement_prediction(self, rows, lag_s=0.0):
        z_pred = np.empty((len(rows), 2))
        S = np.empty((len(rows), 2, 2))
        position = np.empty(len(self._ids), dtype=np.intp)
        position[rows] = np.arange(len(rows))
        for model, X, P, held in self._parts(rows):
            if lag_s > 0.0:
                z, s = model.late_measurement_prediction(X[held], P[held], lag_s)
            else:
                z, s = model.measurement_prediction(X[held], P[held])
            local = position[held] if not isinstance(held, slice) else slice(None)
            z_pred[local], S[local] = z, s
        return z_pred, S

    def _associate(self, z_pred, S, z, first):
        """Gated global nearest neighbour, tracks marked `first` served before the others."""
        tracks, detections, distances = gated_pairs(z_pred, S, z, self.gate)
        cost = distances + np.log(S[:, 0, 0] * S[:, 1, 1] - S[:, 0, 1] * S[:, 1, 0])[tracks]
        stage = first[tracks]
        if np.all(stage) or not np.any(stage):
            return associate(tracks, detections, cost, len(z_pred), len(z))
        t1, d1 = associate(tracks[stage], detections[stage], cost[stage], len(z_pred), len(z))
        taken = np.zeros(len(z), dtype=bool)
        taken[d1] = True
        rest = ~stage & ~taken[detections]
        t2, d2 = associate(tracks[rest], detections[rest], cost[rest], len(z_pred), len(z))
        return np.concatenate([t1, t2]), np.concatenate([d1, d2])

    def _update(self, tracks, z, h, lag_s=0.0):
        """Kalman (or late) update of `tracks` with positions z and headings h (NaN: unknown)."""
        if len(tracks) == 0:
            return
        order = np.argsort(tracks)
        tracks, z, h = tracks[order], z[order], h[order]
        index = np.empty(len(self._ids), dtype=np.intp)
        index[tracks] = np.arange(len(tracks))
        for model, X, P, held in self._parts(tracks):
            local = index[held]
            measured = np.isfinite(h[local]) if model.has_heading else np.zeros(len(local), dtype=bool)
            groups = ((held[~measured], z[local[~measured]], False),
                      (held[measured], np.column_stack([z[local[measured]], h[local[measured]]]), True))
            for idx, measurement, with_heading in groups:
                if len(idx) == 0:
                    continue
                if lag_s > 0.0:
                    X[idx], P[idx] = model.late_update(X[idx], P[idx], measurement, lag_s, with_heading)
                else:
                    X[idx], P[idx] = model.update(X[idx], P[idx], measurement, with_heading)

    def _hand_over(self, tracks, h):
        """Move starting-model tracks whose estimate the motion model can take over."""
        if self.start_model is self.model or np.all(self._converted):
            return
        heading = np.full(len(self._ids), np.nan)
        heading[tracks] = h
        idx = np.flatnonzero(~self._converted)
        ready = self.model.ready(self._Xs[idx], self._Ps[idx], heading[idx])
        idx = idx[ready]
        if len(idx):
            self._X[idx], self._P[idx] = self.model.from_position_velocity(self._Xs[idx], self._Ps[idx],
                                                                           heading[idx])
            self._converted[idx] = True

    def _hold_headings(self, tracks, h):
        """Heading kept per track: the state's when reliable; a measured one for tracks whose
        state has no heading."""
        for model, X, P, rows in self._parts():
            heading, reliable = model.heading(X[rows], P[rows])
            self._heading[rows] = np.where(reliable, heading, self._heading[rows])
        measured = np.isfinite(h)
        if not self.model.has_heading:
            keep = measured
        else:
            keep = measured & ~self._converted[tracks]
        self._heading[tracks[keep]] = h[keep]

    def _process_in_order(self, stamp_s, z, h, rows, report):
        dt = 0.0 if self.time_s is None else stamp_s - self.time_s
        stale = self.lifecycle.stale(stamp_s)
        if np.any(stale):
            report.deleted += int(np.count_nonzero(stale))
            self._keep(~stale)
        self._predict(dt)

        everyone = np.arange(len(self._ids))
        z_pred, S = self._measurement_prediction(everyone)
        tracks, detections = self._associate(z_pred, S, z, self.lifecycle.confirmed)
        self._update(tracks, z[detections], h[detections])
        self._hand_over(tracks, h[detections])
        self._hold_headings(tracks, h[detections])
        report.detection_track_ids[rows[detections]] = self._ids[tracks]

        hit = np.zeros(self.track_count, dtype=bool)
        hit[tracks] = True
        self.lifecycle.record_scan(hit, stamp_s)
        failed = self.lifecycle.failed()
        if np.any(failed):
            report.deleted += int(np.count_nonzero(failed))
            self._keep(~failed)

        unmatched = np.ones(len(z), dtype=bool)
        unmatched[detections] = False
        new = np.flatnonzero(unmatched)
        room = max(self.settings.max_tracks - self.track_count, 0)
        report.refused_starts = max(len(new) - room, 0)
        new = new[:room]
        self._start_tracks(stamp_s, z[new], h[new])
        report.started = len(new)
        report.detection_track_ids[rows[new]] = self._ids[len(self._ids) - len(new):]
        self.time_s = stamp_s

    def _start_tracks(self, stamp_s, z, h):
        count = len(z)
        if count == 0:
            return
        n, ns = self.model.dim_x, self.start_model.dim_x
        Xs, Ps = self.start_model.birth(z)
        converted = self.start_model is self.model
        X, P = (Xs, Ps) if converted else (np.zeros((count, n)), np.zeros((count, n, n)))
        self._ids = np.concatenate([self._ids, self._next_id + np.arange(count)])
        self._next_id += count
        self._X, self._P = np.concatenate([self._X, X]), np.concatenate([self._P, P])
        if converted:
            Xs, Ps = np.zeros((count, ns)), np.zeros((count, ns, ns))
        self._Xs, self._Ps = np.concatenate([self._Xs, Xs]), np.concatenate([self._Ps, Ps])
        self._converted = np.concatenate([self._converted, np.full(count, converted)])
        self._birth_s = np.concatenate([self._birth_s, np.full(count, stamp_s)])
        self._heading = np.concatenate([self._heading, h])
        self.lifecycle.add(count, stamp_s)

    def _process_late(self, stamp_s, lag_s, z, h, rows, report):
        # A track started after the scan's stamp did not exist when it was taken.
        candidates = np.flatnonzero(self._birth_s <= stamp_s)
        z_pred, S = self._measurement_prediction(candidates, lag_s)
        local, detections = self._associate(z_pred, S, z, self.lifecycle.confirmed[candidates])
        tracks = candidates[local]
        self._update(tracks, z[detections], h[detections], lag_s)
        hit = np.zeros(self.track_count, dtype=bool)
        hit[tracks] = True
        self.lifecycle.record_late_hits(hit, stamp_s)
        report.detection_track_ids[rows[detections]] = self._ids[tracks]
        report.unmatched_late = len(z) - len(detections)

    def forecast(self):
        """ObstacleForecast of the confirmed tracks, times relative to the tracker's time."""
        confirmed = self.lifecycle.confirmed
        headings = np.where(np.isfinite(self._heading), self._heading, 0.0)
        half_extent = [self.settings.footprint_half_length_m, self.settings.footprint_half_width_m]
        parts = []
        for model, X, P, rows in self._parts(np.flatnonzero(confirmed)):
            forecaster = self.forecaster if model is self.model else self.start_forecaster
            parts.append(forecaster.forecast(self._ids[rows], X[rows], P[rows], headings[rows],
                                             np.tile(half_extent, (len(self._ids[rows]), 1))))
        if not parts:
            return ObstacleForecast.empty(self.forecaster.times)
        if len(parts) == 1:
            return parts[0]
        return ObstacleForecast(
            track_ids=np.concatenate([p.track_ids for p in parts]), times=parts[0].times,
            positions=np.concatenate([p.positions for p in parts]),
            headings=np.concatenate([p.headings for p in parts]),
            covariances=np.concatenate([p.covariances for p in parts]),
            half_extents=np.concatenate([p.half_extents for p in parts]))

    def snapshot(self):
        """Every track (tentative ones too) at the tracker's time."""
        J = len(self._ids)
        positions, covariances, velocities = np.zeros((J, 2)), np.zeros((J, 2, 2)), np.zeros((J, 2))
        for model, X, P, rows in self._parts():
            positions[rows] = X[rows, :2]
            covariances[rows] = P[rows, :2, :2]
            velocities[rows] = model.velocity(X[rows])
        return TrackSnapshot(self._ids.copy(), positions, covariances, velocities, self.lifecycle.confirmed.copy())
