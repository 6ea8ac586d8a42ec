"""Obstacle rows for the review from the first obstacle source present: ground truth or raw
detections (PoseArray frames, with ids paired from crowd_truth_ids), or step 0 of the tracker's
forecasts."""

import numpy as np

from riskbound.forecast_schema import POINT_DTYPE
from riskbound.logs.bag_io import quaternion_xyzw_to_yaw
from riskbound.logs.review import cdr
from riskbound.logs.review.sanity import CODEC_FIELDS, plausible_positions, points_plausible
from riskbound.logs.review.series import Obstacles, empty_obstacles

# Frames are 0.1 s apart at 10 Hz; a frame and its ids arrive within milliseconds of each other.
ID_PAIRING_WINDOW_NS = 50_000_000


def times_of(records, offset):
    """Stamp of each record, or its log time + offset when it has none."""
    return np.array([r[0] if r[0] is not None else 1e-9 * r[1] + offset for r in records], dtype=float)


def ordered(times, records):
    order = np.argsort(times, kind="stable")
    return times[order], [records[i] for i in order]


def _pair_ids(records, id_records):
    """The ids message of each PoseArray frame, or None.

    A crowd bag writes a frame's ids with the frame's log time; a bag recorded from a live graph
    receives the two messages separately, a few milliseconds apart and sometimes in either order.
    So each frame takes the ids message nearest in log time (within ID_PAIRING_WINDOW_NS) that has
    as many ids as the frame has poses, each ids message used once.
    """
    id_records = sorted(id_records, key=lambda r: r[0])
    id_times = np.array([r[0] for r in id_records], dtype=np.int64)
    used = np.zeros(len(id_records), dtype=bool)
    paired = []
    for record in records:
        time_ns, count = record[1], len(record[3])
        at = int(np.searchsorted(id_times, time_ns))
        best = None
        for j in range(max(at - 2, 0), min(at + 2, len(id_records))):
            gap = abs(int(id_times[j]) - time_ns)
            if not used[j] and len(id_records[j][1]) == count and gap <= ID_PAIRING_WINDOW_NS and (
                    best is None or gap < abs(int(id_times[best]) - time_ns)):
                best = j
        if best is not None:
            used[best] = True
        paired.append(None if best is None else id_records[best][1])
    return paired


def obstacles_from_pose_arrays(source, records, id_records, offset, half_extents, notes, rejected):
    """Rows from PoseArray frames; ids paired per frame when available (frames without are dropped).
    A frame with an implausible position is dropped whole and counted in rejected[source]."""
    times, records = ordered(times_of(records, offset), records)
    plausible = [bool(np.all(plausible_positions(r[3][:, 0:2]))) for r in records]
    if not all(plausible):
        rejected[source] = plausible.count(False)
    anonymous = id_records is None
    if not anonymous:
        paired = _pair_ids(records, id_records)
        unpaired = sum(ids is None for ids in paired)
        if unpaired > len(records) // 2:
            notes.append(f"{source}: no matching ids for {unpaired} of {len(records)} frames; "
                         f"obstacles treated as anonymous")
            anonymous = True
        elif unpaired:
            notes.append(f"{source}: no matching ids for {unpaired} of {len(records)} frames; those frames skipped")
            keep = [i for i, ids in enumerate(paired) if ids is not None]
            times, records, paired = times[keep], [records[i] for i in keep], [paired[i] for i in keep]
    counts = np.array([len(r[3]) if ok else 0 for r, ok in zip(records, plausible)], dtype=np.int64)
    kept = [r[3] for r, ok in zip(records, plausible) if ok]
    poses = np.concatenate(kept) if kept else np.zeros((0, 7))
    frame_index = np.repeat(np.arange(len(records)), counts)
    kept_ids = [] if anonymous else [ids for ids, ok in zip(paired, plausible) if ok]
    ids = (np.full(len(poses), -1, dtype=np.int64) if anonymous
           else np.concatenate(kept_ids).astype(np.int64) if kept_ids else np.zeros(0, dtype=np.int64))
    headings = quaternion_xyzw_to_yaw(poses[:, 3:7])
    # A pose without a usable orientation still has a footprint: assume the box along x.
    headings = np.where(np.isfinite(headings), headings, 0.0)
    order = np.lexsort((frame_index, ids))
    if not anonymous:
        duplicate = (np.diff(ids[order]) == 0) & (np.diff(frame_index[order]) == 0)
        if np.any(duplicate):
            notes.append(f"{source}: {int(duplicate.sum())} repeated ids within a frame dropped")
            order = order[np.concatenate([[True], ~duplicate])]
    frames = {r[2] for r in records}
    return Obstacles(source=source, times_s=times[frame_index[order]], frame_index=frame_index[order],
                     ids=ids[order], positions=poses[order, 0:2].copy(), headings=headings[order],
                     half_extents=np.tile(np.asarray(half_extents, dtype=float), (len(order), 1)),
                     frame_times_s=times, anonymous=anonymous, frame_id=sorted(frames)[0] if frames else "")


