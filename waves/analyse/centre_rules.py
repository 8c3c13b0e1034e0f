"""Rules a candidate centre must pass to be reported (issue 13): rejected
candidates go to CentreSet.rejected with the reason, never into the headline
lists, figures or counts."""

from __future__ import annotations

import numpy as np
import scipy.ndimage

from waves.measure.centres import without_centres
from waves.measure.territories import radial_alignment


def without_hole_echoes(cs, holey, *, margin_px, merge_px, wl_px, min_hole_px):
    """`cs` without the small target centres next to a hole inside the cell field (an
    obstacle, a cleared strip): waves bending round the hole's end look like a source
    there (specks and other holes the smoothing bridges do not count).  Next to: within the measuring margin plus the centres' merge radius; small: a
    territory under a disc of half a wavelength.  Wide holes that reach the frame's border (a
    dish edge) do not count: a real pacemaker by the dish edge keeps its centre (measured:
    a 0.07-share "target" beside a relay field's obstacle; one by a dish edge is real); thin
    ones (a cleared strip from the border in, at most a quarter wavelength from the cells
    everywhere) do (measured: 0.05-share "targets" beside a streaming field's strip)."""
    if holey.all() or not len(cs.centres["id"]) or not np.isfinite(wl_px):
        return cs
    lab, n = scipy.ndimage.label(~holey)
    border = np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    # a hole that reaches the border counts when it is thin (a cleared strip, a scratch: no
    # point of it farther than a quarter wavelength from the cells), not when wide (a dish edge)
    depth = scipy.ndimage.maximum(scipy.ndimage.distance_transform_edt(lab > 0), lab, np.arange(n + 1))
    thin = np.asarray(depth) <= 0.25 * wl_px
    counts = ~np.isin(np.arange(n + 1), border) | thin
    # specks and dead pixels (holes the normalised convolution bridges) do not count either
    inner = (lab > 0) & counts[lab] & (sizes[lab] >= max(int(min_hole_px), 1))
    if not inner.any():
        return cs
    ny, nx = holey.shape
    r = np.clip(np.rint(cs.centres["row"]).astype(int), 0, ny - 1)
    c = np.clip(np.rint(cs.centres["col"]).astype(int), 0, nx - 1)
    near = scipy.ndimage.distance_transform_edt(~inner)[r, c] <= max(margin_px, 1.0) + merge_px
    small = cs.centres["n_pixels"] < np.pi * (0.5 * wl_px) ** 2
    return without_centres(cs, (cs.centres["kind"] == "target") & near & small,
                           reason="beside a hole in the cell field: waves bending round it, not a source")


def without_tiny_territories(cs, *, wl_px):
    """`cs` without target centres whose territory (whole movie and every window)
    stays under a disc of a quarter wavelength: a source holds at least the ring
    of its first wave (issue 13 measured zero-territory "targets" on the image edge of
    real-looking fields).  Spirals keep their place: the core is the evidence."""
    if not len(cs.centres["id"]) or not np.isfinite(wl_px):
        return cs
    most = cs.centres["n_pixels"].astype(np.float64).copy()
    wa = cs.window_areas
    for i, cid in enumerate(cs.centres["id"]):
        sel = wa["centre_id"] == cid
        if sel.any():
            most[i] = max(most[i], float(wa["n_pixels"][sel].max()))
    return without_centres(cs, (cs.centres["kind"] == "target") & (most < np.pi * (0.25 * wl_px) ** 2),
                           reason="territory smaller than a disc of a quarter wavelength in every window")


# a source's waves spread radially from it: on a ring round it the propagation directions
# line up with the radius (mean cosine ~1); waves that enter the view from outside, a
# plane wave or a source beyond the edge, line up less (a plane wave on a half ring: 2/pi).
# Measured on tests/test_centre_rules.py's fields: sources on the edge 0.997-0.998; plane
# waves 0.62-0.80; sources 300 um beyond an edge 0.93, 280 um beyond a corner 0.97-0.98
EDGE_ALIGNMENT = 0.98


def without_edge_entries(cs, direction, valid, *, wl_px, edge_px):
    """`cs` without target centres within `edge_px` of the image edge whose
    waves do not spread radially from them (radial alignment on a ring of
    half a wavelength under EDGE_ALIGNMENT): waves that enter the view there
    from outside (measured: a plane wave, or a pacemaker 300 um beyond the
    edge, each gave one "target" on the edge holding the whole field).
    Spirals keep their place: the core is the evidence."""
    if not len(cs.centres["id"]) or not np.isfinite(wl_px):
        return cs
    ny, nx = direction.shape
    r, c = cs.centres["row"].astype(np.float64), cs.centres["col"].astype(np.float64)
    near = np.minimum.reduce([r, c, ny - 1 - r, nx - 1 - c]) <= edge_px
    drop = np.zeros(len(r), dtype=bool)
    for i in np.flatnonzero(near & (cs.centres["kind"] == "target")):
        al = radial_alignment(direction, valid, r[i], c[i], 0.5 * wl_px)
        drop[i] = not al >= EDGE_ALIGNMENT
    return without_centres(cs, drop, reason="on the image edge, and the waves there do not spread from it: they "
                                            "enter the view from outside")
