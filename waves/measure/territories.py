"""Aggregation centres and their territories from the wave direction field.

Waves travel away from the centre that emits them, so walking upstream,
against the local propagation direction, leads every pixel back to its
centre: radially inwards for a target pacemaker, spiralling inwards to the
core for a spiral (its wave vector k r - theta / r turns the upstream walk
round the core as it closes in).  Collision lines, where fronts from two
centres meet, are watersheds of this walk.

Here the walk is discrete: each signal pixel points to the neighbour (of
eight) that lies most nearly upstream, when that direction is within 60
degrees of upstream; otherwise (at a centre, where the direction is
undefined or turns round) it points to itself.  Pointer jumping finds where
each walk ends.  End points closer together than a merge radius are one
candidate centre, so a broad pacemaker or a meandering core is not split.
A candidate is a centre when waves leave it: on a ring around it most of
the propagation directions point outwards.  Every pixel whose walk ends in
a centre belongs to its territory; the rest (walks that end at the field's
edge, where waves come in from outside the view, or at junk) is left
unassigned (label 0).

Pixels and analysis-grid units throughout; `waves.analyse` converts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse
import scipy.sparse.csgraph
from scipy.spatial import cKDTree

from waves.errors import WavesError

__all__ = ["Territories", "upstream_targets", "find_territories", "fill_gaps", "radial_alignment", "ring_directions"]

_NEIGHBOURS = np.array(
    [(-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1)], dtype=np.int64
)
_MIN_COS = 0.5  # a step must lie within 60 degrees of upstream


@dataclass(frozen=True)
class Territories:
    """Centres and the label map of their territories (analysis-grid pixels).

    labels: int32 (y, x), 0 = unassigned, k = centre k (1-based, the order of
    the arrays below).  rows, cols: centre positions.  n_pixels: territory
    sizes.  outward_fraction: the share of ring directions pointing away
    from the centre (1 for an ideal target).
    """

    labels: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    n_pixels: np.ndarray
    outward_fraction: np.ndarray

    @property
    def n_centres(self) -> int:
        return int(len(self.rows))


def upstream_targets(direction_rad: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """For every pixel the flat index of the neighbour most nearly upstream
    (against the propagation direction, given as an angle counterclockwise
    as displayed from +x), or its own index where no valid neighbour lies
    within 60 degrees of upstream or the pixel is not valid."""
    d = np.asarray(direction_rad, dtype=np.float64)
    v = np.asarray(valid, dtype=bool) & np.isfinite(d)
    ny, nx = d.shape
    # upstream unit vector in (row, col): propagation is (-sin a, cos a)
    up_r = np.sin(d)
    up_c = -np.cos(d)
    best = np.full((ny, nx), _MIN_COS)
    own = np.arange(ny * nx, dtype=np.int64).reshape(ny, nx)
    target = own.copy()
    vp = np.zeros((ny + 2, nx + 2), dtype=bool)  # v with a border of invalid pixels
    vp[1:-1, 1:-1] = v
    for dr, dc in _NEIGHBOURS:
        norm = np.hypot(dr, dc)
        score = (up_r * dr + up_c * dc) / norm
        ok = vp[1 + dr : 1 + dr + ny, 1 + dc : 1 + dc + nx]  # the neighbour (r + dr, c + dc) is valid
        better = v & ok & (score > best)
        np.copyto(best, score, where=better)
        np.copyto(target, own + (dr * nx + dc), where=better)
    return np.where(v, target, own).ravel()


def _walk_ends(nxt: np.ndarray) -> np.ndarray:
    """Where each pointer walk ends: pointer jumping until nothing changes
    (walks that end in a cycle end at some node of that cycle)."""
    ends = nxt.copy()
    for _ in range(int(np.ceil(np.log2(max(len(nxt), 2)))) + 2):
        new = ends[ends]
        if np.array_equal(new, ends):
            break
        ends = new
    return ends


def ring_directions(direction, valid, r0, c0, radius):
    """Over the valid pixels of a ring [radius / 2, 3 radius / 2] round (r0, c0):
    (rows, cols, unit propagation (row, col) = (-sin a, cos a), offsets from
    the centre and their lengths), or None with fewer than 6 pixels."""
    ny, nx = direction.shape
    rr, cc = np.mgrid[0:ny, 0:nx]
    dist = np.hypot(rr - r0, cc - c0)
    ring = valid & np.isfinite(direction) & (dist >= 0.5 * radius) & (dist <= 1.5 * radius)
    if ring.sum() < 6:
        return None
    a = direction[ring]
    r, c = rr[ring].astype(np.float64), cc[ring].astype(np.float64)
    return r, c, -np.sin(a), np.cos(a), r - r0, c - c0, dist[ring]


def _outward_fraction(direction, valid, r0, c0, radius):
    ring = ring_directions(direction, valid, r0, c0, radius)
    if ring is None:
        return 0.0
    _, _, ur, uc, dr, dc, _ = ring
    return float(np.mean(ur * dr + uc * dc > 0))  # propagation against the outward offset


def radial_alignment(direction, valid, r0, c0, radius) -> float:
    """Mean cosine between the propagation direction (rad, as waves.measure.fused:
    (row, col) step (-sin a, cos a)) and the outward radius, over the ring of
    `ring_directions`; NaN with fewer than 6 pixels (1 for waves spreading
    radially from (r0, c0))."""
    ring = ring_directions(direction, valid, r0, c0, radius)
    if ring is None:
        return float("nan")
    _, _, ur, uc, dr, dc, dist = ring
    return float(np.mean((ur * dr + uc * dc) / dist))


def _ray_centre(direction, valid, r0, c0, radius, min_alignment: float = 0.9):
    """The point the propagation directions on a ring round (r0, c0) radiate
    from, to a fraction of a pixel: the least-squares intersection of the
    rays, p = (sum P_i)^-1 sum P_i x_i with P_i the projection across ray i.
    Walk end points sit on whole pixels, and where several end points tie
    their mean is off by half a pixel.  Only for a target-like candidate
    (radial_alignment >= min_alignment) and a point within `radius` of the
    start; otherwise (r0, c0) unchanged (a spiral's rays wind round its core)."""
    ring = ring_directions(direction, valid, r0, c0, radius)
    if ring is None:
        return r0, c0
    xr, xc, ur, uc, dr, dc, dist = ring
    if np.mean((ur * dr + uc * dc) / dist) < min_alignment:
        return r0, c0
    # P = I - u u^T summed, and P x summed
    prr, pcc, prc = np.sum(1 - ur * ur), np.sum(1 - uc * uc), np.sum(-ur * uc)
    br = np.sum((1 - ur * ur) * xr - ur * uc * xc)
    bc = np.sum(-ur * uc * xr + (1 - uc * uc) * xc)
    det = prr * pcc - prc * prc
    if not det > 1e-9 * max(prr * pcc, 1e-300):
        return r0, c0
    r1 = (pcc * br - prc * bc) / det
    c1 = (prr * bc - prc * br) / det
    if not np.hypot(r1 - r0, c1 - c0) <= radius:
        return r0, c0
    return float(r1), float(c1)


def find_territories(
    direction_rad: np.ndarray,
    valid: np.ndarray,
    *,
    merge_radius_px: float,
    min_outward: float = 0.65,
    min_pixels: int = 9,
) -> Territories:
    """Centres and territories of one direction field (see module doc).

    direction_rad: (y, x) propagation direction, NaN where undefined;
    valid: pixels whose direction counts (signal, steady direction).
    merge_radius_px: walk end points closer than this are one centre (about
    a quarter wavelength); the outward test looks at a ring of 0.5 to 1.5
    times this radius.
    """
    d = np.asarray(direction_rad, dtype=np.float64)
    v = np.asarray(valid, dtype=bool)
    if d.ndim != 2 or d.shape != v.shape:
        raise WavesError("direction and validity must be 2-D maps of one shape")
    if not merge_radius_px > 0:
        raise WavesError(f"merge radius must be positive, got {merge_radius_px!r}")
    ny, nx = d.shape
    labels = np.zeros((ny, nx), dtype=np.int32)
    empty = Territories(labels, np.zeros(0), np.zeros(0), np.zeros(0, np.int64), np.zeros(0))
    member = (v & np.isfinite(d)).ravel()
    if not member.any():
        return empty
    ends = _walk_ends(upstream_targets(d, v))
    end_nodes, inverse = np.unique(ends[member], return_inverse=True)
    er, ec = np.divmod(end_nodes, nx)
    pts = np.stack([er, ec], axis=1).astype(np.float64)
    # end points closer than the merge radius are one candidate centre
    pairs = cKDTree(pts).query_pairs(merge_radius_px, output_type="ndarray")
    n = len(pts)
    graph = scipy.sparse.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    _, comp = scipy.sparse.csgraph.connected_components(graph, directed=False)
    pix_comp = comp[inverse]  # candidate of every member pixel
    counts = np.bincount(pix_comp, minlength=comp.max() + 1)
    rows, cols, sizes, outs, keep = [], [], [], [], {}
    for k in np.argsort(-counts):
        if counts[k] < min_pixels:
            break
        sel = comp == k
        # centre: end points weighted by how many walks end there
        w = np.bincount(inverse, minlength=n)[sel].astype(np.float64)
        r0 = float(np.sum(er[sel] * w) / w.sum())
        c0 = float(np.sum(ec[sel] * w) / w.sum())
        out = _outward_fraction(d, v, r0, c0, merge_radius_px)
        if out < min_outward:
            continue
        r0, c0 = _ray_centre(d, v, r0, c0, merge_radius_px)
        keep[k] = len(rows) + 1
        rows.append(r0)
        cols.append(c0)
        sizes.append(int(counts[k]))
        outs.append(out)
    lab = np.zeros(comp.max() + 1, dtype=np.int32)
    for k, label in keep.items():
        lab[k] = label
    flat = labels.ravel()
    flat[np.flatnonzero(member)] = lab[pix_comp]
    return Territories(
        labels=flat.reshape(ny, nx),
        rows=np.asarray(rows, dtype=np.float64),
        cols=np.asarray(cols, dtype=np.float64),
        n_pixels=np.asarray(sizes, dtype=np.int64),
        outward_fraction=np.asarray(outs, dtype=np.float64),
    )


def fill_gaps(labels: np.ndarray, fill: np.ndarray) -> np.ndarray:
    """Give the pixels in `fill` (e.g. signal pixels whose direction was too
    unsteady to walk: collision lines, the centres themselves) the label of
    the nearest labelled pixel (scipy.ndimage.distance_transform_edt)."""
    import scipy.ndimage

    lab = np.asarray(labels)
    f = np.asarray(fill, dtype=bool) & (lab == 0)
    if not (lab > 0).any() or not f.any():  # nothing to fill from, or nothing to fill
        return lab.copy()
    # the nearest labelled pixel of every pixel (the feature transform; no distances needed)
    ir, ic = scipy.ndimage.distance_transform_edt(lab == 0, return_distances=False, return_indices=True)
    out = lab.copy()
    out[f] = lab[ir[f], ic[f]]
    return out
