"""Pass 3: row strips -> phase, compiled per-pixel measures, charges; smoothing-bias correction and core tracking."""

from __future__ import annotations

import math
import warnings as warnings_module
from dataclasses import dataclass, field

import numba
import numpy as np

from waves import preprocess
from waves.analyse.clean import _Movie, _progress, in_threads
from waves.analyse.options import DETREND_DEGREE, FIT_RADIUS_PX, HALO_PX, MAX_SMOOTHING_CORRECTION
from waves.analyse.segments import (
    combine_stretches,
    drop_invalid_arrivals,
    intervals_outside,
    measure_stretches,
)
from waves.measure.displacement import DISPLACEMENT_REACH_PX, front_displacement_speed
from waves.measure.fused import pixel_measures
from waves.measure.medians import nanmedian_last, window_medians
from waves.measure.speed import (
    activation_fit_speed,
    activation_times,
    smoothing_speed_correction,
)
from waves.phase import tracking
from waves.phase.analytic import (
    analytic_signal,
    delay_embedding_phase,
    phase_and_amplitude,
    spectral_weights,
)
from waves.phase.charge import plaquette_charge, singularity_offsets
from waves.preprocess.timebase import runs

# smoothing (analysis-grid px) of the field a core's sub-pixel position is read from: below
# about 1.5 steps no local interpolant of the grid finds the zero to a few hundredths of a step
# (waves.phase.charge.singularity_offsets)
CORE_SMOOTH_PX = 1.5


@dataclass
class _Maps:
    amplitude: np.ndarray
    period: np.ndarray  # (n_windows + 1, y, x): whole movie, then windows
    speed: np.ndarray
    direction: np.ndarray
    coherence: np.ndarray
    omega: np.ndarray  # phase advance per frame
    fit_speed: np.ndarray  # (y, x): median over every wave of its local plane fit (per-wave front speed)
    interval_cv: np.ndarray  # spread of the intervals between waves (std / mean)
    charges: list  # of int64 (n, 4) arrays: frame, row, col, charge
    charge_offsets: list = field(default_factory=list)  # float32 (n, 2) per charges array: (row, col) in [0, 1]
    arrivals: list = field(default_factory=list)  # (first row, (rows, x, m) arrival times) per strip
    fit_speed_w: np.ndarray | None = None  # (n_windows, y, x): the same over the waves arriving in each window
    # (y, x) and (n_windows, y, x): each front followed along its normal (waves.measure.displacement)
    walk_speed: np.ndarray | None = None
    walk_speed_w: np.ndarray | None = None
    arrival_dirs: list = field(default_factory=list)  # (first row, (rows, x, m) plane-fit directions) per strip
    snr: np.ndarray | None = None  # (y, x) mean amplitude / what white noise of the pixel's own level gives


