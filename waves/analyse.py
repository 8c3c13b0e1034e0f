"""The analysis pipeline: a calibrated stack -> period, front speed,
wavelength and spiral cores, in bounded memory.

Two passes over the movie:

1. Frame blocks: illumination flattening (a gain from the temporal-mean
   image), optional drift correction, spatial smoothing; the cleaned movie
   goes to a float32 scratch file beside the outputs.  A sparse set of rows
   then gives the dominant period, which sets the band-pass and how many
   frames at each end are trimmed (filter edges make false singularities).
2. Spatial tiles (all frames, a small halo): analytic signal with the
   band-pass in the same FFT, phase and amplitude, period per pixel from
   whole phase cycles, phase velocity and wavelength (whole movie and time
   windows), activation-time plane fits, and topological charges.  Peak
   memory is set by the tile, which is sized from a memory budget.

Cores are detected per frame from the collected charges, tracked, and kept
when they live for at least about one period.  Everything in pixels and
frames until the end, where the calibration turns it into um, minutes and
um/min.  Band polarity does not matter: amplitude and phase winding are the
same for bright and dark bands.
"""

from __future__ import annotations

import math
import os
import pathlib
import tempfile
import time
import warnings as warnings_module
from dataclasses import asdict, dataclass, field

import numpy as np
import scipy.ndimage

from waves import __version__
from waves.errors import InputError, WavesError
from waves.measure.period import period_from_cycles, quartiles, spectral_period
from waves.measure.speed import (
    activation_fit_speed,
    activation_times,
    windowed_phase_velocity,
)
from waves.phase import tracking
from waves.phase.analytic import analytic_signal, passband_from_periods, phase_and_amplitude
from waves.phase.charge import plaquette_charge
from waves import preprocess
from waves.units import Calibration

__all__ = ["AnalysisOptions", "Analysis", "analyse_movie", "DEFAULT_PERIOD_BAND_MIN"]

# Trade-sensible default: aggregating fields show periods of about 8-10 min
# early falling to 2-4 min late (REFERENCES.md, [memory]); 6 min is typical.
DEFAULT_PERIOD_BAND_MIN = (2.0, 20.0)

HALO_PX = 3  # gradient (1) + activation-fit radius (2)
FIT_RADIUS_PX = 2


@dataclass(frozen=True)
class AnalysisOptions:
    """What `analyse_movie` does.  Units in the names."""

    period_band_min: tuple[float, float] = DEFAULT_PERIOD_BAND_MIN
    flatten: bool = True
    register: bool = False
    smooth_sigma_um: float | None = None  # None: wavelength / 12, from a first look
    min_amplitude: float | None = None  # signal floor of the amplitude map; None: Otsu
    min_coherence: float = 0.8  # speed only where the wave direction is steady
    persistent_periods: float = 1.0  # a core must live this many periods
    window_periods: float = 3.0  # period time course: window length in periods
    memory_budget_mb: float = 400.0
    workers: int = 2

    def __post_init__(self) -> None:
        lo, hi = self.period_band_min
        if not (0 < lo < hi):
            raise WavesError(
                f"period band must be two increasing positive numbers of minutes, got {self.period_band_min!r}"
            )
        if self.smooth_sigma_um is not None and self.smooth_sigma_um < 0:
            raise WavesError("smoothing sigma must be zero or positive (um)")
        if not 0 <= self.min_coherence < 1:
            raise WavesError(f"min_coherence must be in [0, 1), got {self.min_coherence!r}")
        if self.min_amplitude is not None and not self.min_amplitude >= 0:
            raise WavesError("min_amplitude must be zero or positive")
        for name in ("persistent_periods", "window_periods", "memory_budget_mb"):
            if not getattr(self, name) > 0:
                raise WavesError(f"{name} must be positive")


@dataclass(frozen=True)
class Analysis:
    """Everything an analysis found, in calibrated units, ready to write."""

    summary: dict
    maps: dict  # name -> (y, x) float32 array, names carry units
    tables: dict  # name -> {column: 1-D array}
    warnings: tuple[str, ...]
    timings_s: dict = field(default_factory=dict)


