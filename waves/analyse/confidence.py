"""summary.json's "confidence": a 95 % interval on every headline number.

Period, speed and wavelength: the two-way bootstrap of waves.measure.intervals
over time windows x spatial blocks.  A block's side is the larger of a
wavelength and four smoothing lengths (the measurement errors of neighbours
share the smoothing kernel, the activation fit's radius and the waves that
cross them together; a wavelength is the scale a wave's own distortions keep).
Cores: their position's spread (radius of gyration of the track).  Centres:
the range of their territory over the time windows.
"""

from __future__ import annotations

import numpy as np

from waves.measure.intervals import LEVEL, N_BOOT, block_labels, cell_medians, two_way_interval

METHOD = (f"{100 * LEVEL:.0f} % percentile interval of the median, {N_BOOT} two-way bootstrap draws of "
          "time windows and spatial blocks (each cell: the median of its pixels)")


def block_px(*, wavelength_px: float, sigma_px: float) -> float:
    """Side of a spatial block, analysis-grid pixels."""
    wl = wavelength_px if np.isfinite(wavelength_px) else 0.0
    return max(wl, 4.0 * max(sigma_px, 0.0), 4.0)


def headline(*, period_w: np.ndarray, speed_w: np.ndarray, block: float, dt_min: float,
             to_um_per_min: float, px_um: float, speed_key: str = "front_speed_um_per_min",
             more: dict | None = None) -> dict:
    """period_w, speed_w: (windows, y, x) in frames and px per frame, NaN where a
    window does not measure (the summary's masks applied); the wavelength is
    their product.  `speed_key` names speed_w's interval; `more`: further
    {key: (maps, scale)} to give intervals for (another speed estimate)."""
    shape = period_w.shape[1:]
    labels, n_blocks = block_labels(shape, block)
    wl_w = period_w * speed_w
    out: dict = {"method": METHOD, "level": LEVEL, "block_um": float(block * px_um),
                 "windows": int(period_w.shape[0]), "blocks": n_blocks}
    todo = [("period_min", period_w, dt_min), (speed_key, speed_w, to_um_per_min), ("wavelength_um", wl_w, px_um)]
    todo += [(k, m, sc) for k, (m, sc) in (more or {}).items()]
    for key, maps, scale in todo:
        cells = cell_medians(maps, labels, n_blocks)
        ci = two_way_interval(cells)
        out[key] = None if ci is None else {
            "ci95": [ci[0] * scale, ci[1] * scale],
            "cells": int(np.isfinite(cells).sum()),
        }
    return out


def cores(spiral_cores: list, tracks_um: dict) -> list:
    """Each core's position spread (radius of gyration of its track, um)."""
    ids = list(np.asarray(tracks_um.get("track_id", []), dtype=np.int64))
    gyr = np.asarray(tracks_um.get("gyration_radius_um", []), dtype=np.float64)
    out = []
    for c in spiral_cores:
        k = ids.index(c["id"]) if c["id"] in ids else None
        out.append({"id": c["id"], "position_spread_um": float(gyr[k]) if k is not None else None})
    return out


def territories(centres: list, course: dict) -> list:
    """Each centre's territory range over the time windows (mm^2)."""
    cid = np.asarray(course.get("centre_id", []))
    area = np.asarray(course.get("territory_area_mm2", []), dtype=np.float64)
    out = []
    for c in centres:
        a = area[cid == c["id"]]
        out.append({"id": c["id"], "territory_min_mm2": float(a.min()) if a.size else None,
                    "territory_max_mm2": float(a.max()) if a.size else None, "windows": int(a.size)})
    return out