def _strip_rows(ny: int, nx: int, nt: int, budget_bytes: float) -> int:
    """Rows per strip so that one strip's working set fits the budget: per
    pixel and frame about 40 bytes (float32 input, complex64 analytic signal
    and its FFT buffer, phase, amplitude, arrival times)."""
    rows = int(budget_bytes // (nt * nx * 40.0))
    return max(4, min(rows, ny))


def _phase(z: np.ndarray, lag: int | None) -> tuple[np.ndarray, np.ndarray]:
    """Phase and amplitude from the analytic signal, or, with a lag, by delay
    embedding of its real part (the band-passed signal); the embedding drops
    the last `lag` frames."""
    if lag is None:
        return phase_and_amplitude(z)
    x = z.real
    phase = delay_embedding_phase(x, lag_frames=lag)[:-lag]
    amp = np.hypot(x[:-lag], x[lag:]).astype(np.float32)
    return phase, amp


def _measure_strips(movie: _Movie, *, passband, trim, windows, rows_per_strip, period_frames, lag, workers,
                    progress, valid=None, pad_frames=0, sigma_px=0.0):
    """`valid` (phase frames, bool) or None: with invalid frames, the
    whole-movie measures come from the valid stretches and arrivals inside
    invalid frames are dropped (waves.analyse.segments).  `sigma_px`: the
    cleaning's spatial smoothing (grid px); a core's sub-pixel position is
    taken on a field smoothed to at least CORE_SMOOTH_PX."""
    core_sigma = math.sqrt(max(0.0, CORE_SMOOTH_PX ** 2 - float(sigma_px) ** 2))
    nt, ny, nx = movie.shape
    n = len(windows) + 1
    partial = valid is not None and not np.all(valid)
    parts = measure_stretches(valid) if partial else []
    maps = _Maps(
        amplitude=np.full((ny, nx), np.nan, np.float32),
        period=np.full((n, ny, nx), np.nan, np.float32),
        speed=np.full((n, ny, nx), np.nan, np.float32),
        direction=np.full((n, ny, nx), np.nan, np.float32),
        coherence=np.full((n, ny, nx), np.nan, np.float32),
        omega=np.full((n, ny, nx), np.nan, np.float32),
        fit_speed=np.full((ny, nx), np.nan, np.float32),
        interval_cv=np.full((ny, nx), np.nan, np.float32),
        charges=[],
        fit_speed_w=np.full((len(windows), ny, nx), np.nan, np.float32),
    )
    noise = np.full((ny, nx), np.nan, np.float32)
    starts = list(range(0, ny, rows_per_strip))
    bar = _progress(len(starts), "phase, period, speed, cores", progress)
    for r0 in starts:
        r1 = min(ny, r0 + rows_per_strip)
        a0, a1 = max(0, r0 - HALO_PX), min(ny, r1 + HALO_PX)
        x = movie.rows(a0, a1)
        inner = slice(r0 - a0, r1 - a0)
        noise[r0:r1] = _noise_sd(x[:, inner])
        z = analytic_signal(x, passband=passband, workers=workers, detrend_degree=DETREND_DEGREE,
                            pad_frames=pad_frames, overwrite_x=True)[trim : nt - trim]
        del x
        phase, amp = _phase(z, lag)
        del z
        pm = pixel_measures(phase, amp, rows=(inner.start, inner.stop), windows=list(windows) + parts)
        maps.amplitude[r0:r1] = pm.amplitude
        measures = [pm.period_frames, pm.speed_px_per_frame, pm.direction_rad, pm.coherence,
                    pm.omega_rad_per_frame]
        if partial:  # the whole movie = its valid stretches together
            whole = combine_stretches(*(m[n:] for m in measures), [b - a for a, b in parts])
            for m, w in zip(measures, whole, strict=True):
                m[0] = w
        maps.period[:, r0:r1] = pm.period_frames[:n]
        maps.speed[:, r0:r1] = pm.speed_px_per_frame[:n]
        maps.direction[:, r0:r1] = pm.direction_rad[:n]
        maps.coherence[:, r0:r1] = pm.coherence[:n]
        maps.omega[:, r0:r1] = pm.omega_rad_per_frame[:n]
        times, counts = activation_times(phase)
        if partial:
            times, counts = drop_invalid_arrivals(times, counts, valid)
        sp, di = activation_fit_speed(times, counts, radius_px=FIT_RADIUS_PX, max_dt_frames=period_frames / 3.0)
        with warnings_module.catch_warnings():
            warnings_module.simplefilter("ignore", RuntimeWarning)  # all-NaN pixels give NaN
            maps.fit_speed[r0:r1] = nanmedian_last(sp[inner])
            if len(windows):  # each window: the waves that arrive inside it
                maps.fit_speed_w[:, r0:r1] = window_medians(times[inner], sp[inner], windows)
            gaps = intervals_outside(times[inner], valid) if partial else np.diff(times[inner], axis=2)
            maps.interval_cv[r0:r1] = np.nanstd(gaps, axis=2) / np.nanmean(gaps, axis=2)
        maps.arrivals.append((r0, times[inner].copy()))  # for the centres' own waves and the walks
        maps.arrival_dirs.append((r0, di[inner].astype(np.float16)))  # a walk's heading needs no more
        del times, counts, sp, di
        # charges of the plaquettes whose top-left pixel is an inner pixel
        q = plaquette_charge(phase[:, inner.start : min(inner.stop + 1, a1 - a0)])
        t_i, r_i, c_i = _sparse_nonzero(q[:, : r1 - r0])
        if t_i.size:
            maps.charges.append(np.stack([t_i, r_i + r0, c_i, q[t_i, r_i, c_i].astype(np.int64)], axis=1))
            # where in the plaquette the singularity sits (the core's sub-pixel position)
            maps.charge_offsets.append(singularity_offsets(phase, amp, t_i, r_i + inner.start, c_i,
                                                           extra_sigma_px=core_sigma))
        del phase, amp, q
        bar.update(1)
    bar.close()
    _walk_speeds(maps, windows, max_dt_frames=period_frames / 3.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        maps.snr = (maps.amplitude / (noise * noise_amplitude_factor(nt + 2 * pad_frames, passband))).astype(np.float32)
    return maps


def _sparse_nonzero(q: np.ndarray) -> tuple[np.ndarray, ...]:
    """np.nonzero of a mostly-zero int8 array (the plaquette charges), in the
    same order: the nonzero 8-byte words are found first, then their bytes
    (several times faster than np.nonzero's pass over every element)."""
    flat = np.ascontiguousarray(q).reshape(-1)
    n8 = flat.size // 8 * 8
    words = np.flatnonzero(flat[:n8].view(np.uint64))
    cand = (words[:, None] * 8 + np.arange(8)).reshape(-1)
    idx = np.concatenate([cand[flat[cand] != 0], n8 + np.flatnonzero(flat[n8:])])
    return np.unravel_index(idx, q.shape)


def _noise_sd(x: np.ndarray) -> np.ndarray:
    """Per-pixel sd of the white noise in a (t, y, x) movie from its second
    differences: var(x[t+1] - 2 x[t] + x[t-1]) = 6 sigma^2 for white noise,
    while a wave of period T adds only (2 pi / T)^4 / 6 of its own variance
    (0.3 % at T = 18 frames), and slow drifts nothing (common practice, no source).
    Compiled for float32 (the cleaned movie); `_noise_sd_numpy` is its twin,
    with the same arithmetic in the same order."""
    if x.shape[0] < 3 or x.dtype != np.float32:
        return _noise_sd_numpy(x)
    sq = np.empty(x.shape[1:], dtype=np.float64)
    _second_difference_sq_mean(x, sq)
    return np.sqrt(sq / 6.0).astype(np.float32)


def _noise_sd_numpy(x: np.ndarray) -> np.ndarray:
    if x.shape[0] < 3:
        return np.full(x.shape[1:], np.nan, np.float32)
    d2 = x[2:] - 2.0 * x[1:-1] + x[:-2]
    return np.sqrt(np.mean(np.square(d2, dtype=np.float64), axis=0) / 6.0).astype(np.float32)


@numba.njit(cache=True, nogil=True, parallel=True)
def _second_difference_sq_mean(x, out):  # pragma: no cover - compiled
    """out[r, c] = mean over t of float64(x[t+2] - 2 x[t+1] + x[t])^2, the
    difference in float32 and the sum in frame order (as numpy's mean)."""
    nt, ny, nx = x.shape
    two = np.float32(2.0)
    for r in numba.prange(ny):
        acc = np.zeros(nx, dtype=np.float64)
        for t in range(nt - 2):
            for c in range(nx):
                d = np.float64(x[t + 2, r, c] - two * x[t + 1, r, c] + x[t, r, c])
                acc[c] += d * d
        for c in range(nx):
            out[r, c] = acc[c] / (nt - 2)


def noise_amplitude_factor(n_frames: int, passband) -> float:
    """Mean analytic amplitude of unit white noise through the band-pass of
    `analytic_signal` (`spectral_weights`): E|z|^2 = sum(w^2) / n, and |z| is
    Rayleigh-distributed, E|z| = sqrt(pi / 4 E|z|^2) (common practice, no source)."""
    w = spectral_weights(int(n_frames), passband).astype(np.float64)
    return float(np.sqrt(0.25 * np.pi * np.sum(w * w) / int(n_frames)))


def _correct_smoothing_bias(maps: _Maps, *, sigma_px: float, factor: int, workers: int = 1) -> None:
    """Undo the curvature bias the spatial smoothing (and the binning's box
    average) puts into the phase speeds, window by window, and into the
    activation-fit speeds (with the whole-movie factor), in place; drop
    speeds whose correction exceeds MAX_SMOOTHING_CORRECTION (next to a
    target's source, where the leading-order correction no longer holds).

    Why: smoothing flattens the phase of curved fronts, so a ring of radius r
    looks sigma^2 / (2 r^2) faster (measured over a synthetic target field at
    sigma = wavelength / 12: +0.83 % median, +0.23 % after this correction,
    +0.15 % without smoothing); see
    waves.measure.speed.smoothing_speed_correction.  The bias at the frame
    edges is avoided by the smoothing itself (preprocess.smooth_space)."""
    ny, nx = maps.amplitude.shape
    box = (1.0 - 1.0 / factor**2) / 12.0  # variance of a box of `factor` recorded pixels, in binned pixels^2
    var_row = box + (preprocess.smoothing_variance_px2(ny, sigma_px=sigma_px) if sigma_px > 0.3 else 0.0)
    var_col = box + (preprocess.smoothing_variance_px2(nx, sigma_px=sigma_px) if sigma_px > 0.3 else 0.0)
    if ny < 3 or nx < 3 or not (np.any(var_row > 0) or np.any(var_col > 0)):
        return

    def one(w: int) -> None:  # window w's maps only: the windows can go to threads (numpy, ndimage)
        with np.errstate(invalid="ignore", divide="ignore"):
            k = maps.omega[w].astype(np.float64) / maps.speed[w]
        kx = k * np.cos(maps.direction[w])
        ky = -k * np.sin(maps.direction[w])  # direction is displayed (+y up = -row)
        f = smoothing_speed_correction(kx, ky, var_row=np.broadcast_to(var_row, (ny,)),
                                       var_col=np.broadcast_to(var_col, (nx,)), smooth_px=2.0 * max(sigma_px, 1.0))
        with np.errstate(invalid="ignore"):
            ok = np.abs(f - 1.0) <= MAX_SMOOTHING_CORRECTION
        maps.speed[w] = np.where(ok, maps.speed[w] / np.where(ok, f, 1.0), np.nan)
        # arrival times come from the same smoothed phase: the same bias
        fit = maps.fit_speed if w == 0 else maps.fit_speed_w[w - 1]
        fit[:] = np.where(ok, fit / np.where(ok, f, 1.0), np.nan)
        walk = maps.walk_speed if w == 0 else (maps.walk_speed_w[w - 1] if maps.walk_speed_w is not None else None)
        if walk is not None:  # the walks read the same arrival times over a longer baseline
            walk[:] = np.where(ok, walk / np.where(ok, f, 1.0), np.nan)

    in_threads(one, range(maps.speed.shape[0]), workers)


def arrival_field(strips, shape, rows: tuple[int, int] | None = None) -> np.ndarray:
    """(y, x, m) float32 per-wave values (frames or radians, NaN-padded) from
    the per-strip arrays; with `rows` (a0, a1) only those rows."""
    a0, a1 = (0, shape[0]) if rows is None else rows
    m = max([t.shape[2] for _, t in strips], default=1)
    out = np.full((a1 - a0, shape[1], m), np.nan, np.float32)
    for r0, t in strips:
        lo, hi = max(r0, a0), min(r0 + t.shape[0], a1)
        if lo < hi:
            out[lo - a0 : hi - a0, :, : t.shape[2]] = t[lo - r0 : hi - r0]
    return out


WALK_BAND_ROWS = 64  # rows of walks at a time (plus the walk's reach above and below)


def _walk_speeds(maps: _Maps, windows, *, max_dt_frames: float) -> None:
    """Every wave's front followed along its plane fit's normal (the walks
    cross strips: bands of WALK_BAND_ROWS rows with the walk's reach on either
    side), the median over the waves at each pixel and over the waves
    arriving inside each window."""
    ny, nx = maps.amplitude.shape
    maps.walk_speed = np.full((ny, nx), np.nan, np.float32)
    maps.walk_speed_w = np.full((len(windows), ny, nx), np.nan, np.float32) if len(windows) else None
    for b0 in range(0, ny, WALK_BAND_ROWS):
        b1 = min(ny, b0 + WALK_BAND_ROWS)
        a0, a1 = max(0, b0 - DISPLACEMENT_REACH_PX), min(ny, b1 + DISPLACEMENT_REACH_PX)
        times = arrival_field(maps.arrivals, (ny, nx), rows=(a0, a1))
        dirs = arrival_field(maps.arrival_dirs, (ny, nx), rows=(a0, a1))
        counts = np.isfinite(times).sum(axis=2).astype(np.int32)
        walk = front_displacement_speed(times, counts, dirs, max_dt_frames=max_dt_frames)[b0 - a0 : b1 - a0]
        t_in = times[b0 - a0 : b1 - a0]
        with warnings_module.catch_warnings():
            warnings_module.simplefilter("ignore", RuntimeWarning)
            maps.walk_speed[b0:b1] = nanmedian_last(walk)
            if maps.walk_speed_w is not None:
                maps.walk_speed_w[:, b0:b1] = window_medians(t_in, walk, windows)
    maps.arrival_dirs = []  # held only for the walks


def _detect_and_track(charges, *, signal, n_frames, period_frames, frame_ok=None, offsets=None):
    """Cores per frame from the collected plaquette charges (only plaquettes
    whose top-left pixel carries a signal, and with `frame_ok`, only in valid
    frames; tracks may then bridge the invalid runs), then tracks.  `offsets`:
    the charges' sub-plaquette positions (strips' charge_offsets), or None
    (plaquette centres)."""
    ny, nx = signal.shape
    allq = np.concatenate(charges, axis=0) if charges else np.zeros((0, 4), dtype=np.int64)
    off = (np.concatenate(offsets, axis=0) if offsets and len(offsets) == len(charges)
           else np.full((len(allq), 2), 0.5, np.float32))
    keep = signal[allq[:, 1], allq[:, 2]]
    allq, off = allq[keep], off[keep]
    max_gap = 2
    if frame_ok is not None and not np.all(frame_ok):
        keep = frame_ok[allq[:, 0]]
        allq, off = allq[keep], off[keep]
        max_gap += max(b - a for a, b in runs(~np.asarray(frame_ok, dtype=bool)))
    tables = []
    block = 64
    for f0 in range(0, n_frames, block):
        f1 = min(n_frames, f0 + block)
        in_block = (allq[:, 0] >= f0) & (allq[:, 0] < f1)
        sel = allq[in_block]
        q = np.zeros((f1 - f0, ny - 1, nx - 1), dtype=np.int8)
        where = np.full((f1 - f0, ny - 1, nx - 1, 2), 0.5, dtype=np.float32)
        if len(sel):
            q[sel[:, 0] - f0, sel[:, 1], sel[:, 2]] = sel[:, 3].astype(np.int8)
            where[sel[:, 0] - f0, sel[:, 1], sel[:, 2]] = off[in_block]
        tables.append(tracking.detect_cores_stack(q, first_frame=f0, offsets=where))
    detections = tracking.concat_tables(tables)
    return tracking.track_cores(detections, max_step_px=max(2.0, 0.1 * period_frames), max_gap_frames=max_gap)