# --------------------------------------------------------------------------- helpers


def _progress(total: int, desc: str, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="block", disable=not enabled, leave=False)


def _dominant_wavelength_px(sample: np.ndarray) -> float | None:
    """Dominant spatial wavelength (pixels) of mean-removed frames from their
    radially averaged power spectrum; None when there is no clear peak."""
    x = sample - sample.mean(axis=0, keepdims=True)
    ny, nx = x.shape[1:]
    win = np.outer(np.hanning(ny), np.hanning(nx)).astype(np.float32)
    power = (np.abs(np.fft.rfft2(x * win)) ** 2).mean(axis=0)
    fy = np.fft.fftfreq(ny)[:, None]
    fx = np.fft.rfftfreq(nx)[None, :]
    fr = np.hypot(fy, fx)
    df = 1.0 / max(ny, nx)
    bins = np.rint(fr / df).astype(int)
    nb = bins.max() + 1
    radial = np.bincount(bins.ravel(), power.ravel(), nb) / np.maximum(np.bincount(bins.ravel(), None, nb), 1)
    lo = 2  # ignore the field-size scale
    hi = int(0.5 / df)  # below the pixel Nyquist
    if hi <= lo + 1:
        return None
    k = lo + int(np.argmax(radial[lo:hi]))
    return 1.0 / (k * df)


def _tile_plan(ny: int, nx: int, nt: int, budget_bytes: float) -> int:
    """Tile side (pixels) so that one tile's working set fits the budget.

    Per pixel and frame a tile holds about 48 bytes: the float32 input, the
    complex64 analytic signal, its product with the next frame, phase,
    amplitude and two gradient components.
    """
    per_pixel = nt * 48.0
    side = int(math.sqrt(max(budget_bytes / per_pixel, 64.0)))
    return max(16, min(side, max(ny, nx)))


def _scratch_path(out_dir: pathlib.Path | None) -> pathlib.Path:
    folder = out_dir if out_dir is not None else pathlib.Path(tempfile.gettempdir())
    folder.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=".waves-scratch-", suffix=".f32", dir=folder)
    os.close(fd)
    return pathlib.Path(name)


# --------------------------------------------------------------------------- pass 1


