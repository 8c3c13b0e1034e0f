"""`analyse_movie`: the orchestrator of the passes."""

from __future__ import annotations

import math
import pathlib
import time

import numpy as np

from waves.analyse import field as cell_field
from waves.analyse.clean import _bin_pass, _clean, _Movie, _progress
from waves.analyse.look import _dominant_period_frames, _wavelength_look
from waves.analyse.options import HALO_PX, PIXELS_PER_WAVELENGTH, Analysis, AnalysisOptions
from waves.analyse.strips import _correct_smoothing_bias, _measure_strips, _strip_rows
from waves.analyse.summary import _empty_result, _grid, _summarise
from waves.errors import InputError, WavesError
from waves.phase.analytic import passband_from_periods
from waves.units import Calibration

# --------------------------------------------------------------------------- main entry


def analyse_movie(
    data: np.ndarray,
    *,
    calibration: Calibration,
    options: AnalysisOptions = AnalysisOptions(),  # noqa: B008 - a frozen dataclass (immutable)
    scratch_dir: pathlib.Path | None = None,
    progress: bool = False,
    cell_mask: np.ndarray | None = None,
) -> Analysis:
    """Analyse a (t, y, x) movie (memory-mapped or in memory) of the given
    calibration, e.g. `waves.io.read_stack(...).data` or a synthetic movie.

    `cell_mask` (recorded-frame shape, nonzero = cells) gives the cell field;
    without it the field is found automatically (preprocess.cellfield).

    When the cleaned movie does not fit half the memory budget it is kept in
    a scratch file in `scratch_dir` (default: the system's temporary folder)
    while the analysis runs.
    """
    t_start = time.perf_counter()
    cal = calibration
    if not isinstance(cal, Calibration):
        raise WavesError("calibration must be a waves.units.Calibration")
    if getattr(data, "ndim", None) != 3:
        raise InputError(f"a movie must be a (t, y, x) array, got shape {getattr(data, 'shape', None)}")
    nt, ny, nx = (int(v) for v in data.shape)
    if ny < 8 or nx < 8:
        raise InputError(f"frames of {ny} x {nx} pixels are too small to analyse; need at least 8 x 8")
    dt_min = cal.frame_interval_min
    warnings: list[str] = []
    notes: list[str] = []
    passband_user = passband_from_periods(options.period_band_min, frame_interval_s=cal.frame_interval_s, n_frames=nt)
    budget = options.memory_budget_mb * 1e6
    timings: dict = {}

    t0 = time.perf_counter()
    block = max(1, min(64, int(16e6 // max(ny * nx * 4, 1))))
    lam = _wavelength_look(data)
    if options.analysis_bin is not None:
        factor = int(options.analysis_bin)
    else:
        factor = max(1, int(lam // PIXELS_PER_WAVELENGTH)) if lam is not None else 1
    factor = min(factor, max(1, min(ny, nx) // 16))
    px_um = cal.pixel_size_um * factor
    if options.smooth_sigma_um is not None:
        sigma_px = options.smooth_sigma_um / px_um
    else:
        sigma_px = min(lam / factor / 12.0, 8.0) if lam is not None else 1.0
    nyb, nxb = ny // factor, nx // factor
    t_field = time.perf_counter()
    fplan = cell_field.plan(data, factor=factor, cell_mask=cell_mask, pixel_size_um=cal.pixel_size_um)
    timings["cell_field_s"] = time.perf_counter() - t_field
    movie = _Movie((nt, nyb, nxb), in_memory=nt * nyb * nxb * 4 <= 0.5 * budget, folder=scratch_dir)
    try:
        bar = _progress(2 * ((nt + block - 1) // block), "reading and cleaning frames", progress)
        mean_b = _bin_pass(data, factor=factor, movie=movie, block=block, bar=bar, weight=fplan.weight,
                           coverage=fplan.coverage, stats=fplan.stats)
        t_field = time.perf_counter()
        cells = cell_field.find(fplan, mean_b, pixel_size_um=px_um,
                                wavelength_px=lam / factor if lam is not None else None)
        timings["cell_field_s"] += time.perf_counter() - t_field  # scan and mask; the statistics ride the binning
        _clean(sigma_px=sigma_px, options=options, movie=movie, mean_b=mean_b, factor=factor, block=block,
               bar=bar, workers=int(options.workers), notes=notes, field_mask=cells.mask)
        bar.close()
        timings["clean_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        period0, clear_frac = _dominant_period_frames(movie, passband_user)
        if period0 is None:
            warnings.append(
                "no waves found: no periodic signal stands out of the noise in the period band "
                f"{options.period_band_min[0]:g}-{options.period_band_min[1]:g} min "
                f"({100 * clear_frac:.0f} % of sampled pixels show a clear spectral peak); "
                "period, speed and cores are not reported"
                + (
                    f"; the movie lasts {nt * dt_min:.1f} min, less than two periods at the band's upper "
                    "end: too few frames to find slow waves"
                    if nt * dt_min < 2 * options.period_band_min[1]
                    else ""
                )
            )
            grid = _grid(cal, factor)
            empty = _empty_result(cal, options, warnings, notes, sigma_px * px_um, mean_b, grid, timings, t_start)
            cell_field.attach_to_empty(empty, cells, factor=factor)
            return empty
        f0 = 1.0 / period0
        passband = (max(passband_user[0], 0.5 * f0), min(passband_user[1], 1.6 * f0))
        trim = int(math.ceil(0.75 * period0))
        lag = max(1, int(round(period0 / 4))) if options.phase_method == "delay" else None
        usable = nt - 2 * trim - (lag or 0)
        if usable < 2 * period0:
            raise InputError(
                f"too few frames: the movie holds {nt} frames, {nt / period0:.1f} periods of "
                f"{period0 * dt_min:.1f} min; at least {int(math.ceil(3.5 * period0))} frames "
                "(3.5 periods) are needed to trim filter edges and still count two cycles"
            )
        win = max(4, min(int(round(options.window_periods * period0)), usable))
        step = max(1, win // 2)
        windows = [(s, s + win) for s in range(0, usable - win + 1, step)]
        maps = _measure_strips(
            movie,
            passband=passband,
            trim=trim,
            windows=windows,
            rows_per_strip=_strip_rows(nyb, nxb, nt, 0.5 * budget),
            period_frames=period0,
            lag=lag,
            workers=options.workers,
            progress=progress,
        )
        _correct_smoothing_bias(maps, sigma_px=sigma_px if sigma_px > 0.3 else 0.0, factor=factor)
        timings["strips_s"] = time.perf_counter() - t0
    finally:
        movie.close()

    t0 = time.perf_counter()
    result = _summarise(
        maps,
        cal=cal,
        factor=factor,
        options=options,
        period0=period0,
        passband=passband,
        trim=trim,
        lag=lag,
        windows=windows,
        usable=usable,
        sigma_px=sigma_px,
        mean_b=mean_b,
        warnings=warnings,
        notes=notes,
        cells=cells,
        margin_px=cell_field.preprocess.margin_px(sigma_px if sigma_px > 0.3 else 0.0, HALO_PX),
    )
    timings["summary_s"] = time.perf_counter() - t0
    timings["total_s"] = time.perf_counter() - t_start
    return Analysis(summary=result[0], maps=result[1], tables=result[2], stacks=result[3], warnings=tuple(warnings),
                    timings_s=timings)
