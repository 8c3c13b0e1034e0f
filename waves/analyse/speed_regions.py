"""Where front speeds are measured, and what a territory's speed is made of.

- Margins: collision lines, centres, persistent cores and the cell field's
  edge are kept out of every speed statistic.  A smoothed front is wrong
  wherever the smoothing kernel (3 sigma) reaches across a collision line or
  a source: there two waves (or the two sides of a target's conical arrival
  surface) are averaged and the phase gradient shrinks, so the speed reads
  high.  The margins are stated in summary.json ("speed_regions").
- Plane-wave-like pixels: fronts whose curvature kappa (the divergence of the
  unit propagation direction) is below one per wavelength; only these give
  the dispersion points, which compare with a plane-wave dispersion relation.
- Speed by territory and distance r from its centre: rings of curvature 1/r
  move at c = c0 - D / r (eikonal relation, Tyson & Keener 1988), so each
  territory's speed profile is fitted for the plane-wave speed c0 and the
  curvature coefficient D (least squares on distance bins half a spatial
  block wide, each bin's mean speed at its mean 1 / r; 95 % intervals from
  the bins' scatter, Student t).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.ndimage
import scipy.special

# fronts curved less than one radian per wavelength (a target ring beyond one wavelength) are plane-wave-like
PLANE_KAPPA_WAVELENGTH = 1.0
MIN_BINS = 4  # distance bins a territory needs for the eikonal fit
MIN_BIN_PIXELS = 10


def kernel_margin_px(sigma_px: float) -> int:
    """Half side of the smoothing kernel's reach (3 sigma), analysis pixels:
    the margin around collision lines and centres (0 without smoothing)."""
    return int(math.ceil(3.0 * sigma_px)) if sigma_px > 0.3 else 0


def away_from_points(shape: tuple[int, int], rows, cols, radius_px: float) -> np.ndarray:
    """True farther than `radius_px` from every point (rows, cols)."""
    out = np.ones(shape, dtype=bool)
    if radius_px <= 0:
        return out
    rr, cc = np.mgrid[0 : shape[0], 0 : shape[1]]
    for r, c in zip(rows, cols, strict=True):
        out &= np.hypot(rr - r, cc - c) > radius_px
    return out


def front_curvature(direction_rad: np.ndarray) -> np.ndarray:
    """Curvature (1 / pixel) of the fronts: the divergence of the unit
    propagation vector (cos theta, -sin theta) along (columns, rows), theta
    counterclockwise as displayed; 1 / r for a ring of radius r expanding
    from its centre, 0 for a plane wave, negative where fronts converge."""
    th = np.asarray(direction_rad, dtype=np.float64)
    ux, uy = np.cos(th), -np.sin(th)
    return np.gradient(ux, axis=1) + np.gradient(uy, axis=0)


def plane_like(direction_rad: np.ndarray, *, wavelength_px: float) -> np.ndarray:
    """Pixels whose fronts curve by less than PLANE_KAPPA_WAVELENGTH radians
    per wavelength (NaN direction: False)."""
    if not np.isfinite(wavelength_px) or wavelength_px <= 0:
        return np.zeros(np.shape(direction_rad), dtype=bool)
    k = front_curvature(direction_rad)
    ok = np.isfinite(k)
    # the curvature of a measured direction field carries its pixel noise: a light smoothing
    num = scipy.ndimage.gaussian_filter(np.where(ok, k, 0.0), 1.0, mode="constant")
    den = scipy.ndimage.gaussian_filter(ok.astype(np.float64), 1.0, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        ks = np.where(ok, num / den, np.nan)
        return ok & (np.abs(ks) * wavelength_px <= PLANE_KAPPA_WAVELENGTH)


def eikonal_fit(r_um: np.ndarray, speed: np.ndarray) -> dict | None:
    """Least-squares fit of speed = c0 - D / r over distance bins (r > 0).

    Returns {c0, c0_ci95, D, D_ci95, bins, r_min_um, r_max_um,
    constrained} or None below MIN_BINS bins; D's interval from the bins'
    residual scatter (Student t, bins - 2 degrees of freedom).  `constrained`
    is False when D's interval is wider than c0 * r_min (the profile cannot
    tell a curvature effect of the size of the speed itself from none)."""
    r = np.asarray(r_um, dtype=np.float64)
    v = np.asarray(speed, dtype=np.float64)
    ok = np.isfinite(r) & np.isfinite(v) & (r > 0)
    r, v = r[ok], v[ok]
    if r.size < MIN_BINS:
        return None
    a = np.stack([np.ones_like(r), -1.0 / r], axis=1)
    coef, *_ = np.linalg.lstsq(a, v, rcond=None)
    dof = r.size - 2
    resid = v - a @ coef
    s2 = float(resid @ resid) / dof
    cov = s2 * np.linalg.inv(a.T @ a)
    t = float(scipy.special.stdtrit(dof, 0.975))  # Student t quantile (scipy.stats.t.ppf without its import cost)
    c0, d = float(coef[0]), float(coef[1])
    e0, ed = t * math.sqrt(max(cov[0, 0], 0.0)), t * math.sqrt(max(cov[1, 1], 0.0))
    return {
        "plane_wave_speed_um_per_min": c0,
        "plane_wave_speed_ci95": [c0 - e0, c0 + e0],
        "curvature_coefficient_um2_per_min": d,
        "curvature_coefficient_ci95": [d - ed, d + ed],
        "bins": int(r.size),
        "r_min_um": float(r.min()),
        "r_max_um": float(r.max()),
        "constrained": bool(2 * ed <= abs(c0) * float(r.min())),
    }


def territory_speeds(speed_um: np.ndarray, labels: np.ndarray, centres: list, *, grid: dict,
                     bin_um: float) -> tuple[list, dict]:
    """Per centre's territory: median speed, and the speed against distance from
    the centre in bins of `bin_um` with the eikonal fit.

    speed_um  (y, x) speed map (um/min, NaN where not measured), analysis grid.
    labels    (y, x) territory ids (= the centres' ids; 0 unassigned).
    centres   summary['centres'] records (id, kind, x_um, y_um; recorded-image um).
    grid      summary['analysis']['grid'] (pixel size and origin of the analysis grid).
    Returns (records for summary.json, table of the bins)."""
    ny, nx = speed_um.shape
    px, ox, oy = grid["pixel_size_um"], grid["origin_x_um"], grid["origin_y_um"]
    x = ox + px * np.arange(nx)[None, :]
    y = oy + px * np.arange(ny)[:, None]
    records = []
    tab = {k: [] for k in ("centre_id", "r_um", "speed_um_per_min", "n_pixels")}  # r_um: 1 / mean(1 / r)
    for c in centres:
        m = (labels == c["id"]) & np.isfinite(speed_um)
        if not m.any():
            records.append({"centre_id": c["id"], "kind": c["kind"], "median_um_per_min": None, "n": 0,
                            "eikonal": None})
            continue
        r = np.hypot(x - c["x_um"], y - c["y_um"])[m]
        v = speed_um[m]
        edges = np.arange(0.0, float(r.max()) + bin_um, bin_um)
        idx = np.digitize(r, edges) - 1
        br, bv = [], []
        for b in range(len(edges) - 1):
            sel = idx == b
            if sel.sum() < MIN_BIN_PIXELS:
                continue
            # the model is linear in 1 / r: bin means of 1 / r and of the speed keep it exact
            # (medians of r and of a speed that changes as 1 / r across the bin would not)
            br.append(float(1.0 / np.mean(1.0 / np.maximum(r[sel], 1e-9))))
            bv.append(float(np.mean(v[sel])))
            tab["centre_id"].append(int(c["id"]))
            tab["r_um"].append(br[-1])
            tab["speed_um_per_min"].append(bv[-1])
            tab["n_pixels"].append(int(sel.sum()))
        records.append({
            "centre_id": int(c["id"]),
            "kind": c["kind"],
            "median_um_per_min": float(np.median(v)),
            "n": int(m.sum()),
            "eikonal": eikonal_fit(np.asarray(br), np.asarray(bv)),
        })
    table = {
        "centre_id": np.asarray(tab["centre_id"], dtype=np.int64),
        "r_um": np.asarray(tab["r_um"], dtype=np.float64),
        "speed_um_per_min": np.asarray(tab["speed_um_per_min"], dtype=np.float64),
        "n_pixels": np.asarray(tab["n_pixels"], dtype=np.int64),
    }
    return records, table


def disagreement(primary: dict | None, second: dict | None, conf: dict, key1: str, key2: str, *,
                 label: str = "phase velocity") -> str | None:
    """A warning when the per-wave fits' and a second speed estimate's (`label`)
    95 % intervals do not overlap."""
    if not primary or not second:
        return None
    a = (conf.get(key1) or {}).get("ci95")
    b = (conf.get(key2) or {}).get("ci95")
    if not a or not b:
        return None
    if a[1] < b[0] or b[1] < a[0]:
        return (f"two front-speed estimates disagree beyond their 95 % intervals: per-wave fits "
                f"{primary['median']:.3g} um/min ({a[0]:.3g}-{a[1]:.3g}), {label} "
                f"{second['median']:.3g} um/min ({b[0]:.3g}-{b[1]:.3g}); fronts may be curved, colliding "
                f"or changing within a cycle")
    return None
