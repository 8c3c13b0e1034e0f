"""Aggregation centres over a whole movie and in time windows.

A centre can be active for part of a movie only: a faster pacemaker
entrains a slower one, whose territory it takes over, and the slower one
stops being a source.  So centres are found in every time window's direction
field (`waves.measure.territories.find_territories`), then the window
centres are linked across windows by position (within twice the merge
radius) into the movie's centres.  The whole movie's territory map comes
from the direction field averaged over the movie; per-window territory areas
follow the take-overs.  A target centre that no window sees (only the
movie-averaged field, e.g. where a moving collision line averaged out) is
not reported when there are several windows.

A centre is a spiral when a persistent spiral core lies within twice the
merge radius of it (the core's position is then the centre's), otherwise a
target pacemaker.  Pixels and windows here; `waves.analyse` converts.

A centre's period and firing regularity come from the waves it emitted
itself (`emission_intervals`): a wave that arrives at the centre before it
reaches most of a ring around it left from there.  A pacemaker that is
entrained by a faster one stops emitting (the waves now cross it from one
side), so its period is the one it had while it was a source, not that of
the waves that later run over it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse
import scipy.sparse.csgraph
from scipy.spatial import cKDTree

from waves.errors import WavesError
from waves.measure.territories import fill_gaps, find_territories

__all__ = ["CentreSet", "track_centres", "emission_intervals"]


@dataclass(frozen=True)
class CentreSet:
    """Centres of a movie (analysis-grid pixels, window indices).

    centres: columns id (1-based, = label in the maps), kind ('spiral' or
    'target'), row, col, core_track (spiral core track id or -1),
    first_window, last_window, n_pixels (whole-movie territory).
    labels: whole-movie territory map (0 = unassigned).
    window_areas: columns window, centre_id, n_pixels.
    window_labels: (n_windows, y, x) territory maps per window, same ids.
    """

    centres: dict
    labels: np.ndarray
    window_areas: dict
    window_labels: np.ndarray
    rejected: tuple = ()  # (kind, row, col, n_pixels, reason) of candidates left out, in order


def _link(points: np.ndarray, radius: float) -> np.ndarray:
    n = len(points)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    pairs = cKDTree(points).query_pairs(radius, output_type="ndarray")
    graph = scipy.sparse.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    return scipy.sparse.csgraph.connected_components(graph, directed=False)[1]


def track_centres(
    direction: np.ndarray,
    coherence: np.ndarray,
    signal: np.ndarray,
    *,
    merge_radius_px: float,
    min_coherence: float,
    cores_rows: np.ndarray,
    cores_cols: np.ndarray,
    cores_ids: np.ndarray,
    fill: np.ndarray | None = None,
    workers: int = 1,
) -> CentreSet:
    """Centres and territories from direction and coherence maps of shape
    (n_windows + 1, y, x): index 0 the whole movie, then the windows.
    `fill` ((y, x) bool or None): pixels of the field that carry no direction
    to walk (e.g. the border a drift correction leaves without data), given
    to the nearest territory.  `workers` > 1: the maps' territories are
    found on that many threads (numpy, scipy; the same result)."""
    n_all, ny, nx = direction.shape
    nw = n_all - 1
    extra = np.zeros((ny, nx), dtype=bool) if fill is None else np.asarray(fill, dtype=bool)

    def territories(i):
        steady = signal & (coherence[i] >= min_coherence)
        t = find_territories(direction[i], steady, merge_radius_px=merge_radius_px)
        return t, fill_gaps(t.labels, (signal & ~steady) | extra)

    if int(workers) > 1 and n_all > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=int(workers)) as pool:
            maps = list(pool.map(territories, range(n_all)))
    else:
        maps = [territories(i) for i in range(n_all)]
    found = []  # (window, row, col, n_pixels, local label, filled labels)
    window_maps = []
    for w in range(nw):
        t, lab = maps[w + 1]
        window_maps.append(lab)
        for k in range(t.n_centres):
            found.append((w, t.rows[k], t.cols[k], int(np.sum(lab == k + 1)), k + 1))
    whole, whole_lab = maps[0]

    link_r = 2.0 * merge_radius_px
    pts = np.array([[f[1], f[2]] for f in found] + [[r, c] for r, c in zip(whole.rows, whole.cols, strict=True)])
    groups = _link(pts, link_r) if len(pts) else np.zeros(0, dtype=np.int64)
    n_found = len(found)
    order = []  # groups by first appearance, whole-movie-only centres last
    for g in groups:
        if g not in order:
            order.append(g)
    gid = {g: i + 1 for i, g in enumerate(order)}

    rows, cols, kinds, core_ids, first, last = [], [], [], [], [], []
    core_pts = np.stack([np.asarray(cores_rows, float), np.asarray(cores_cols, float)], axis=1)
    for g in order:
        members = np.flatnonzero(groups == g)
        win_members = members[members < n_found]
        if len(win_members):
            w_area = np.array([found[i][3] for i in win_members], dtype=np.float64)
            r = float(np.average([found[i][1] for i in win_members], weights=w_area + 1))
            c = float(np.average([found[i][2] for i in win_members], weights=w_area + 1))
            first.append(int(min(found[i][0] for i in win_members)))
            last.append(int(max(found[i][0] for i in win_members)))
        else:
            j = members[0] - n_found
            r, c = float(whole.rows[j]), float(whole.cols[j])
            first.append(-1)
            last.append(-1)
        kind, core = "target", -1
        if len(core_pts):
            dist = np.hypot(core_pts[:, 0] - r, core_pts[:, 1] - c)
            j = int(np.argmin(dist))
            if dist[j] <= link_r:
                kind, core = "spiral", int(cores_ids[j])
                r, c = float(core_pts[j, 0]), float(core_pts[j, 1])
        rows.append(r)
        cols.append(c)
        kinds.append(kind)
        core_ids.append(core)

    def relabel(lab, local_to_global):
        out = np.zeros_like(lab)
        for local, glob in local_to_global.items():
            out[lab == local] = glob
        return out

    window_labels = np.zeros((nw, ny, nx), dtype=np.int32)
    areas = {"window": [], "centre_id": [], "n_pixels": []}
    for i, f in enumerate(found):
        w, local = f[0], f[4]
        glob = gid[groups[i]]
        window_labels[w][window_maps[w] == local] = glob
    for w in range(nw):
        for glob in range(1, len(order) + 1):
            n = int(np.sum(window_labels[w] == glob))
            if n:
                areas["window"].append(w)
                areas["centre_id"].append(glob)
                areas["n_pixels"].append(n)
    whole_map = {k + 1: gid[groups[n_found + k]] for k in range(whole.n_centres)}
    labels = relabel(whole_lab, whole_map)
    centres = {
        "id": np.arange(1, len(order) + 1, dtype=np.int64),
        "kind": np.asarray(kinds, dtype=object),
        "row": np.asarray(rows, dtype=np.float64),
        "col": np.asarray(cols, dtype=np.float64),
        "core_track": np.asarray(core_ids, dtype=np.int64),
        "first_window": np.asarray(first, dtype=np.int64),
        "last_window": np.asarray(last, dtype=np.int64),
        "n_pixels": np.asarray([int(np.sum(labels == i)) for i in range(1, len(order) + 1)], dtype=np.int64),
    }
    window_areas = {k: np.asarray(v, dtype=np.int64) for k, v in areas.items()}
    cs = CentreSet(centres=centres, labels=labels, window_areas=window_areas, window_labels=window_labels)
    if nw > 1:
        # a pacemaker is a source while it emits, so some time window sees it; a target "centre"
        # that only the movie-averaged direction field shows is where a moving collision line
        # averaged out (measured: two such of 0.4-0.5 mm^2 between a 6-min spiral and a
        # 6.5-min target, whose collision line sweeps as the faster source gains ground)
        cs = without_centres(cs, (centres["first_window"] < 0) & (centres["kind"] == "target"),
                             reason="seen only in the movie-averaged direction field, in no time window")
    return cs


def emission_intervals(
    times: np.ndarray,
    row: float,
    col: float,
    *,
    radius_px: float,
    max_lag_frames: float,
    min_outward: float = 0.65,
) -> np.ndarray:
    """Intervals (frames) between successive waves emitted at (row, col).

    times: (y, x, m) arrival times of every wave at every pixel (frames,
    NaN-padded, `waves.measure.speed.activation_times`).  A wave arriving at
    the centre pixel at t was emitted there when, on the ring of 0.5 to 1.5
    `radius_px` about the centre, at least half of the pixels see an arrival
    within `max_lag_frames` of t (about half a period; the ring's travel time
    must be shorter) and at least `min_outward` of those arrive later than t.
    An interval counts only between two emitted waves that follow each other
    at the centre pixel, so the time a centre spends entrained, and the time
    before and after, adds nothing.
    """
    t = np.asarray(times, dtype=np.float64)
    if t.ndim != 3:
        raise WavesError("arrival times must be a (y, x, m) array")
    if not (radius_px > 0 and max_lag_frames > 0):
        raise WavesError(f"radius and lag must be positive, got {radius_px!r} and {max_lag_frames!r}")
    ny, nx, _ = t.shape
    r0 = int(np.clip(round(row), 0, ny - 1))
    c0 = int(np.clip(round(col), 0, nx - 1))
    at = t[r0, c0]
    at = np.sort(at[np.isfinite(at)])
    rr, cc = np.mgrid[0:ny, 0:nx]
    dist = np.hypot(rr - row, cc - col)
    ring = t[(dist >= 0.5 * radius_px) & (dist <= 1.5 * radius_px)]  # (n_ring, m)
    if len(at) < 2 or len(ring) == 0:
        return np.zeros(0)
    emitted = np.zeros(len(at), dtype=bool)
    for k, tk in enumerate(at):
        with np.errstate(invalid="ignore"):
            lag = ring - tk
            near = np.where(np.abs(lag) <= max_lag_frames, lag, np.nan)
        seen = np.isfinite(near).any(axis=1)
        if seen.mean() < 0.5:
            continue
        # the arrival nearest in time to the centre's, per ring pixel
        j = np.argmin(np.where(np.isfinite(near), np.abs(near), np.inf)[seen], axis=1)
        first = near[seen][np.arange(seen.sum()), j]
        emitted[k] = np.mean(first > 0) >= min_outward
    both = emitted[1:] & emitted[:-1]
    return np.diff(at)[both]


def without_centres(cs: CentreSet, drop: np.ndarray, *, reason: str = "") -> CentreSet:
    """`cs` without the centres where `drop` (bool per centre) is True: their
    territories go to the nearest remaining territory (whole movie and every
    window), the remaining centres are numbered 1.. in their old order; the
    dropped ones join `rejected` with `reason`."""
    drop = np.asarray(drop, dtype=bool)
    if not drop.any():
        return cs
    c = cs.centres
    rejected = cs.rejected + tuple(
        (str(c["kind"][i]), float(c["row"][i]), float(c["col"][i]), int(c["n_pixels"][i]), reason)
        for i in np.flatnonzero(drop))
    keep = ~drop
    new_id = np.zeros(len(drop) + 1, dtype=np.int64)
    new_id[1:][keep] = np.arange(1, int(keep.sum()) + 1)

    def remap(lab: np.ndarray) -> np.ndarray:
        out = new_id[lab]
        return fill_gaps(out, (lab > 0) & (out == 0))

    labels = remap(cs.labels)
    window_labels = np.stack([remap(w) for w in cs.window_labels]) if len(cs.window_labels) else cs.window_labels
    centres = {k: np.asarray(v)[keep] for k, v in c.items()}
    centres["id"] = np.arange(1, int(keep.sum()) + 1, dtype=np.int64)
    centres["n_pixels"] = np.asarray([int(np.sum(labels == i)) for i in centres["id"]], dtype=np.int64)
    areas = {"window": [], "centre_id": [], "n_pixels": []}
    for w in range(len(window_labels)):
        for i in centres["id"]:
            n = int(np.sum(window_labels[w] == i))
            if n:
                areas["window"].append(w)
                areas["centre_id"].append(int(i))
                areas["n_pixels"].append(n)
    window_areas = {k: np.asarray(v, dtype=np.int64) for k, v in areas.items()}
    return CentreSet(centres=centres, labels=labels, window_areas=window_areas, window_labels=window_labels,
                     rejected=rejected)