def _clean_movie(data, cal: Calibration, options: AnalysisOptions, scratch: pathlib.Path, progress: bool, notes: list):
    """Flatten, register and smooth every frame into a float32 scratch file.

    Returns the memmap of the cleaned movie, the temporal-mean image and the
    smoothing sigma used (pixels)."""
    nt, ny, nx = data.shape
    px_um = cal.pixel_size_um
    block = max(1, int(32e6 // max(ny * nx * 4, 1)))
    mean = np.zeros((ny, nx), dtype=np.float64)
    lo = np.inf
    hi = -np.inf
    for t0 in range(0, nt, block):
        b = np.asarray(data[t0 : t0 + block], dtype=np.float32)
        if not np.isfinite(b).all():
            raise InputError(
                f"frames {t0}-{t0 + len(b) - 1} hold NaN or infinite values; "
                "replace them or choose other frames"
            )
        mean += b.sum(axis=0, dtype=np.float64)
        lo = min(lo, float(b.min()))
        hi = max(hi, float(b.max()))
    mean /= nt
    if hi - lo <= 0:
        raise InputError(
            f"the movie is flat: every pixel of every frame is {lo:g}; there are no waves to measure"
        )
    mean32 = mean.astype(np.float32)

    shifts = None
    if options.register:
        shifts = preprocess.estimate_drift(data)
        notes.append(
            f"drift corrected: largest shift {np.abs(shifts).max():.2f} px"
        )

    gain = None
    if options.flatten and float(mean32.max()) > 0:
        # a dark surround outside the dish must not enter the gain fit
        dish = preprocess.dish_mask(mean32)
        gain = preprocess.illumination_gain(mean32, sigma_px=max(ny, nx) / 8.0, mask=dish)
        gain = np.maximum(gain, 1e-3 * float(gain.max()))

    # smoothing scale from a first look at the waves
    if options.smooth_sigma_um is not None:
        sigma_px = options.smooth_sigma_um / px_um
    else:
        idx = np.linspace(0, nt - 1, min(nt, 24)).astype(int)
        sample = np.asarray(data[idx], dtype=np.float32)
        if gain is not None:
            sample = sample / gain
        lam = _dominant_wavelength_px(sample)
        sigma_px = 1.0 if lam is None else min(max(lam / 12.0, 0.0), 8.0)

    out = np.lib.format.open_memmap(scratch, mode="w+", dtype=np.float32, shape=(nt, ny, nx))
    bar = _progress((nt + block - 1) // block, "cleaning frames", progress)
    for t0 in range(0, nt, block):
        b = np.asarray(data[t0 : t0 + block], dtype=np.float32)
        if shifts is not None:
            b = preprocess.apply_drift(b, shifts[t0 : t0 + len(b)])
        if gain is not None:
            b = b / gain
        if sigma_px > 0.3:
            b = preprocess.smooth_space(b, sigma_px=sigma_px)
        out[t0 : t0 + len(b)] = b
        bar.update(1)
    bar.close()
    out.flush()
    return out, mean32, sigma_px


def _dominant_period_frames(movie: np.ndarray, passband: tuple[float, float]) -> tuple[float | None, float]:
    """Median dominant period (frames) over a sparse grid of pixels, and the
    fraction of those pixels whose spectral peak stands clear of the noise."""
    nt, ny, nx = movie.shape
    step_r = max(1, ny // 24)
    step_c = max(1, nx // 24)
    rows = np.asarray(movie[:, ::step_r, :], dtype=np.float32)[:, :, ::step_c]
    x = rows.reshape(nt, -1)
    x = x - x.mean(axis=0)
    spec = np.abs(np.fft.rfft(x * np.hanning(nt)[:, None].astype(np.float32), axis=0)) ** 2
    f = np.fft.rfftfreq(nt)
    band = (f >= passband[0]) & (f <= passband[1])
    if band.sum() < 3:
        return None, 0.0
    pb = spec[band]
    # a noise spectrum is flat: its peak is a few times its median; waves stand far out
    clear = pb.max(axis=0) > 20.0 * np.median(pb, axis=0) + 1e-30
    frac = float(clear.mean())
    if frac < 0.1:
        return None, frac
    periods = spectral_period(x[:, clear], passband=passband)
    periods = periods[np.isfinite(periods)]
    if periods.size == 0:
        return None, frac
    return float(np.median(periods)), frac


# --------------------------------------------------------------------------- pass 2


@dataclass
class _Accumulators:
    amplitude: np.ndarray
    period: np.ndarray
    speed: np.ndarray
    direction: np.ndarray
    coherence: np.ndarray
    fit_speed: np.ndarray
    n_waves: np.ndarray
    win_period: np.ndarray
    win_speed: np.ndarray
    win_coherence: np.ndarray
    charges: list  # of int64 (n, 4) arrays: frame, row, col, charge


def _analyse_tiles(movie, *, passband, trim, windows, tile, period_frames, workers, progress):
    nt, ny, nx = movie.shape
    nw = len(windows)
    acc = _Accumulators(
        amplitude=np.full((ny, nx), np.nan, np.float32),
        period=np.full((ny, nx), np.nan, np.float32),
        speed=np.full((ny, nx), np.nan, np.float32),
        direction=np.full((ny, nx), np.nan, np.float32),
        coherence=np.full((ny, nx), np.nan, np.float32),
        fit_speed=np.full((ny, nx), np.nan, np.float32),
        n_waves=np.zeros((ny, nx), np.int32),
        win_period=np.full((nw, ny, nx), np.nan, np.float32),
        win_speed=np.full((nw, ny, nx), np.nan, np.float32),
        win_coherence=np.full((nw, ny, nx), np.nan, np.float32),
        charges=[],
    )
    starts_r = list(range(0, ny, tile))
    starts_c = list(range(0, nx, tile))
    bar = _progress(len(starts_r) * len(starts_c), "phase, period, speed, cores", progress)
    keep = slice(trim, nt - trim)
    for r0 in starts_r:
        r1 = min(ny, r0 + tile)
        a0, a1 = max(0, r0 - HALO_PX), min(ny, r1 + HALO_PX)
        for c0 in starts_c:
            c1 = min(nx, c0 + tile)
            b0, b1 = max(0, c0 - HALO_PX), min(nx, c1 + HALO_PX)
            block = np.asarray(movie[:, a0:a1, b0:b1], dtype=np.float32)
            z = analytic_signal(block, passband=passband, workers=workers)[keep]
            del block
            phase, amp = phase_and_amplitude(z)
            inner = (slice(r0 - a0, r0 - a0 + (r1 - r0)), slice(c0 - b0, c0 - b0 + (c1 - c0)))
            acc.amplitude[r0:r1, c0:c1] = amp.mean(axis=0)[inner]
            prod = z[1:] * np.conj(z[:-1])
            adv = np.arctan2(prod.imag, prod.real).astype(np.float32)
            del prod
            acc.period[r0:r1, c0:c1] = period_from_cycles(adv[(slice(None),) + inner])
            pvs = windowed_phase_velocity(z, windows=[(0, z.shape[0])] + list(windows))
            full = pvs[0]
            acc.speed[r0:r1, c0:c1] = full.speed_px_per_frame[inner]
            acc.direction[r0:r1, c0:c1] = full.direction_rad[inner]
            acc.coherence[r0:r1, c0:c1] = full.coherence[inner]
            for i, (w0, w1) in enumerate(windows):
                acc.win_period[i, r0:r1, c0:c1] = period_from_cycles(adv[(slice(w0, w1 - 1),) + inner])
                acc.win_speed[i, r0:r1, c0:c1] = pvs[i + 1].speed_px_per_frame[inner]
                acc.win_coherence[i, r0:r1, c0:c1] = pvs[i + 1].coherence[inner]
            del z, adv, pvs
            times, counts = activation_times(phase)
            sp, _ = activation_fit_speed(
                times, counts, radius_px=FIT_RADIUS_PX, max_dt_frames=period_frames / 3.0
            )
            with warnings_module.catch_warnings():
                # all-NaN pixels (no fit) give NaN, as intended
                warnings_module.simplefilter("ignore", RuntimeWarning)
                med = np.nanmedian(sp, axis=2)
            acc.fit_speed[r0:r1, c0:c1] = med[inner]
            acc.n_waves[r0:r1, c0:c1] = np.isfinite(sp).sum(axis=2)[inner]
            del times, counts, sp
            # charges of plaquettes whose top-left pixel is in the tile
            pr1 = min(r1 + 1, a1)
            pc1 = min(c1 + 1, b1)
            ph = phase[:, r0 - a0 : pr1 - a0, c0 - b0 : pc1 - b0]
            q = plaquette_charge(ph)
            t_i, r_i, c_i = np.nonzero(q)
            if t_i.size:
                acc.charges.append(
                    np.stack([t_i, r_i + r0, c_i + c0, q[t_i, r_i, c_i].astype(np.int64)], axis=1)
                )
            del phase, amp, q
            bar.update(1)
    bar.close()
    return acc


def _detect_and_track(charges, *, signal, n_frames, period_frames):
    """Cores per frame from the collected plaquette charges (only plaquettes
    whose top-left pixel carries a signal), then tracks."""
    ny, nx = signal.shape
    allq = np.concatenate(charges, axis=0) if charges else np.zeros((0, 4), dtype=np.int64)
    allq = allq[signal[allq[:, 1], allq[:, 2]]]
    tables = []
    block = 64
    for f0 in range(0, n_frames, block):
        f1 = min(n_frames, f0 + block)
        sel = allq[(allq[:, 0] >= f0) & (allq[:, 0] < f1)]
        q = np.zeros((f1 - f0, ny - 1, nx - 1), dtype=np.int8)
        if len(sel):
            q[sel[:, 0] - f0, sel[:, 1], sel[:, 2]] = sel[:, 3].astype(np.int8)
        tables.append(tracking.detect_cores_stack(q, first_frame=f0))
    detections = tracking.concat_tables(tables)
    max_step = max(2.0, 0.1 * period_frames)
    tracks = tracking.track_cores(detections, max_step_px=max_step, max_gap_frames=2)
    return detections, tracks


# --------------------------------------------------------------------------- main entry


def analyse_movie(
    data: np.ndarray,
    *,
    calibration: Calibration,
    options: AnalysisOptions = AnalysisOptions(),
    scratch_dir: pathlib.Path | None = None,
    progress: bool = False,
) -> Analysis:
    """Analyse a (t, y, x) movie (memory-mapped or in memory) of the given
    calibration, e.g. `waves.io.read_stack(...).data` or a synthetic movie.

    A scratch file of the cleaned movie (float32, t x y x 4 bytes) is kept in
    `scratch_dir` (default: the system's temporary folder) while it runs.
    """
    t_start = time.perf_counter()
    cal = calibration
    if not isinstance(cal, Calibration):
        raise WavesError("calibration must be a waves.units.Calibration")
    if getattr(data, "ndim", None) != 3:
        raise InputError(
            f"a movie must be a (t, y, x) array, got shape {getattr(data, 'shape', None)}"
        )
    nt, ny, nx = (int(v) for v in data.shape)
    dt_min = cal.frame_interval_min
    px_um = cal.pixel_size_um
    warnings: list[str] = []
    notes: list[str] = []
    if ny < 8 or nx < 8:
        raise InputError(f"frames of {ny} x {nx} pixels are too small to analyse; need at least 8 x 8")

    passband_user = passband_from_periods(options.period_band_min, frame_interval_s=cal.frame_interval_s, n_frames=nt)
    scratch = _scratch_path(scratch_dir)
    timings = {}
    try:
        t0 = time.perf_counter()
        movie, mean_image, sigma_px = _clean_movie(data, cal, options, scratch, progress, notes)
        timings["clean_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        period0, clear_frac = _dominant_period_frames(movie, passband_user)
        if period0 is None:
            warnings.append(
                "no waves found: no periodic signal stands out of the noise in the period band "
                f"{options.period_band_min[0]:g}-{options.period_band_min[1]:g} min "
                f"({100 * clear_frac:.0f} % of sampled pixels show a clear spectral peak); "
                "period, speed and cores are not reported"
            )
            return _empty_result(cal, options, warnings, notes, sigma_px, mean_image, timings, t_start)
        f0 = 1.0 / period0
        passband = (max(passband_user[0], 0.5 * f0), min(passband_user[1], 1.6 * f0))
        trim = int(math.ceil(0.75 * period0))
        usable = nt - 2 * trim
        if usable < 2 * period0:
            raise InputError(
                f"too few frames: the movie holds {nt} frames, {nt / period0:.1f} periods of "
                f"{period0 * dt_min:.1f} min; at least {int(math.ceil(3.5 * period0))} frames "
                "(3.5 periods) are needed to trim filter edges and still count two cycles"
            )
        win = int(round(options.window_periods * period0))
        win = max(4, min(win, usable))
        step = max(1, win // 2)
        windows = [(s, s + win) for s in range(0, usable - win + 1, step)]
        tile = _tile_plan(ny, nx, nt, options.memory_budget_mb * 1e6)
        acc = _analyse_tiles(
            movie,
            passband=passband,
            trim=trim,
            windows=windows,
            tile=tile,
            period_frames=period0,
            workers=options.workers,
            progress=progress,
        )
        timings["tiles_s"] = time.perf_counter() - t0
    finally:
        try:
            del movie
        except NameError:
            pass
        try:
            scratch.unlink()
        except FileNotFoundError:
            pass

    t0 = time.perf_counter()
    amp = np.nan_to_num(acc.amplitude, nan=0.0)
    # small low-amplitude holes (spiral cores oscillate weakly) stay inside
    wl_guess = float(np.nanmedian(acc.speed * acc.period))
    hole = int(max(64, (0.5 * wl_guess) ** 2)) if np.isfinite(wl_guess) else 64
    valid = preprocess.signal_mask(amp, threshold=options.min_amplitude, min_size_px=hole)
    _, tracks = _detect_and_track(acc.charges, signal=valid, n_frames=usable, period_frames=period0)
    min_life = max(1, int(round(options.persistent_periods * period0)))
    persistent = tracking.persistent_tracks(tracks, min_lifetime_frames=min_life)
    timings["cores_s"] = time.perf_counter() - t0

    # speeds only where the direction is steady and away from persistent cores
    speed_ok = valid & (acc.coherence >= options.min_coherence)
    per = persistent.tracks
    if len(per["track_id"]):
        rr, cc = np.mgrid[0:ny, 0:nx]
        wl_px = np.nanmedian(np.where(valid, acc.speed * acc.period, np.nan))
        rad = 0.5 * wl_px if np.isfinite(wl_px) else 5.0
        for r, c in zip(per["mean_row"], per["mean_col"]):
            speed_ok &= np.hypot(rr - r, cc - c) > rad

    to_min = dt_min
    to_um_per_min = px_um / dt_min
    period_min_map = np.where(valid, acc.period * to_min, np.nan).astype(np.float32)
    speed_map = np.where(speed_ok, acc.speed * to_um_per_min, np.nan).astype(np.float32)
    wavelength_map = (speed_map * period_min_map).astype(np.float32)
    fit_map = np.where(speed_ok, acc.fit_speed * to_um_per_min, np.nan).astype(np.float32)
    direction_deg = np.where(speed_ok, np.rad2deg(acc.direction), np.nan).astype(np.float32)

    # period time course and dispersion points (per window, per region)
    t_offset = trim
    course = []
    disp_rows = {k: [] for k in ("window", "t_min", "region", "period_min", "speed_um_per_min", "n_pixels")}
    nreg = 3
    reg_r = np.minimum((np.arange(ny) * nreg) // ny, nreg - 1)
    reg_c = np.minimum((np.arange(nx) * nreg) // nx, nreg - 1)
    region = reg_r[:, None] * nreg + reg_c[None, :]
    for i, (w0, w1) in enumerate(windows):
        t_mid = (t_offset + 0.5 * (w0 + w1)) * dt_min
        pw = np.where(valid, acc.win_period[i], np.nan)
        q = quartiles(pw * to_min)
        if q is not None:
            course.append({"t_min": float(t_mid), "period_min": q["median"], "q25": q["q25"], "q75": q["q75"]})
        sw_ok = valid & (acc.win_coherence[i] >= options.min_coherence) & speed_ok
        for g in range(nreg * nreg):
            m = sw_ok & (region == g) & np.isfinite(pw)
            if m.sum() < 10:
                continue
            disp_rows["window"].append(i)
            disp_rows["t_min"].append(t_mid)
            disp_rows["region"].append(g)
            disp_rows["period_min"].append(float(np.median(pw[m])) * to_min)
            disp_rows["speed_um_per_min"].append(float(np.median(acc.win_speed[i][m])) * to_um_per_min)
            disp_rows["n_pixels"].append(int(m.sum()))
    dispersion = {
        "window": np.asarray(disp_rows["window"], dtype=np.int64),
        "t_min": np.asarray(disp_rows["t_min"], dtype=np.float64),
        "region": np.asarray(disp_rows["region"], dtype=np.int64),
        "period_min": np.asarray(disp_rows["period_min"], dtype=np.float64),
        "speed_um_per_min": np.asarray(disp_rows["speed_um_per_min"], dtype=np.float64),
        "n_pixels": np.asarray(disp_rows["n_pixels"], dtype=np.int64),
    }

    frame_offset = trim
    cores_um = tracking.cores_in_um(
        _shift_frames(tracks.cores, frame_offset), pixel_size_um=px_um, frame_interval_s=cal.frame_interval_s
    )
    tracks_um = tracking.tracks_in_um(
        _shift_frames_tracks(tracks.tracks, frame_offset), pixel_size_um=px_um, frame_interval_s=cal.frame_interval_s
    )
    spiral_cores = tracking.spiral_core_records(
        _shift_frames_tracks(persistent.tracks, frame_offset), pixel_size_um=px_um, frame_interval_s=cal.frame_interval_s
    )
    field_area_px = float(valid.sum())
    n_pers = len(per["track_id"])
    density = (
        tracking.cores_per_cm2(n_pers, field_area_px=field_area_px, pixel_size_um=px_um) if field_area_px > 0 else None
    )
    if not valid.any():
        warnings.append("no pixel carries a signal above the amplitude floor")
    period_q = quartiles(period_min_map)
    speed_q = quartiles(speed_map)
    wl_q = quartiles(wavelength_map)
    if speed_q is None and period_q is not None:
        warnings.append(
            "front speed not measured: no pixel has a steady wave direction away from cores and collisions"
        )
    summary = {
        "schema_version": 1,
        "source": None,  # filled by the caller that knows the file
        "calibration": cal.to_dict(),
        "period_min": period_q,
        "front_speed_um_per_min": speed_q,
        "wavelength_um": wl_q,
        "period_timecourse": [{"t_min": c["t_min"], "period_min": c["period_min"]} for c in course],
        "spiral_cores": spiral_cores,
        "centres": [],
        "warnings": list(warnings),
        # extra keys
        "front_speed_activation_fit_um_per_min": quartiles(fit_map),
        "cores_per_cm2": density,
        "dominant_period_min": period0 * dt_min,
        "analysis": {
            "waves_version": __version__,
            "options": _options_dict(options),
            "passband_period_min": [dt_min / passband[1], dt_min / passband[0]],
            "trimmed_frames_each_end": trim,
            "window_min": win * dt_min,
            "smoothing_sigma_um": sigma_px * px_um,
            "signal_fraction": float(valid.mean()),
            "notes": notes,
        },
        "disclaimer": "research measurements; not a clinical, diagnostic or safety judgement",
    }
    maps = {
        "period_min": period_min_map,
        "front_speed_um_per_min": speed_map,
        "wavelength_um": wavelength_map,
        "front_speed_activation_fit_um_per_min": fit_map,
        "direction_deg": direction_deg,
        "amplitude": acc.amplitude,
        "mean_image": mean_image,
    }
    course_tab = {
        "t_min": np.asarray([c["t_min"] for c in course], dtype=np.float64),
        "period_min": np.asarray([c["period_min"] for c in course], dtype=np.float64),
        "period_q25_min": np.asarray([c["q25"] for c in course], dtype=np.float64),
        "period_q75_min": np.asarray([c["q75"] for c in course], dtype=np.float64),
    }
    tables = {
        "cores_per_frame": cores_um,
        "core_tracks": tracks_um,
        "period_timecourse": course_tab,
        "dispersion": dispersion,
    }
    timings["total_s"] = time.perf_counter() - t_start
    return Analysis(summary=summary, maps=maps, tables=tables, warnings=tuple(warnings), timings_s=timings)


def _shift_frames(table: dict, offset: int) -> dict:
    out = dict(table)
    out["frame"] = table["frame"] + offset
    return out


def _shift_frames_tracks(table: dict, offset: int) -> dict:
    out = dict(table)
    for k in ("first_frame", "last_frame"):
        out[k] = table[k] + offset
    return out


def _options_dict(options: AnalysisOptions) -> dict:
    d = asdict(options)
    d["period_band_min"] = list(options.period_band_min)
    return d


def _empty_result(cal, options, warnings, notes, sigma_px, mean_image, timings, t_start) -> Analysis:
    summary = {
        "schema_version": 1,
        "source": None,
        "calibration": cal.to_dict(),
        "period_min": None,
        "front_speed_um_per_min": None,
        "wavelength_um": None,
        "period_timecourse": [],
        "spiral_cores": [],
        "centres": [],
        "warnings": list(warnings),
        "analysis": {
            "waves_version": __version__,
            "options": _options_dict(options),
            "smoothing_sigma_um": sigma_px * cal.pixel_size_um,
            "notes": notes,
        },
        "disclaimer": "research measurements; not a clinical, diagnostic or safety judgement",
    }
    timings["total_s"] = time.perf_counter() - t_start
    return Analysis(
        summary=summary,
        maps={"mean_image": mean_image},
        tables={},
        warnings=tuple(warnings),
        timings_s=timings,
    )