def _first_step(raw):
    """Points of a forecast's first step straight from the bytes, when the cloud has exactly the
    codec's layout (else None: the caller decodes it with the codec). A forecast holding an
    implausible value anywhere comes back as False."""
    try:
        _, _, fields, big_endian, point_step, count, data = cdr.point_cloud(raw)
    except cdr.CdrLayoutError:
        return None
    if fields != CODEC_FIELDS or big_endian or point_step != POINT_DTYPE.itemsize or len(data) != count * point_step:
        return None
    points = np.frombuffer(data, dtype=POINT_DTYPE, count=count)
    if count == 0:
        return points
    if not points_plausible(points):
        return False
    first = points[points["step"] == points["step"].min()]
    if len(np.unique(first["track_id"])) != len(first):
        return None
    return first


def obstacles_from_forecasts(forecasts, progress, notes, rejected):
    """Rows from each forecast's first step (step 0 is the tracker's current estimate).

    Decoded straight from the bytes when the cloud has the codec's layout (thousands of clouds
    per minute), through the codec otherwise; the tests check that both give the same rows.
    """
    rows = []
    for i in range(len(forecasts)):
        if progress is not None and i % 500 == 0:
            progress("forecasts", i / max(len(forecasts), 1))
        first = _first_step(forecasts.raws[i])
        if first is False:
            forecasts.rejected.add(i)
            continue
        if first is not None:
            if len(first):
                xy = np.stack([first["x"], first["y"]], axis=-1).astype(float)
                extents = np.stack([first["half_length"], first["half_width"]], axis=-1).astype(float)
                rows.append((i, forecasts.stamps_s[i] + float(first["t"][0]), first["track_id"].astype(np.int64), xy,
                             first["yaw"].astype(float), extents))
            continue
        forecast = forecasts.get(i)
        if forecast is None or forecast.track_count == 0:
            continue
        rows.append((i, forecasts.stamps_s[i] + forecast.times[0], forecast.track_ids, forecast.positions[:, 0],
                     forecast.headings[:, 0], forecast.half_extents))
    if forecasts.rejected:
        rejected["obstacle_forecast"] = len(forecasts.rejected)
    if forecasts.errors:
        first = min(forecasts.errors)
        notes.append(f"obstacle_forecast: {len(forecasts.errors)} messages did not decode "
                     f"(first at {forecasts.stamps_s[first]:.3f} s: {forecasts.errors[first]})")
    if not rows:
        return empty_obstacles("obstacle_forecast")
    counts = np.array([len(r[2]) for r in rows])
    frame_index = np.repeat(np.arange(len(rows)), counts)
    ids = np.concatenate([r[2] for r in rows])
    order = np.lexsort((frame_index, ids))
    return Obstacles(source="obstacle_forecast", times_s=np.repeat([r[1] for r in rows], counts)[order],
                     frame_index=frame_index[order], ids=ids[order],
                     positions=np.concatenate([r[3] for r in rows])[order],
                     headings=np.concatenate([r[4] for r in rows])[order],
                     half_extents=np.concatenate([r[5] for r in rows])[order],
                     frame_times_s=np.array([r[1] for r in rows]), frame_id=forecasts.frame_ids[0])


def screen_forecasts(forecasts, rejected):
    """Mark the forecasts holding implausible values (forecast checks and re-solves then skip them)."""
    for i in range(len(forecasts)):
        first = _first_step(forecasts.raws[i])
        if first is False:
            forecasts.rejected.add(i)
        elif first is None:
            forecasts.get(i)
    if forecasts.rejected:
        rejected["obstacle_forecast"] = len(forecasts.rejected)
