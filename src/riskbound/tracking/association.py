"""Global nearest neighbour association of detections to tracks inside chi-square gates.

Among all one-to-one pairings that use only gated pairs, take one with the most pairs and, among
those, the smallest total cost c = d² + ln det S (twice the negative log-likelihood of the
detection under the track's Gaussian, up to a constant). The ln det S term keeps a track with a
wide gate (just started, or coasting without detections) from taking a detection that sits
equally well, in d², with a well-known track.

The gated pairs form a bipartite graph. A pair whose track and detection have no other gated
partner is a component of its own and is part of every optimal assignment; the remaining pairs
go to scipy's linear_sum_assignment on the rows and columns they use (in a crowd of well
separated people that remainder is small, which keeps the scan time low).
"""

import numpy as np
from scipy.optimize import linear_sum_assignment


def associate(tracks, detections, costs, track_count, detection_count):
    """Pairs (track_indices, detection_indices) of the global nearest neighbour assignment.

    tracks, detections, costs: (K,) the gated pairs and their costs d² + ln det S;
    track_count, detection_count: sizes of the problem. Only gated pairs are returned.
    """
    tracks = np.asarray(tracks, dtype=np.intp)
    detections = np.asarray(detections, dtype=np.intp)
    costs = np.asarray(costs, dtype=float)
    if len(tracks) == 0:
        return np.zeros(0, dtype=np.intp), np.zeros(0, dtype=np.intp)
    track_degree = np.bincount(tracks, minlength=track_count)
    detection_degree = np.bincount(detections, minlength=detection_count)
    alone = (track_degree[tracks] == 1) & (detection_degree[detections] == 1)
    if np.all(alone):
        return tracks, detections
    shared = ~alone
    rows, row_index = np.unique(tracks[shared], return_inverse=True)
    cols, col_index = np.unique(detections[shared], return_inverse=True)
    allowed = np.zeros((len(rows), len(cols)), dtype=bool)
    allowed[row_index, col_index] = True
    shifted = costs[shared] - costs[shared].min()
    # Larger than any total of valid costs: one more gated pair always beats a lower cost.
    forbidden = (shifted.max() + 1.0) * (min(allowed.shape) + 1)
    cost = np.full(allowed.shape, forbidden)
    cost[row_index, col_index] = shifted
    r, c = linear_sum_assignment(cost)
    keep = allowed[r, c]
    return (np.concatenate([tracks[alone], rows[r[keep]]]),
            np.concatenate([detections[alone], cols[c[keep]]]))
