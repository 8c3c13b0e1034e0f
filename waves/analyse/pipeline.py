"""`analyse_movie`: the orchestrator of the passes."""

from __future__ import annotations

import math
import pathlib
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from waves import preprocess
from waves.analyse import brightness_pass, detect, drift_auto, plausible, strips
from waves.analyse import field as cell_field
from waves.analyse.clean import _bin_pass, _clean, _Movie, _progress
from waves.analyse.look import _dominant_period_frames, _wavelength_look, band_warnings
from waves.analyse.options import (
    HALO_PX,
    PAD_PERIODS,
    PIXELS_PER_WAVELENGTH,
    Analysis,
    AnalysisOptions,
)
from waves.analyse.segments import settle_margins, valid_windows
from waves.analyse.strips import _correct_smoothing_bias, _measure_strips, _strip_rows
from waves.analyse.summary import _empty_result, _grid, _summarise
from waves.analyse.timeaxis import GAP_MIN_FRAMES, margin_record, recording_block, time_axis
from waves.errors import InputError, WavesError
from waves.phase.analytic import passband_from_periods
from waves.preprocess.texture import correct_streaming
from waves.units import Calibration

# --------------------------------------------------------------------------- main entry


def analyse_movie(
    data: np.ndarray,
    *,
    calibration: Calibration,
    options: AnalysisOptions = AnalysisOptions(),  # noqa: B008 - a frozen dataclass (immutable)
    scratch_dir: pathlib.Path | None = None,
    progress: bool = False,
    times_s=None,
    valid_frames=None,
    cell_mask: np.ndarray | None = None,
) -> Analysis:
    """Analyse a (t, y, x) movie (memory-mapped or in memory) of the given
    calibration, e.g. `waves.io.read_stack(...).data` or a synthetic movie.

    times_s       (t,) acquisition time of every frame (s), e.g. a stack's
                  `times_s`; None: frame i at i x frame interval.  The movie is
                  resampled onto a uniform grid (waves.preprocess.timebase):
                  dropped frames are interpolated, gaps are left out of the
                  measurements.
    valid_frames  (t,) bool, False for frames other steps declare bad: they are
                  replaced by interpolation and left out of the measurements.
    cell_mask     (y, x) of the recorded frames, nonzero = cells: the cell field;
                  None: found automatically (preprocess.cellfield).

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
    warnings: list[str] = []
    notes: list[str] = []
    # the time axis: a uniform grid of frames (identity for a regular movie)
    tb, resampler, cal = time_axis(times_s, valid_frames, n_frames=nt, calibration=cal, notes=notes,
                                   warnings=warnings)
    recording = recording_block(tb, n_frames=nt, calibration=cal)
    nt = tb.n_grid if tb is not None else nt
    valid_grid = tb.valid if tb is not None else np.ones(nt, dtype=bool)
    dt_min = cal.frame_interval_min
    slips = plausible.calibration_warnings(cal.pixel_size_um, cal.frame_interval_s, (ny, nx))
    warnings += slips
    try:
        passband_user = passband_from_periods(options.period_band_min, frame_interval_s=cal.frame_interval_s,
                                              n_frames=nt)
    except WavesError as exc:  # a band the frames cannot resolve: say so with the likely unit slip
        raise type(exc)("; ".join([str(exc), *slips])) from None
    budget = options.memory_budget_mb * 1e6
    timings: dict = {}

    t0 = time.perf_counter()
    block = max(1, min(64, int(16e6 // max(ny * nx * 4, 1))))
    look_lag = drift_auto.look_lag_frames(options.period_band_min, dt_min, nt)
    # the first look on the frames as recorded and the bad-pixel scan need neither the drift
    # estimate nor the grid: with two workers they run on a second thread beside the estimate
    # (numpy, scipy.ndimage and skimage release the GIL; nothing compiled runs in parallel
    # there); only numpy arrays and memory maps are read from two threads at once
    scan = look_ahead = None
    if int(options.workers) > 1 and isinstance(data, np.ndarray):
        pool = ThreadPoolExecutor(max_workers=1)
        look_ahead = pool.submit(_wavelength_look, data, lag_frames=look_lag, compiled=False)
        scan = pool.submit(cell_field.scan, data, pixel_size_um=cal.pixel_size_um)
        pool.shutdown(wait=False)
    # stage drift, on every run; the first look sees frames put back and differenced
    drift_plan = drift_auto.plan(data, options.register)
    timings["drift_estimate_s"] = time.perf_counter() - t0
    if look_ahead is not None and drift_plan.look_shifts_px is None:
        lam = look_ahead.result()
    else:
        lam = _wavelength_look(data, shifts_px=drift_plan.look_shifts_px, lag_frames=look_lag)
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
    fplan = cell_field.plan(data, factor=factor, cell_mask=cell_mask, pixel_size_um=cal.pixel_size_um,
                            real_frames=None if tb is None else tb.recorded & ~tb.excluded,
                            bad=None if scan is None else scan.result())
    drift = drift_auto.on_grid(drift_plan, factor=factor, shape_b=(nyb, nxb), frame_interval_min=dt_min,
                               sigma_px=sigma_px)
    warnings += drift.warnings
    notes += drift.notes
    shifts_b = drift.shifts_b
    if shifts_b is not None and tb is not None:  # per recorded frame -> per frame of the time grid
        grid = np.arange(tb.n_grid, dtype=np.float64)
        shifts_b = np.stack([np.interp(grid, tb.slot, shifts_b[:, k]) for k in range(2)], axis=1)
    timings["cell_field_s"] = time.perf_counter() - t_field
    movie = _Movie((nt, nyb, nxb), in_memory=nt * nyb * nxb * 4 <= 0.5 * budget, folder=scratch_dir)
    try:
        bar = _progress(2 * ((nt + block - 1) // block), "reading and cleaning frames", progress)
        first_half = np.zeros((nyb, nxb), dtype=np.float64)
        mean_b = _bin_pass(data, factor=factor, movie=movie, block=block, bar=bar, resampler=resampler,
                           weight=fplan.weight, coverage=fplan.coverage, stats=fplan.stats, workers=int(options.workers),
                           first_half=first_half)
        t_field = time.perf_counter()
        cells = cell_field.find(fplan, mean_b, pixel_size_um=px_um,
                                wavelength_px=lam / factor if lam is not None else None)
        timings["cell_field_s"] += time.perf_counter() - t_field  # scan and mask; the statistics ride the binning
        bright = None
        if options.brightness:  # lamp fade and flicker (waves.preprocess.brightness)
            t_bright = time.perf_counter()
            bright = brightness_pass.estimate(
                movie, mean_b, block=block, slow_frames=options.period_band_min[1] / dt_min, cell_mask=cells.mask,
                lag_frames=look_lag, workers=int(options.workers))
            timings["brightness_s"] = time.perf_counter() - t_bright
        _clean(sigma_px=sigma_px, options=options, movie=movie, mean_b=mean_b, factor=factor, block=block,
               bar=bar, workers=int(options.workers), notes=notes, brightness=bright, field_mask=cells.mask,
               shifts=shifts_b, first_half=first_half)
        if bright is not None:
            brightness_pass.replace_flicker(movie, bright)
            brightness_block = brightness_pass.report(bright, notes=notes, warnings=warnings)
            if bright.flicker.any():  # interpolated, and left out of every measurement like a dropped frame
                valid_grid = valid_grid & ~bright.flicker
                recording["excluded_frames"] = sorted(set(recording.get("excluded_frames") or [])
                                                      | set(np.flatnonzero(bright.flicker).tolist()))
                recording["invalid_frames"] = np.flatnonzero(~valid_grid).tolist()
        else:
            brightness_block = {"method": "not estimated: the mean image has no light (background-subtracted "
                                          "data)" if options.brightness else "off (--no-brightness)"}
        bar.close()
        # the texture step's background keeps periods up to the band's top; the measurements look
        # no further than twice the dominant period (the pass band below), nor need it to
        period_pre, _ = _dominant_period_frames(movie, passband_user)
        texture_band = options.period_band_min
        if period_pre is not None:
            texture_band = (texture_band[0], max(texture_band[0] * 1.5, min(texture_band[1], 2.0 * period_pre * dt_min)))
        texture, note = correct_streaming(movie.frames, movie.write, movie.shape, smoothing_px=sigma_px,
                                          pixel_size_um=px_um, frame_interval_s=cal.frame_interval_s,
                                          period_band_min=texture_band)
        notes.extend([note] if note else [])
        timings["clean_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        # are there waves at all? each pixel against red noise fitted to itself (waves.analyse.detect)
        if detect.MIN_CYCLES / nt > passband_user[1]:
            raise InputError(
                f"too few frames: the movie holds {nt} frames ({nt * dt_min:.3g} min), fewer than "
                f"{detect.MIN_CYCLES:g} periods of the band's shortest period ({options.period_band_min[0]:g} min); "
                "waves cannot be told from noise, nor measured")
        # (with the measurement's own per-pixel detrend, when it has one)
        found = detect.detect(movie, passband_user, field_mask=cells.mask, detrend_degree=strips.DETREND_DEGREE)
        period0, _ = (_dominant_period_frames(movie, passband_user, significant=found.significant)
                               if found.detected else (None, found.fraction))
        timings["detection_s"] = time.perf_counter() - t0
        if period0 is None:
            hint = band_warnings(movie, passband_user, None, frame_interval_min=dt_min,
                                 band_min=options.period_band_min)
            said = (found.statement(dt_min) if not found.detected else
                    "no waves measured: the pixels with a significant periodic signal give no dominant period; "
                    "period, speed, wavelength, cores and centres are not reported")
            warnings.append(
                said + f" (period band {options.period_band_min[0]:g}-{options.period_band_min[1]:g} min)"
                + (
                    f"; the movie lasts {nt * dt_min:.1f} min, less than two periods at the band's upper "
                    "end: too few frames to find slow waves"
                    if nt * dt_min < 2 * options.period_band_min[1]
                    else ""
                )
            )
            warnings += hint
            grid = _grid(cal, factor)
            empty = _empty_result(cal, options, warnings, notes, sigma_px * px_um, mean_b, grid, timings, t_start)
            empty.summary["recording"] = recording
            empty.summary["brightness"] = brightness_block
            empty.summary["drift"] = drift.summary
            empty.tables["drift"] = drift.table
            empty.maps["covered"] = drift.covered
            empty.summary["texture"] = texture
            empty.summary["detection"] = found.block() | {"statement": said}
            empty.maps["significant_wave"] = found.significant.astype(np.uint8)
            cell_field.attach_to_empty(empty, cells, factor=factor)
            return empty
        hidden = band_warnings(movie, passband_user, period0, frame_interval_min=dt_min,
                               band_min=options.period_band_min)
        warnings += hidden
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
                + "".join(f"; {w}" for w in hidden)
            )
        win = max(4, min(int(round(options.window_periods * period0)), usable))
        step = max(1, win // 2)
        # no measurement next to a gap either, while the band-pass settles
        measured = settle_margins(valid_grid, period_frames=period0, min_run=GAP_MIN_FRAMES)
        margin_record(recording, valid_grid & ~measured, calibration=cal, notes=notes)
        valid_phase = measured[trim : trim + usable]
        if valid_phase.all():
            windows = [(s, s + win) for s in range(0, usable - win + 1, step)]
        else:  # windows only inside valid stretches
            windows = valid_windows(valid_phase, win=win, step=step)
        pad = min(nt - 1, int(math.ceil(PAD_PERIODS * period0)))  # mirrored frames each end before the FFT
        maps = _measure_strips(
            movie,
            passband=passband,
            trim=trim,
            windows=windows,
            rows_per_strip=_strip_rows(nyb, nxb, nt + 2 * pad, 0.5 * budget),  # the padding costs memory too
            period_frames=period0,
            lag=lag,
            workers=options.workers,
            progress=progress,
            valid=valid_phase,
            pad_frames=pad,
            sigma_px=sigma_px if sigma_px > 0.3 else 0.0,
        )
        _correct_smoothing_bias(maps, sigma_px=sigma_px if sigma_px > 0.3 else 0.0, factor=factor,
                                workers=int(options.workers))
        amplitude_units = "counts"
        if float(mean_b.max()) > 0:  # fractional modulation: the signal floor must not follow the illumination
            dish = preprocess.dish_mask(mean_b)
            if float(mean_b[dish].mean()) > 0:
                maps.amplitude = preprocess.relative_amplitude(
                    maps.amplitude, mean_b, sigma_px=max(mean_b.shape) / 8.0, mask=dish, flattened=options.flatten)
                amplitude_units = "fraction of the local mean brightness"
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
        frame_ok=valid_phase,
        cells=cells,
        margin_px=cell_field.preprocess.margin_px(sigma_px if sigma_px > 0.3 else 0.0, HALO_PX),
        covered=drift.covered,
        significant=found.significant,
    )
    result[0]["detection"] = found.block()
    result[1]["significant_wave"] = found.significant.astype(np.uint8)
    result[0]["recording"] = recording
    result[0]["brightness"] = brightness_block
    result[0]["analysis"]["amplitude_units"] = amplitude_units
    result[0]["drift"] = drift.summary
    result[2]["drift"] = drift.table
    result[0]["texture"] = texture
    unlikely = plausible.result_warnings(result[0])
    warnings += unlikely
    result[0]["warnings"] = list(result[0]["warnings"]) + unlikely
    timings["summary_s"] = time.perf_counter() - t0
    timings["total_s"] = time.perf_counter() - t_start
    return Analysis(summary=result[0], maps=result[1], tables=result[2], stacks=result[3], warnings=tuple(warnings),
                    timings_s=timings)
