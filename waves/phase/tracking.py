"""Spiral cores: detection in charge maps, noise suppression, tracking, units.

A phase singularity shows up as a 2x2 plaquette of non-zero topological charge
(`waves.phase.charge`).  Plaquette (r, c) has its centre at pixel coordinates
(row, col) = (r + 0.5, c + 0.5); pixel centres sit at integer indices, so
x_um = col * pixel_size_um and y_um = row * pixel_size_um (DESIGN.md).

Detection (`detect_cores`, `detect_cores_stack`) turns charge maps into a
compact table of cores per frame, in three steps:

1. plaquettes whose amplitude is below `min_amplitude` are ignored (optional);
2. opposite charges at most `cancel_radius_px` apart are cancelled in pairs,
   closest pairs first: phase noise makes such +/- pairs on neighbouring
   plaquettes, a real core stands alone;
3. same-sign charges at most `merge_radius_px` apart (linked in chains) are
   merged into one core at their mean position.

A plaquette of charge +/-2 counts as two unit charges at the same place.

Tracking (`track_cores`) links cores of the same charge from frame to frame by
nearest neighbour, solved as an assignment problem (scipy's
`linear_sum_assignment`) with a gating distance, and bridges gaps of a few
frames.  `persistent_tracks` keeps the tracks that live at least about one wave
period; transient noise pairs do not.

Rotation sense.  Let theta be the polar angle about the core counted
counterclockwise as displayed (row 0 at the top) and the phase near a core of
charge q be phi = w t + q theta (+ a smooth part).  A line of constant phase
at fixed radius moves with q dtheta/dt = -w, so for w > 0 (phase increasing in
time) a core of charge +1 turns with dtheta/dt < 0: CLOCKWISE as displayed;
charge -1 turns COUNTERCLOCKWISE.  The analyser does not need to know the band
polarity for this: the phase of the analytic signal (positive frequencies
only) always increases in time, whichever of bright or dark is excited, and
the delay-embedding phase of `waves.phase.analytic` is defined to increase in
time as well.  Flipping the polarity shifts the phase by pi everywhere, which
changes no charge.

Tables are dicts of 1-D numpy arrays (column name -> column) whose names and
dtypes are the same when they are empty, like scikit-image's
`regionprops_table`.

`_list_charges` is the compiled kernel that finds charged plaquettes in a
whole block of frames (with the amplitude test fused in, so no per-plaquette
amplitude array of the block's size is ever made); `_list_charges_numpy` is
its readable twin.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np
import scipy.sparse
import scipy.sparse.csgraph
import scipy.spatial

from waves.errors import InputError, WavesError

__all__ = [
    "CORE_COLUMNS",
    "TRACKED_CORE_COLUMNS",
    "TRACK_COLUMNS",
    "CoreTracks",
    "detect_cores",
    "detect_cores_stack",
    "concat_tables",
    "track_cores",
    "persistent_tracks",
    "rotation_of_charge",
    "cores_in_um",
    "tracks_in_um",
    "spiral_core_records",
    "cores_per_cm2",
]

# column name -> dtype, in table order
CORE_COLUMNS: dict[str, np.dtype] = {
    "frame": np.dtype(np.int64),
    "row": np.dtype(np.float64),
    "col": np.dtype(np.float64),
    "charge": np.dtype(np.int8),
    "n_plaquettes": np.dtype(np.int32),
}

TRACKED_CORE_COLUMNS: dict[str, np.dtype] = {
    "frame": np.dtype(np.int64),
    "track_id": np.dtype(np.int64),
    "row": np.dtype(np.float64),
    "col": np.dtype(np.float64),
    "charge": np.dtype(np.int8),
}

TRACK_COLUMNS: dict[str, np.dtype] = {
    "track_id": np.dtype(np.int64),
    "charge": np.dtype(np.int8),
    "first_frame": np.dtype(np.int64),
    "last_frame": np.dtype(np.int64),
    "n_frames": np.dtype(np.int64),
    "lifetime_frames": np.dtype(np.int64),
    "mean_row": np.dtype(np.float64),
    "mean_col": np.dtype(np.float64),
    "gyration_radius_px": np.dtype(np.float64),
    "max_excursion_px": np.dtype(np.float64),
    "path_length_px": np.dtype(np.float64),
}

_ROTATION_DTYPE = np.dtype("<U16")


def _empty(columns: dict[str, np.dtype]) -> dict[str, np.ndarray]:
    return {name: np.zeros(0, dtype=dt) for name, dt in columns.items()}


def _table(columns: dict[str, np.dtype], values: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {name: np.asarray(values[name]).astype(dt, copy=False) for name, dt in columns.items()}


def _take(table: dict[str, np.ndarray], index: np.ndarray) -> dict[str, np.ndarray]:
    return {name: col[index] for name, col in table.items()}


def concat_tables(tables: list[dict[str, np.ndarray]]) -> dict[str, np.ndarray]:
    """Concatenate tables with the same columns (e.g. per-block core tables).

    Column names and dtypes of the first table are kept.  An empty list is an
    error, because it has no columns to keep; pass at least one (possibly
    empty) table.
    """
    if len(tables) == 0:
        raise WavesError("concat_tables needs at least one table (an empty one is fine)")
    names = list(tables[0])
    for t in tables[1:]:
        if list(t) != names:
            raise WavesError(
                f"tables to concatenate must have the same columns; got {names} and {list(t)}"
            )
    return {
        n: np.concatenate([np.asarray(t[n]) for t in tables]).astype(tables[0][n].dtype, copy=False)
        for n in names
    }


# ---------------------------------------------------------------------------
# listing charged plaquettes: compiled kernel and numpy twin
# amp_mode 0: no amplitude test; 1: amplitude given per plaquette (same shape as
# the charge); 2: amplitude per pixel (one larger in y and x), the plaquette's
# amplitude being the mean of its four corners.  An amplitude block with one
# frame applies to every frame.  A NaN amplitude fails the test.


@numba.njit(cache=True, nogil=True)
def _plaquette_amp(amp, ta, r, c, amp_mode):
    if amp_mode == 1:
        return np.float64(amp[ta, r, c])
    return 0.25 * (
        np.float64(amp[ta, r, c])
        + np.float64(amp[ta, r + 1, c])
        + np.float64(amp[ta, r + 1, c + 1])
        + np.float64(amp[ta, r, c + 1])
    )


@numba.njit(cache=True, nogil=True)
def _list_charges(charge, amp, min_amp, amp_mode):
    nt, ny, nx = charge.shape
    single = amp.shape[0] == 1
    n = 0
    for t in range(nt):
        ta = 0 if single else t
        for r in range(ny):
            for c in range(nx):
                if charge[t, r, c] != 0:
                    if amp_mode == 0 or _plaquette_amp(amp, ta, r, c, amp_mode) >= min_amp:
                        n += 1
    tt = np.empty(n, dtype=np.int64)
    rr = np.empty(n, dtype=np.int64)
    cc = np.empty(n, dtype=np.int64)
    qq = np.empty(n, dtype=np.int8)
    k = 0
    for t in range(nt):
        ta = 0 if single else t
        for r in range(ny):
            for c in range(nx):
                q = charge[t, r, c]
                if q != 0:
                    if amp_mode == 0 or _plaquette_amp(amp, ta, r, c, amp_mode) >= min_amp:
                        tt[k] = t
                        rr[k] = r
                        cc[k] = c
                        qq[k] = q
                        k += 1
    return tt, rr, cc, qq


def _list_charges_numpy(charge, amp, min_amp, amp_mode):
    """Readable numpy twin of `_list_charges` (same arguments, same output)."""
    keep = charge != 0
    if amp_mode == 1:
        keep &= amp.astype(np.float64) >= min_amp
    elif amp_mode == 2:
        a = amp.astype(np.float64)
        mean4 = 0.25 * (a[:, :-1, :-1] + a[:, 1:, :-1] + a[:, 1:, 1:] + a[:, :-1, 1:])
        keep &= mean4 >= min_amp
    t, r, c = np.nonzero(keep)
    return (
        t.astype(np.int64),
        r.astype(np.int64),
        c.astype(np.int64),
        charge[t, r, c].astype(np.int8),
    )


# ---------------------------------------------------------------------------
# noise suppression within one frame


def _cancel_pairs(pos: np.ndarray, q: np.ndarray, radius: float) -> np.ndarray:
    """Boolean mask of unit charges that survive pairwise +/- cancellation.

    Opposite pairs at most `radius` apart are removed closest first (ties in
    index order), each charge taking part in at most one pair.
    """
    alive = np.ones(len(q), dtype=bool)
    plus = np.flatnonzero(q > 0)
    minus = np.flatnonzero(q < 0)
    if radius <= 0 or len(plus) == 0 or len(minus) == 0:
        return alive
    tp = scipy.spatial.cKDTree(pos[plus])
    tm = scipy.spatial.cKDTree(pos[minus])
    pairs = tp.sparse_distance_matrix(tm, radius, output_type="ndarray")
    if len(pairs) == 0:
        return alive
    order = np.lexsort((pairs["j"], pairs["i"], pairs["v"]))
    pi = plus[pairs["i"][order]]
    mi = minus[pairs["j"][order]]
    for a, b in zip(pi.tolist(), mi.tolist(), strict=True):
        if alive[a] and alive[b]:
            alive[a] = False
            alive[b] = False
    return alive


def _merge_same_sign(pos: np.ndarray, radius: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Single-linkage groups of points at most `radius` apart: mean row, mean col, size."""
    n = len(pos)
    if n == 1:
        return pos[:, 0].copy(), pos[:, 1].copy(), np.ones(1, dtype=np.int64)
    pairs = scipy.spatial.cKDTree(pos).query_pairs(max(radius, 0.0), output_type="ndarray")
    graph = scipy.sparse.coo_matrix(
        (np.ones(len(pairs), dtype=np.int8), (pairs[:, 0], pairs[:, 1])), shape=(n, n)
    )
    n_groups, label = scipy.sparse.csgraph.connected_components(graph, directed=False)
    size = np.bincount(label, minlength=n_groups)
    row = np.bincount(label, weights=pos[:, 0], minlength=n_groups) / size
    col = np.bincount(label, weights=pos[:, 1], minlength=n_groups) / size
    return row, col, size


