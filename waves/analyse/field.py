"""The cell field in the pipeline: bad pixels before the binning pass, the
mask after it, the margin and the summary's `cell_field` block."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from waves import preprocess
from waves.errors import InputError


@dataclass
class FieldPlan:
    """What the binning pass needs: recorded-grid weights (good, in-field
    pixels; None when every pixel is good and no mask was given), their
    binned coverage, the statistics accumulator and the user's mask."""

    weight: np.ndarray | None
    coverage: np.ndarray | None
    stats: preprocess.FieldStats
    bad: preprocess.BadPixels
    user_mask: np.ndarray | None
    factor: int


def scan(data, *, pixel_size_um: float) -> preprocess.BadPixels:
    """Saturated, dead and speck pixels of the recording (independent of the
    analysis grid, so it can run beside the drift estimate and the first look)."""
    return preprocess.scan_bad_pixels(data, speck_radius_px=max(2.0, preprocess.cellfield.SPECK_RADIUS_UM / pixel_size_um))


def plan(data, *, factor: int, cell_mask: np.ndarray | None, pixel_size_um: float,
         real_frames: np.ndarray | None = None, bad: preprocess.BadPixels | None = None) -> FieldPlan:
    """Scan for saturated and dead pixels (unless `bad`, the result of `scan`,
    is given) and set up the weighted binning.
    `real_frames`: (grid frames,) bool, False for interpolated frames (the
    statistics' noise estimate leaves them out); None: all as recorded."""
    ny, nx = (int(v) for v in data.shape[1:])
    user = None if cell_mask is None else preprocess.user_cell_mask(cell_mask, (ny, nx))
    if bad is None:
        bad = scan(data, pixel_size_um=pixel_size_um)
    if user is not None:  # the user's mask says where cells are; specks are the user's to mark
        bad = preprocess.BadPixels(saturated=bad.saturated, dead=bad.dead, specks=np.zeros_like(bad.specks),
                                   full_scale=bad.full_scale, n_frames_scanned=bad.n_frames_scanned)
    good = ~bad.any
    if not good.any():  # a flat movie: every pixel constant; the binning pass says so
        z = np.zeros_like(good)
        bad = preprocess.BadPixels(saturated=z, dead=z, specks=z, full_scale=bad.full_scale,
                                   n_frames_scanned=bad.n_frames_scanned)
        good = ~z
    weight = good if user is None else good & user
    if not weight.any():
        raise InputError("every pixel inside the cell mask is saturated or dead; check the mask and the movie")
    nyb, nxb = ny // factor, nx // factor
    if weight.all():
        weight = coverage = None
        good_b = np.ones((nyb, nxb), dtype=bool)
    else:
        w = weight.astype(np.float32)
        coverage = preprocess.bin_frames(w, factor) if factor > 1 else w
        good_b = coverage > 0
    return FieldPlan(weight=weight, coverage=coverage, stats=preprocess.FieldStats((nyb, nxb), good_b, real=real_frames),
                     bad=bad,
                     user_mask=user, factor=factor)


def find(p: FieldPlan, mean_b: np.ndarray, *, pixel_size_um: float, wavelength_px: float | None):
    """The cell field on the analysis grid after the binning pass."""
    f = p.factor
    if p.user_mask is not None:
        cells = p.user_mask.astype(np.float32)
        cov_cells = preprocess.bin_frames(cells, f) if f > 1 else cells
        good = (~p.bad.any).astype(np.float32)
        cov_good = preprocess.bin_frames(good, f) if f > 1 else good
        return preprocess.file_cell_field(cov_cells, cov_good, p.bad)
    coverage = p.coverage if p.coverage is not None else np.ones(mean_b.shape, np.float32)
    return preprocess.find_cell_field(mean_b, p.stats, coverage=coverage, factor=f, pixel_size_um=pixel_size_um,
                                      wavelength_px=wavelength_px, bad=p.bad)


def summary_block(field: preprocess.CellField, *, factor: int, margin_um: float, measured: np.ndarray) -> dict:
    """summary['cell_field']: the fraction of the analysis grid in the field,
    where the mask came from, what was excluded (recorded pixels) and the
    margin along the field's edge where nothing is measured."""
    f2 = factor * factor
    bad = field.bad
    in_field_b = ~field.outside
    # saturated / dead recorded pixels inside the field (those outside count as outside)
    inside_rec = np.repeat(np.repeat(in_field_b, factor, axis=0), factor, axis=1)
    sat = dead = specks = 0
    if bad is not None:
        ny, nx = inside_rec.shape
        sat = int(np.sum(bad.saturated[:ny, :nx] & inside_rec))
        dead = int(np.sum(bad.dead[:ny, :nx] & inside_rec))
        specks = int(np.sum(bad.specks[:ny, :nx] & inside_rec))
    return {
        "mask_fraction": float(field.mask.mean()),
        "measured_fraction": float(measured.mean()),
        "source": field.source,
        "excluded": {
            "outside": int(field.outside.sum()) * f2,
            "saturated": sat,
            "dead": dead,
            "specks": specks,
        },
        "excluded_units": "recorded pixels",
        "full_scale": None if bad is None or bad.full_scale is None else float(bad.full_scale),
        "margin_um": float(margin_um),
    }


def notes_for(block: dict) -> list[str]:
    """Plain-words notes about the cell field (> 5 % outside, specks, bad pixels)."""
    out = []
    outside_frac = 1.0 - block["mask_fraction"]
    if outside_frac > 0.05:
        out.append(
            f"{100 * outside_frac:.0f} % of the frame is outside the cell field "
            f"({'from the mask file' if block['source'] == 'file' else 'found automatically: dish edge, empty regions, specks or bad pixels'}); "
            f"nothing is measured there nor within {block['margin_um']:.0f} um of its edge, and territories "
            "count only the cell field"
        )
    ex = block["excluded"]
    if ex["specks"]:
        out.append(f"static bright specks left out: {ex['specks']} pixels")
    if ex["saturated"] or ex["dead"]:
        out.append(f"camera pixels left out: {ex['saturated']} saturated, {ex['dead']} dead (constant)")
    return out


def attach_to_empty(analysis, field: preprocess.CellField, *, factor: int) -> None:
    """The cell-field block, notes and map of an analysis that found no waves (in place)."""
    block = summary_block(field, factor=factor, margin_um=0.0, measured=field.mask)
    analysis.summary["cell_field"] = block
    analysis.summary["analysis"]["notes"].extend(notes_for(block))
    analysis.maps["cell_mask"] = field.mask.astype(np.uint8)