def _suppress_frame(
    rows: np.ndarray,
    cols: np.ndarray,
    q: np.ndarray,
    cancel_radius_px: float,
    merge_radius_px: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Cancel +/- pairs, then merge same-sign neighbours; positions in px."""
    reps = np.abs(q.astype(np.int64))
    rows = np.repeat(rows, reps)
    cols = np.repeat(cols, reps)
    q = np.repeat(np.sign(q).astype(np.int8), reps)
    pos = np.column_stack([rows, cols])
    alive = _cancel_pairs(pos, q, cancel_radius_px)
    out_r, out_c, out_q, out_n = [], [], [], []
    for sign in (1, -1):
        sel = alive & (q == sign)
        if not sel.any():
            continue
        r, c, n = _merge_same_sign(pos[sel], merge_radius_px)
        out_r.append(r)
        out_c.append(c)
        out_q.append(np.full(len(r), sign, dtype=np.int8))
        out_n.append(n)
    if not out_r:
        return (np.zeros(0), np.zeros(0), np.zeros(0, np.int8), np.zeros(0, np.int64))
    r, c = np.concatenate(out_r), np.concatenate(out_c)
    qq, nn = np.concatenate(out_q), np.concatenate(out_n)
    order = np.lexsort((c, r))
    return r[order], c[order], qq[order], nn[order]


# ---------------------------------------------------------------------------
# detection: public API


def _check_radius(name: str, value: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise WavesError(f"{name} must be a number of pixels, got {value!r}") from None
    if not math.isfinite(v) or v < 0:
        raise WavesError(
            f"{name} must be a finite number of pixels >= 0 (0 turns it off), got {value!r}"
        )
    return v


def _prepare_amplitude(
    amplitude: np.ndarray | None, min_amplitude: float | None, charge_shape: tuple[int, int, int]
) -> tuple[np.ndarray, float, int]:
    dummy = np.zeros((1, 1, 1), dtype=np.float32)
    if amplitude is None and min_amplitude is None:
        return dummy, 0.0, 0
    if amplitude is None or min_amplitude is None:
        raise WavesError(
            "give both amplitude (a map) and min_amplitude (a threshold) to ignore weak "
            "plaquettes, or neither"
        )
    try:
        thr = float(min_amplitude)
    except (TypeError, ValueError):
        raise WavesError(f"min_amplitude must be a number, got {min_amplitude!r}") from None
    if not math.isfinite(thr):
        raise WavesError(f"min_amplitude must be finite, got {min_amplitude!r}")
    a = np.asarray(amplitude)
    if a.dtype.kind not in "fiu":
        raise WavesError(f"amplitude must be a real-valued array, got dtype {a.dtype}")
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3:
        raise WavesError(f"amplitude must be a (y, x) or (t, y, x) array, got {a.ndim} dimensions")
    nt, ny, nx = charge_shape
    if a.shape[0] not in (1, nt):
        raise WavesError(
            f"amplitude has {a.shape[0]} frames but the charge has {nt}; give one amplitude "
            "frame per charge frame, or a single (y, x) map for all frames"
        )
    if a.shape[1:] == (ny, nx):
        mode = 1
    elif a.shape[1:] == (ny + 1, nx + 1):
        mode = 2
    else:
        raise WavesError(
            f"amplitude frames are {a.shape[1]} x {a.shape[2]} but the charge frames are "
            f"{ny} x {nx}; give the amplitude of the phase pixels ({ny + 1} x {nx + 1}) "
            f"or one value per plaquette ({ny} x {nx})"
        )
    if a.dtype not in (np.float32, np.float64):
        a = a.astype(np.float32)
    return np.ascontiguousarray(a), thr, mode


def detect_cores_stack(
    charge: np.ndarray,
    *,
    amplitude: np.ndarray | None = None,
    min_amplitude: float | None = None,
    merge_radius_px: float = 1.5,
    cancel_radius_px: float = 2.0,
    first_frame: int = 0,
    origin_px: tuple[int, int] = (0, 0),
    offsets: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Cores in every frame of a block of charge maps.

    Parameters
    ----------
    charge : (t, y, x) integer array
        Plaquette charges, e.g. from `plaquette_charge` of a (t, y+1, x+1) phase block.
    amplitude, min_amplitude :
        Optional: ignore plaquettes whose amplitude is below `min_amplitude`
        (NaN amplitude is ignored too).  `amplitude` is either the pixel map of
        the phase block, (t, y+1, x+1) or (y+1, x+1), a plaquette taking the
        mean of its four corners, or one value per plaquette, (t, y, x) or
        (y, x).  A spiral core itself oscillates weakly, so set the threshold
        at the level of empty background, well below the amplitude of cells.
    merge_radius_px :
        Same-sign charges at most this far apart (in chains) become one core
        at their mean position (pixels; 0 merges only coincident charges).
    cancel_radius_px :
        Opposite charges at most this far apart cancel in pairs, closest
        first (pixels; 0 turns cancelling off).  Noise pairs sit on
        neighbouring plaquettes, 1 to 1.5 px apart.
    first_frame :
        Frame number of the block's first frame, so that tables of
        consecutive blocks can be concatenated.
    origin_px :
        (row, col) of the block's top-left phase pixel in the whole field,
        added to the positions of cores found in a tile.
    offsets :
        Optional (t, y, x, 2) position of each plaquette's singularity inside
        it, (row, col) in [0, 1] (`waves.phase.charge.singularity_offsets`);
        without it a charge sits at the plaquette's centre.

    Returns
    -------
    Table with columns `CORE_COLUMNS`: frame, row and col (pixel coordinates
    of the whole field, plaquette centres at r + 0.5, c + 0.5), charge (+1 or
    -1) and n_plaquettes (unit charges merged into the core).  Sorted by
    frame, then row, then col.
    """
    q = np.asarray(charge)
    if q.ndim == 2:
        q = q[None]
    if q.ndim != 3:
        raise WavesError(f"charge must be a (y, x) or (t, y, x) array, got {q.ndim} dimensions")
    if q.dtype.kind not in "iu":
        raise WavesError(
            f"charge must be an integer array (from plaquette_charge), got dtype {q.dtype}"
        )
    merge_r = _check_radius("merge_radius_px", merge_radius_px)
    cancel_r = _check_radius("cancel_radius_px", cancel_radius_px)
    row0, col0 = (int(v) for v in origin_px)
    frame0 = int(first_frame)
    amp, thr, mode = _prepare_amplitude(amplitude, min_amplitude, q.shape)
    if q.dtype != np.int8:
        q = q.astype(np.int8)
    t, r, c, qq = _list_charges(np.ascontiguousarray(q), amp, thr, mode)
    if len(t) == 0:
        return _empty(CORE_COLUMNS)
    bounds = np.flatnonzero(np.diff(t)) + 1
    starts = np.concatenate([[0], bounds])
    stops = np.concatenate([bounds, [len(t)]])
    parts = []
    for a, b in zip(starts.tolist(), stops.tolist(), strict=True):
        if offsets is None:
            pr, pc = r[a:b] + 0.5, c[a:b] + 0.5
        else:
            ta = t[a]
            pr = r[a:b] + offsets[ta, r[a:b], c[a:b], 0].astype(np.float64)
            pc = c[a:b] + offsets[ta, r[a:b], c[a:b], 1].astype(np.float64)
        rows, cols, charges, counts = _suppress_frame(pr, pc, qq[a:b], cancel_r, merge_r)
        parts.append(
            _table(
                CORE_COLUMNS,
                {
                    "frame": np.full(len(rows), frame0 + t[a]),
                    "row": rows + row0,
                    "col": cols + col0,
                    "charge": charges,
                    "n_plaquettes": counts,
                },
            )
        )
    return concat_tables(parts)


def detect_cores(
    charge_frame: np.ndarray,
    *,
    amplitude: np.ndarray | None = None,
    min_amplitude: float | None = None,
    merge_radius_px: float = 1.5,
    cancel_radius_px: float = 2.0,
    frame: int = 0,
    origin_px: tuple[int, int] = (0, 0),
) -> dict[str, np.ndarray]:
    """Cores in one (y, x) charge map; see `detect_cores_stack` for the options.

    `amplitude` is the (y+1, x+1) pixel map or the (y, x) plaquette map of this
    frame; `frame` is written into the table's frame column.
    """
    q = np.asarray(charge_frame)
    if q.ndim != 2:
        raise WavesError(
            f"detect_cores takes one (y, x) charge frame, got {q.ndim} dimensions; "
            "use detect_cores_stack for a (t, y, x) block"
        )
    if amplitude is not None and np.ndim(amplitude) != 2:
        raise WavesError(
            f"the amplitude of one frame must be a (y, x) map, got {np.ndim(amplitude)} dimensions"
        )
    return detect_cores_stack(
        q[None],
        amplitude=amplitude,
        min_amplitude=min_amplitude,
        merge_radius_px=merge_radius_px,
        cancel_radius_px=cancel_radius_px,
        first_frame=frame,
        origin_px=origin_px,
    )


# ---------------------------------------------------------------------------
# tracking


@dataclass(frozen=True)
class CoreTracks:
    """Cores linked into tracks.

    `cores`: one row per detection, columns `TRACKED_CORE_COLUMNS` (frame,
    track_id, row, col, charge), sorted by frame then track_id.
    `tracks`: one row per track, columns `TRACK_COLUMNS`, sorted by track_id:
    charge, first and last frame, n_frames (detections), lifetime_frames
    (last - first + 1, gaps included), mean position, meander extent
    (radius of gyration about the mean position and the largest distance from
    it) and path length (sum of the steps between successive detections), all
    in pixels.
    """

    cores: dict[str, np.ndarray]
    tracks: dict[str, np.ndarray]

    @property
    def n_tracks(self) -> int:
        return int(len(self.tracks["track_id"]))


def _check_core_table(detections: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    if not isinstance(detections, dict):
        raise InputError(
            f"detections must be a table (dict of columns) from detect_cores, got {type(detections).__name__}"
        )
    missing = [n for n in ("frame", "row", "col", "charge") if n not in detections]
    if missing:
        raise InputError(
            f"detections table lacks column(s) {missing}; pass the table from detect_cores_stack"
        )
    cols = {n: np.asarray(detections[n]) for n in ("frame", "row", "col", "charge")}
    lengths = {len(v) for v in cols.values()}
    if len(lengths) != 1 or any(v.ndim != 1 for v in cols.values()):
        raise InputError("detections columns must be 1-D arrays of the same length")
    if cols["frame"].dtype.kind not in "iu" or cols["charge"].dtype.kind not in "iu":
        raise InputError("detections 'frame' and 'charge' columns must hold integers")
    if not (np.all(np.isfinite(cols["row"])) and np.all(np.isfinite(cols["col"]))):
        raise InputError("detections 'row' and 'col' must be finite pixel coordinates")
    if np.any(cols["charge"] == 0):
        raise InputError("detections must have charge +1 or -1, found 0")
    return cols


def _link(
    tr: np.ndarray, tc: np.ndarray, gate: np.ndarray, dr: np.ndarray, dc: np.ndarray
) -> list[tuple[int, int]]:
    """Minimum-distance assignment of detections to tracks within each track's gate.

    The gating graph is split into connected pieces and each piece is solved
    with `linear_sum_assignment`; forbidden pairs cost more than any allowed
    set, so as many pairs as possible are linked, then the total distance is
    the smallest.
    """
    if len(tr) == 0 or len(dr) == 0:
        return []
    if len(tr) * len(dr) <= 64:
        # few cores (the usual case): the dense distance matrix is cheaper than trees
        dist = np.hypot(np.subtract.outer(tr, dr), np.subtract.outer(tc, dc))
        i, j = np.nonzero(dist <= gate[:, None])
        d = dist[i, j]
    else:
        tt = scipy.spatial.cKDTree(np.column_stack([tr, tc]))
        td = scipy.spatial.cKDTree(np.column_stack([dr, dc]))
        sdm = tt.sparse_distance_matrix(td, float(gate.max()), output_type="ndarray")
        ok = sdm["v"] <= gate[sdm["i"]]
        i, j, d = sdm["i"][ok], sdm["j"][ok], sdm["v"][ok]
    if len(i) == 0:
        return []
    if len(i) == 1:
        return [(int(i[0]), int(j[0]))]
    nt, nd = len(tr), len(dr)
    graph = scipy.sparse.coo_matrix((np.ones(len(i), np.int8), (i, nt + j)), shape=(nt + nd,) * 2)
    _, label = scipy.sparse.csgraph.connected_components(graph, directed=False)
    from scipy.optimize import linear_sum_assignment  # here: scipy.optimize costs ~0.15 s to import

    links = []
    pair_label = label[i]
    order = np.argsort(pair_label, kind="stable")
    i, j, d, pair_label = i[order], j[order], d[order], pair_label[order]
    cuts = np.flatnonzero(np.diff(pair_label)) + 1
    for pi, pj, pd in zip(np.split(i, cuts), np.split(j, cuts), np.split(d, cuts), strict=True):
        ui, ri = np.unique(pi, return_inverse=True)
        uj, rj = np.unique(pj, return_inverse=True)
        forbidden = 1.0 + len(pd) * (float(pd.max()) + 1.0)
        cost = np.full((len(ui), len(uj)), forbidden)
        cost[ri, rj] = pd
        rows, cols = linear_sum_assignment(cost)
        for a, b in zip(rows.tolist(), cols.tolist(), strict=True):
            if cost[a, b] < forbidden:
                links.append((int(ui[a]), int(uj[b])))
    return links


def track_cores(
    detections: dict[str, np.ndarray], *, max_step_px: float, max_gap_frames: int = 2
) -> CoreTracks:
    """Link cores of the same charge from frame to frame.

    Parameters
    ----------
    detections :
        Table from `detect_cores_stack` (columns frame, row, col, charge; pixel
        coordinates), any frame order.
    max_step_px :
        Gating distance: a core may move at most this far per frame (pixels).
        Across a gap the allowed distance grows with the frames elapsed,
        max_step_px * (frame - last_frame).
    max_gap_frames :
        A track may miss up to this many consecutive frames and still be
        continued (0: every frame must have the core).

    In each frame the tracks still open (seen within the last
    max_gap_frames + 1 frames) are assigned to the detections of the same
    charge by minimum total distance (`scipy.optimize.linear_sum_assignment`),
    first maximising the number of links inside the gates.  Unlinked
    detections start new tracks.  Track ids count from 0 in order of
    appearance.
    """
    cols = _check_core_table(detections)
    try:
        step = float(max_step_px)
    except (TypeError, ValueError):
        raise WavesError(f"max_step_px must be a number of pixels, got {max_step_px!r}") from None
    if not math.isfinite(step) or step <= 0:
        raise WavesError(
            f"max_step_px must be a positive number of pixels per frame, got {max_step_px!r}"
        )
    if (
        isinstance(max_gap_frames, bool)
        or int(max_gap_frames) != max_gap_frames
        or max_gap_frames < 0
    ):
        raise WavesError(f"max_gap_frames must be a whole number >= 0, got {max_gap_frames!r}")
    max_gap = int(max_gap_frames)

    frame = cols["frame"].astype(np.int64)
    row = cols["row"].astype(np.float64)
    col = cols["col"].astype(np.float64)
    charge = np.sign(cols["charge"]).astype(np.int8)
    n = len(frame)
    if n == 0:
        return CoreTracks(_empty(TRACKED_CORE_COLUMNS), _empty(TRACK_COLUMNS))

    order = np.argsort(frame, kind="stable")
    frame, row, col, charge = frame[order], row[order], col[order], charge[order]
    track_of = np.full(n, -1, dtype=np.int64)
    # open tracks: id, last frame, last position, charge
    open_id: list[int] = []
    open_last: list[int] = []
    open_r: list[float] = []
    open_c: list[float] = []
    open_q: list[int] = []
    next_id = 0
    cuts = np.flatnonzero(np.diff(frame)) + 1
    for idx in np.split(np.arange(n), cuts):
        f = int(frame[idx[0]])
        keep = [k for k in range(len(open_id)) if f - open_last[k] <= max_gap + 1]
        open_id = [open_id[k] for k in keep]
        open_last = [open_last[k] for k in keep]
        open_r = [open_r[k] for k in keep]
        open_c = [open_c[k] for k in keep]
        open_q = [open_q[k] for k in keep]
        last = np.asarray(open_last, dtype=np.int64)
        oq = np.asarray(open_q, dtype=np.int8)
        orr = np.asarray(open_r, dtype=np.float64)
        occ = np.asarray(open_c, dtype=np.float64)
        for sign in (1, -1):
            tsel = np.flatnonzero(oq == sign)
            dsel = idx[charge[idx] == sign]
            links = _link(orr[tsel], occ[tsel], step * (f - last[tsel]), row[dsel], col[dsel])
            linked = np.zeros(len(dsel), dtype=bool)
            for a, b in links:
                k = int(tsel[a])
                det = int(dsel[b])
                track_of[det] = open_id[k]
                open_last[k] = f
                open_r[k] = float(row[det])
                open_c[k] = float(col[det])
                linked[b] = True
            for det in dsel[~linked].tolist():
                track_of[det] = next_id
                open_id.append(next_id)
                open_last.append(f)
                open_r.append(float(row[det]))
                open_c.append(float(col[det]))
                open_q.append(sign)
                next_id += 1

    cores = _table(
        TRACKED_CORE_COLUMNS,
        {"frame": frame, "track_id": track_of, "row": row, "col": col, "charge": charge},
    )
    cores = _take(cores, np.lexsort((cores["track_id"], cores["frame"])))
    return CoreTracks(cores, _summarise(cores))


def _summarise(cores: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Per-track summary table from a tracked-core table."""
    if len(cores["frame"]) == 0:
        return _empty(TRACK_COLUMNS)
    by_track = np.lexsort((cores["frame"], cores["track_id"]))
    tid = cores["track_id"][by_track]
    fr = cores["frame"][by_track]
    r = cores["row"][by_track]
    c = cores["col"][by_track]
    q = cores["charge"][by_track]
    ids, start, label, count = np.unique(
        tid, return_index=True, return_inverse=True, return_counts=True
    )
    stop = np.concatenate([start[1:], [len(tid)]]) - 1
    mean_r = np.bincount(label, weights=r) / count
    mean_c = np.bincount(label, weights=c) / count
    d2 = (r - mean_r[label]) ** 2 + (c - mean_c[label]) ** 2
    gyration = np.sqrt(np.bincount(label, weights=d2) / count)
    max_exc = np.zeros(len(ids))
    np.maximum.at(max_exc, label, np.sqrt(d2))
    step = np.hypot(np.diff(r), np.diff(c))
    same = label[1:] == label[:-1]
    path = np.bincount(label[1:][same], weights=step[same], minlength=len(ids))
    return _table(
        TRACK_COLUMNS,
        {
            "track_id": ids,
            "charge": q[start],
            "first_frame": fr[start],
            "last_frame": fr[stop],
            "n_frames": count,
            "lifetime_frames": fr[stop] - fr[start] + 1,
            "mean_row": mean_r,
            "mean_col": mean_c,
            "gyration_radius_px": gyration,
            "max_excursion_px": max_exc,
            "path_length_px": path,
        },
    )


def persistent_tracks(result: CoreTracks, *, min_lifetime_frames: int) -> CoreTracks:
    """The tracks living at least `min_lifetime_frames` (last - first + 1).

    Pass about one wave period in frames, period_min * 60 / frame_interval_s:
    a real spiral core survives many rotations, a noise pair rarely one.
    Both tables are filtered; track ids are kept.
    """
    if (
        isinstance(min_lifetime_frames, bool)
        or not isinstance(min_lifetime_frames, (int, np.integer))
        or min_lifetime_frames < 1
    ):
        raise WavesError(
            f"min_lifetime_frames must be a whole number of frames >= 1, got {min_lifetime_frames!r}; "
            "use about one wave period in frames"
        )
    keep = result.tracks["lifetime_frames"] >= int(min_lifetime_frames)
    tracks = _take(result.tracks, keep)
    cores = _take(result.cores, np.isin(result.cores["track_id"], tracks["track_id"]))
    return CoreTracks(cores, tracks)


# ---------------------------------------------------------------------------
# rotation sense and calibrated units


def rotation_of_charge(charge: int) -> str:
    """'clockwise' for charge +1, 'counterclockwise' for -1, as displayed.

    Holds for a phase that increases in time, which the analytic-signal phase
    always does (module docstring): constant phase at fixed radius moves with
    q dtheta/dt = -w, theta counterclockwise as displayed (row 0 at the top).
    """
    if (
        isinstance(charge, (bool, np.bool_))
        or not isinstance(charge, (int, np.integer))
        or charge == 0
    ):
        raise WavesError(f"charge must be a non-zero integer (+1 or -1), got {charge!r}")
    return "clockwise" if charge > 0 else "counterclockwise"


def _check_scale(
    pixel_size_um: float, frame_interval_s: float | None
) -> tuple[float, float | None]:
    out = []
    for name, value, opt in (
        ("pixel_size_um", pixel_size_um, "--pixel-size UM"),
        ("frame_interval_s", frame_interval_s, "--frame-interval S"),
    ):
        if value is None and name == "frame_interval_s":
            out.append(None)
            continue
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise WavesError(f"{name} must be a number, got {value!r}") from None
        if not math.isfinite(v) or v <= 0:
            raise WavesError(
                f"{name} must be a positive finite number, got {value!r}; give it with {opt}"
            )
        out.append(v)
    return out[0], out[1]


def _rotations(charge: np.ndarray) -> np.ndarray:
    return np.where(charge > 0, "clockwise", "counterclockwise").astype(_ROTATION_DTYPE)


def cores_in_um(
    cores: dict[str, np.ndarray], *, pixel_size_um: float, frame_interval_s: float
) -> dict[str, np.ndarray]:
    """A core table (detected or tracked) in calibrated units.

    Columns: frame, t_min (= frame * frame_interval_s / 60), track_id (when
    the input has it), x_um (= col * pixel_size_um), y_um (= row *
    pixel_size_um), charge, rotation.
    """
    cols = _check_core_table(cores)
    px, dt = _check_scale(pixel_size_um, frame_interval_s)
    out = {
        "frame": cols["frame"].astype(np.int64),
        "t_min": cols["frame"].astype(np.float64) * dt / 60.0,
    }
    if "track_id" in cores:
        out["track_id"] = np.asarray(cores["track_id"]).astype(np.int64)
    out["x_um"] = cols["col"].astype(np.float64) * px
    out["y_um"] = cols["row"].astype(np.float64) * px
    out["charge"] = cols["charge"].astype(np.int8)
    out["rotation"] = _rotations(out["charge"])
    return out


def tracks_in_um(
    tracks: dict[str, np.ndarray], *, pixel_size_um: float, frame_interval_s: float
) -> dict[str, np.ndarray]:
    """A track summary table (`CoreTracks.tracks`) in calibrated units.

    Columns: track_id, charge, rotation, first_min, last_min, lifetime_min
    (= lifetime_frames * frame_interval_s / 60), n_frames, x_um and y_um of
    the mean position, gyration_radius_um, max_excursion_um, path_length_um.
    """
    missing = [n for n in TRACK_COLUMNS if n not in tracks]
    if missing:
        raise InputError(f"track table lacks column(s) {missing}; pass CoreTracks.tracks")
    px, dt = _check_scale(pixel_size_um, frame_interval_s)
    to_min = dt / 60.0
    q = np.asarray(tracks["charge"]).astype(np.int8)
    return {
        "track_id": np.asarray(tracks["track_id"]).astype(np.int64),
        "charge": q,
        "rotation": _rotations(q),
        "first_min": np.asarray(tracks["first_frame"], dtype=np.float64) * to_min,
        "last_min": np.asarray(tracks["last_frame"], dtype=np.float64) * to_min,
        "lifetime_min": np.asarray(tracks["lifetime_frames"], dtype=np.float64) * to_min,
        "n_frames": np.asarray(tracks["n_frames"]).astype(np.int64),
        "x_um": np.asarray(tracks["mean_col"], dtype=np.float64) * px,
        "y_um": np.asarray(tracks["mean_row"], dtype=np.float64) * px,
        "gyration_radius_um": np.asarray(tracks["gyration_radius_px"], dtype=np.float64) * px,
        "max_excursion_um": np.asarray(tracks["max_excursion_px"], dtype=np.float64) * px,
        "path_length_um": np.asarray(tracks["path_length_px"], dtype=np.float64) * px,
    }


def spiral_core_records(
    tracks: dict[str, np.ndarray], *, pixel_size_um: float, frame_interval_s: float
) -> list[dict]:
    """The `spiral_cores` list of summary.json from a (persistent) track table:
    [{id, x_um, y_um, charge, rotation, first_min, last_min}], plain Python values."""
    t = tracks_in_um(tracks, pixel_size_um=pixel_size_um, frame_interval_s=frame_interval_s)
    return [
        {
            "id": int(t["track_id"][k]),
            "x_um": float(t["x_um"][k]),
            "y_um": float(t["y_um"][k]),
            "charge": int(t["charge"][k]),
            "rotation": str(t["rotation"][k]),
            "first_min": float(t["first_min"][k]),
            "last_min": float(t["last_min"][k]),
        }
        for k in range(len(t["track_id"]))
    ]


def cores_per_cm2(n_cores: int, *, field_area_px: float, pixel_size_um: float) -> float:
    """Core density: `n_cores` (e.g. persistent tracks) per cm^2 of field.

    `field_area_px` is the analysed area in pixels (ny * nx, or the number of
    unmasked pixels); 1 cm^2 = 1e8 um^2.
    """
    px, _ = _check_scale(pixel_size_um, None)
    if isinstance(n_cores, bool) or int(n_cores) != n_cores or n_cores < 0:
        raise WavesError(f"n_cores must be a whole number >= 0, got {n_cores!r}")
    try:
        area = float(field_area_px)
    except (TypeError, ValueError):
        raise WavesError(
            f"field_area_px must be a number of pixels, got {field_area_px!r}"
        ) from None
    if not math.isfinite(area) or area <= 0:
        raise WavesError(
            f"field_area_px must be a positive number of pixels, got {field_area_px!r}"
        )
    return float(n_cores) / (area * px * px / 1e8)
