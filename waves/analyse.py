"""The analysis pipeline: a calibrated stack -> period, front speed,
wavelength and spiral cores, in bounded memory.

1. A first look (frame blocks): the temporal-mean image, a check for flat or
   non-finite movies, and the dominant wavelength of a few frames.  The
   analysis grid is the recorded one binned so that a wavelength spans about
   24 pixels (waves are smooth on that scale; binning averages camera noise
   and cuts the work), unless the user fixes the factor.
2. Cleaning (frame blocks): binning, optional drift correction, illumination
   flattening (a gain from the temporal-mean image), mean removal and spatial
   smoothing tied to the wavelength (cut symmetrically at the frame edges, so
   fronts keep their direction and spacing there).  The cleaned movie is held in memory
   when it fits the budget, else in a float32 scratch file beside the outputs.
   A sparse set of rows then gives the dominant period, which sets the
   band-pass and how many frames at each end are trimmed (filter edges make
   false singularities).
3. Row strips (all frames, a halo of 3 rows): analytic signal with the
   band-pass in the same FFT, phase and amplitude, then one compiled pass for
   period (whole cycles), phase velocity and coherence over the movie and in
   time windows, activation-time plane fits and topological charges.  Peak
   memory is set by the strip, which is sized from the memory budget.
4. Whole maps: the speeds are corrected for the curvature bias of the
   smoothing (a front of radius r looks sigma^2 / (2 r^2) faster), and
   speeds that would need more than a 3 % correction are dropped.

Cores are detected per frame from the collected charges, tracked, and kept
when they live for at least about one period.  Everything is in analysis-grid
pixels and frames until the end, where the calibration turns it into um (in
the recorded image's coordinates), minutes and um/min.  Band polarity does
not matter: amplitude and phase winding are the same for bright and dark
bands.
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

from waves import __version__, preprocess
from waves.errors import InputError, WavesError
from waves.measure.centres import emission_intervals, track_centres
from waves.measure.fused import pixel_measures
from waves.measure.period import quartiles, spectral_period
from waves.measure.speed import (
    activation_fit_speed,
    activation_times,
    kernel_in_one_territory,
    kernel_saw_signal,
    smoothing_speed_correction,
)
from waves.phase import tracking
from waves.phase.analytic import (
    analytic_signal,
    delay_embedding_phase,
    passband_from_periods,
    phase_and_amplitude,
)
from waves.phase.charge import plaquette_charge
from waves.units import Calibration

__all__ = ["AnalysisOptions", "Analysis", "analyse_movie", "clean_buffer", "DEFAULT_PERIOD_BAND_MIN"]

# Trade-sensible default: aggregating fields show periods of about 8-10 min
# early falling to 2-4 min late (REFERENCES.md, [memory]); 6 min is typical.
DEFAULT_PERIOD_BAND_MIN = (2.0, 20.0)

HALO_PX = 3  # gradient (1) + activation-fit radius (2)
FIT_RADIUS_PX = 2
MAX_SMOOTHING_CORRECTION = 0.03  # larger curvature corrections of a speed are not trusted: the speed is dropped
PIXELS_PER_WAVELENGTH = 24  # target of the automatic analysis binning
DISCLAIMER = "research measurements; not a clinical, diagnostic or safety judgement"


@dataclass(frozen=True)
class AnalysisOptions:
    """What `analyse_movie` does.  Units in the names."""

    period_band_min: tuple[float, float] = DEFAULT_PERIOD_BAND_MIN
    phase_method: str = "hilbert"  # or "delay": delay embedding with a quarter-period lag
    analysis_bin: int | None = None  # None: bin so a wavelength spans ~24 px
    flatten: bool = True
    register: bool = False
    smooth_sigma_um: float | None = None  # None: wavelength / 12, from the first look
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
                "period band must be two increasing positive numbers of minutes, "
                f"got {self.period_band_min!r}"
            )
        if self.analysis_bin is not None and (int(self.analysis_bin) != self.analysis_bin or self.analysis_bin < 1):
            raise WavesError(f"analysis binning must be a whole number >= 1, got {self.analysis_bin!r}")
        if self.smooth_sigma_um is not None and not self.smooth_sigma_um >= 0:
            raise WavesError("smoothing sigma must be zero or positive (um)")
        if not 0 <= self.min_coherence < 1:
            raise WavesError(f"min_coherence must be in [0, 1), got {self.min_coherence!r}")
        if self.min_amplitude is not None and not self.min_amplitude >= 0:
            raise WavesError("min_amplitude must be zero or positive")
        for name in ("persistent_periods", "window_periods", "memory_budget_mb"):
            if not getattr(self, name) > 0:
                raise WavesError(f"{name} must be positive, got {getattr(self, name)!r}")
        if self.phase_method not in ("hilbert", "delay"):
            raise WavesError(f"phase method must be 'hilbert' or 'delay', got {self.phase_method!r}")
        if int(self.workers) < 1:
            raise WavesError("workers must be at least 1")


@dataclass(frozen=True)
class Analysis:
    """Everything an analysis found, in calibrated units, ready to write.

    `maps` are on the analysis grid, whose pixel size and origin (the
    recorded-image position of map pixel (0, 0), in um) are in
    summary['analysis']['grid'].
    """

    summary: dict
    maps: dict  # name -> (y, x) float32 array, names carry units
    tables: dict  # name -> {column: 1-D array}
    warnings: tuple[str, ...]
    timings_s: dict = field(default_factory=dict)
    stacks: dict = field(default_factory=dict)  # name -> (n, y, x) array, e.g. territories per window


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
    df = 1.0 / max(ny, nx)
    bins = np.rint(np.hypot(fy, fx) / df).astype(int)
    nb = bins.max() + 1
    radial = np.bincount(bins.ravel(), power.ravel(), nb) / np.maximum(np.bincount(bins.ravel(), None, nb), 1)
    lo, hi = 2, int(0.5 / df)  # above the field-size scale, below the pixel Nyquist
    if hi <= lo + 1:
        return None
    k = lo + int(np.argmax(radial[lo:hi]))
    if radial[k] < 4.0 * np.median(radial[lo:hi]):
        return None
    return 1.0 / (k * df)


class _Movie:
    """The cleaned movie: an in-memory array, or a float32 scratch file read
    and written through short-lived memory maps, so that its pages do not
    pile up in this process's resident memory."""

    def __init__(self, shape: tuple[int, int, int], *, in_memory: bool, folder: pathlib.Path | None):
        self.shape = shape
        self.path = None
        if in_memory:
            self._array = np.empty(shape, dtype=np.float32)
        else:
            self._array = None
            base = folder if folder is not None else pathlib.Path(tempfile.gettempdir())
            base.mkdir(parents=True, exist_ok=True)
            fd, name = tempfile.mkstemp(prefix=".waves-scratch-", suffix=".f32", dir=base)
            os.close(fd)
            self.path = pathlib.Path(name)
            with open(self.path, "r+b") as fh:
                fh.truncate(int(np.prod(shape)) * 4)

    def _map(self, mode: str) -> np.ndarray:
        if self._array is not None:
            return self._array
        return np.memmap(self.path, dtype=np.float32, mode=mode, shape=self.shape)

    def write(self, t0: int, block: np.ndarray) -> None:
        m = self._map("r+")
        m[t0 : t0 + len(block)] = block
        if m is not self._array:
            m.flush()
        del m

    def frames(self, t0: int, t1: int) -> np.ndarray:
        m = self._map("r")
        out = np.array(m[t0:t1], dtype=np.float32)
        del m
        return out

    def rows(self, a0: int, a1: int) -> np.ndarray:
        m = self._map("r")
        out = np.array(m[:, a0:a1, :], dtype=np.float32)
        del m
        return out

    def view(self) -> np.ndarray:
        """The whole movie as an array (in memory) or a read-only memory map."""
        return self._map("r")

    def close(self) -> None:
        self._array = None
        if self.path is not None:
            try:
                self.path.unlink()
            except FileNotFoundError:
                pass


def clean_buffer(shape: tuple[int, int, int], *, folder: pathlib.Path | None = None,
                 max_memory_bytes: float = 1e9) -> _Movie:
    """A float32 (t, y, x) buffer for a movie written frame by frame (e.g. the
    simulator's clean field): in memory up to `max_memory_bytes`, else a
    scratch file in `folder` that `close()` deletes."""
    nbytes = float(np.prod(shape)) * 4
    return _Movie(tuple(int(v) for v in shape), in_memory=nbytes <= max_memory_bytes, folder=folder)


# --------------------------------------------------------------------------- passes 1 and 2


def _wavelength_look(data) -> float | None:
    """Dominant wavelength (recorded pixels) of a dozen frames spread over the movie."""
    nt, ny, nx = data.shape
    idx = np.linspace(0, nt - 1, min(nt, 12)).astype(int)
    sample = np.asarray(data[idx], dtype=np.float32)
    if not np.isfinite(sample).all():
        return None  # the binning pass names the bad frames
    # waves span many pixels: a 2x2-binned look finds the wavelength as well, for a quarter of the work
    look_bin = 2 if min(ny, nx) >= 256 else 1
    lam = _dominant_wavelength_px(preprocess.bin_frames(sample, look_bin) if look_bin > 1 else sample)
    return None if lam is None else lam * look_bin


def _bin_pass(data, *, factor: int, movie: _Movie, block: int, bar) -> np.ndarray:
    """Read the recording once: bin every frame block into `movie`, refuse
    non-finite or flat movies, and return the temporal-mean image (binned)."""
    nt = data.shape[0]
    mean = np.zeros(movie.shape[1:], dtype=np.float64)
    lo, hi = np.inf, -np.inf
    for t0 in range(0, nt, block):
        raw = np.asarray(data[t0 : t0 + block])
        b = preprocess.bin_frames(raw, factor) if factor > 1 else raw.astype(np.float32)
        if not np.isfinite(b).all():
            bad = np.flatnonzero(~np.isfinite(b).reshape(len(b), -1).all(axis=1)) + t0
            raise InputError(
                f"frames {', '.join(map(str, bad[:5]))}{' ...' if len(bad) > 5 else ''} hold NaN or "
                "infinite values; replace them or choose other frames with --frames"
            )
        mean += b.sum(axis=0, dtype=np.float64)
        lo = min(lo, float(b.min()))
        hi = max(hi, float(b.max()))
        movie.write(t0, b)
        bar.update(1)
    if hi - lo <= 0:
        raise InputError(f"the movie is flat: every pixel of every frame is {lo:g}; there are no waves to measure")
    return (mean / nt).astype(np.float32)


def _clean(*, sigma_px: float, options: AnalysisOptions, movie: _Movie, mean_b: np.ndarray, factor: int,
           block: int, bar, workers: int, notes: list) -> None:
    """Register, flatten, remove the mean and smooth the binned movie in place."""
    nt = movie.shape[0]
    gain = None
    if options.flatten and float(mean_b.max()) > 0:
        dish = preprocess.dish_mask(mean_b)  # a dark surround must not enter the gain fit
        gain = preprocess.illumination_gain(mean_b, sigma_px=max(mean_b.shape) / 8.0, mask=dish)
        gain = np.maximum(gain, 1e-3 * float(gain.max()))
    shifts = None
    if options.register:
        # registered on the analysis grid; the reference is the temporal median
        shifts = preprocess.estimate_drift(movie.view())
        notes.append(f"drift corrected: largest shift {factor * np.abs(shifts).max():.2f} px of the recording")
    reference = mean_b / gain if gain is not None else mean_b

    def one(t0):
        b = movie.frames(t0, t0 + block)
        if shifts is not None:
            b = preprocess.apply_drift(b, shifts[t0 : t0 + len(b)])
        if gain is not None:
            b /= gain
        b -= reference
        if sigma_px > 0.3:
            b = preprocess.smooth_space(b, sigma_px=sigma_px)
        movie.write(t0, b)
        bar.update(1)

    starts = range(0, nt, block)
    if workers > 1 and movie.path is None:
        # frame blocks are independent; scipy.ndimage releases the GIL
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(one, starts))
    else:
        for t0 in starts:
            one(t0)


def _dominant_period_frames(movie: _Movie, passband: tuple[float, float]) -> tuple[float | None, float]:
    """Median dominant period (frames) over a sparse grid of pixels, and the
    fraction of those pixels whose spectral peak stands clear of the noise."""
    nt, ny, nx = movie.shape
    step_r, step_c = max(1, ny // 24), max(1, nx // 24)
    x = np.concatenate([movie.rows(r, r + 1)[:, 0, ::step_c] for r in range(0, ny, step_r)], axis=1)
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


@dataclass
class _Maps:
    amplitude: np.ndarray
    period: np.ndarray  # (n_windows + 1, y, x): whole movie, then windows
    speed: np.ndarray
    direction: np.ndarray
    coherence: np.ndarray
    omega: np.ndarray  # phase advance per frame
    fit_speed: np.ndarray
    interval_cv: np.ndarray  # spread of the intervals between waves (std / mean)
    charges: list  # of int64 (n, 4) arrays: frame, row, col, charge
    arrivals: list = field(default_factory=list)  # (first row, (rows, x, m) arrival times) per strip


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
                    progress):
    nt, ny, nx = movie.shape
    n = len(windows) + 1
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
    )
    starts = list(range(0, ny, rows_per_strip))
    bar = _progress(len(starts), "phase, period, speed, cores", progress)
    for r0 in starts:
        r1 = min(ny, r0 + rows_per_strip)
        a0, a1 = max(0, r0 - HALO_PX), min(ny, r1 + HALO_PX)
        z = analytic_signal(movie.rows(a0, a1), passband=passband, workers=workers)[trim : nt - trim]
        phase, amp = _phase(z, lag)
        del z
        inner = slice(r0 - a0, r1 - a0)
        pm = pixel_measures(phase, amp, rows=(inner.start, inner.stop), windows=windows)
        maps.amplitude[r0:r1] = pm.amplitude
        maps.period[:, r0:r1] = pm.period_frames
        maps.speed[:, r0:r1] = pm.speed_px_per_frame
        maps.direction[:, r0:r1] = pm.direction_rad
        maps.coherence[:, r0:r1] = pm.coherence
        maps.omega[:, r0:r1] = pm.omega_rad_per_frame
        times, counts = activation_times(phase)
        sp, _ = activation_fit_speed(times, counts, radius_px=FIT_RADIUS_PX, max_dt_frames=period_frames / 3.0)
        with warnings_module.catch_warnings():
            warnings_module.simplefilter("ignore", RuntimeWarning)  # all-NaN pixels give NaN
            maps.fit_speed[r0:r1] = np.nanmedian(sp[inner], axis=2)
            gaps = np.diff(times[inner], axis=2)
            maps.interval_cv[r0:r1] = np.nanstd(gaps, axis=2) / np.nanmean(gaps, axis=2)
        maps.arrivals.append((r0, times[inner].copy()))  # for the centres' own waves
        del times, counts, sp
        # charges of the plaquettes whose top-left pixel is an inner pixel
        q = plaquette_charge(phase[:, inner.start : min(inner.stop + 1, a1 - a0)])
        t_i, r_i, c_i = np.nonzero(q[:, : r1 - r0])
        if t_i.size:
            maps.charges.append(np.stack([t_i, r_i + r0, c_i, q[t_i, r_i, c_i].astype(np.int64)], axis=1))
        del phase, amp, q
        bar.update(1)
    bar.close()
    return maps


def _correct_smoothing_bias(maps: _Maps, *, sigma_px: float, factor: int) -> None:
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
    for w in range(maps.speed.shape[0]):
        with np.errstate(invalid="ignore", divide="ignore"):
            k = maps.omega[w].astype(np.float64) / maps.speed[w]
        kx = k * np.cos(maps.direction[w])
        ky = -k * np.sin(maps.direction[w])  # direction is displayed (+y up = -row)
        f = smoothing_speed_correction(kx, ky, var_row=np.broadcast_to(var_row, (ny,)),
                                       var_col=np.broadcast_to(var_col, (nx,)), smooth_px=2.0 * max(sigma_px, 1.0))
        with np.errstate(invalid="ignore"):
            ok = np.abs(f - 1.0) <= MAX_SMOOTHING_CORRECTION
        maps.speed[w] = np.where(ok, maps.speed[w] / np.where(ok, f, 1.0), np.nan)
        if w == 0:  # arrival times come from the same smoothed phase: the same bias
            maps.fit_speed[:] = np.where(ok, maps.fit_speed / np.where(ok, f, 1.0), np.nan)


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
    return tracking.track_cores(detections, max_step_px=max(2.0, 0.1 * period_frames), max_gap_frames=2)


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
    movie = _Movie((nt, nyb, nxb), in_memory=nt * nyb * nxb * 4 <= 0.5 * budget, folder=scratch_dir)
    try:
        bar = _progress(2 * ((nt + block - 1) // block), "reading and cleaning frames", progress)
        mean_b = _bin_pass(data, factor=factor, movie=movie, block=block, bar=bar)
        _clean(sigma_px=sigma_px, options=options, movie=movie, mean_b=mean_b, factor=factor, block=block,
               bar=bar, workers=int(options.workers), notes=notes)
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
            return _empty_result(cal, options, warnings, notes, sigma_px * px_um, mean_b, grid, timings, t_start)
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
    )
    timings["summary_s"] = time.perf_counter() - t0
    timings["total_s"] = time.perf_counter() - t_start
    return Analysis(summary=result[0], maps=result[1], tables=result[2], stacks=result[3], warnings=tuple(warnings),
                    timings_s=timings)


def _grid(cal: Calibration, factor: int) -> dict:
    """Analysis-grid pixel size and the recorded-image position (um) of its
    pixel (0, 0): binned pixel (r, c) covers recorded rows r*f .. r*f + f - 1,
    so its centre is at recorded pixel r*f + (f - 1)/2."""
    px = cal.pixel_size_um
    origin = 0.5 * (factor - 1) * px
    return {"bin": factor, "pixel_size_um": px * factor, "origin_x_um": origin, "origin_y_um": origin}


def _to_recorded(table: dict, *, factor: int, frame_offset: int, pos_cols=("row", "col")) -> dict:
    out = dict(table)
    for k in pos_cols:
        if k in out:
            out[k] = np.asarray(out[k], dtype=np.float64) * factor + 0.5 * (factor - 1)
    for k in ("frame", "first_frame", "last_frame"):
        if k in out:
            out[k] = np.asarray(out[k]) + frame_offset
    for k in ("mean_row", "mean_col"):
        if k in out:
            out[k] = np.asarray(out[k], dtype=np.float64) * factor + 0.5 * (factor - 1)
    for k in ("gyration_radius_px", "max_excursion_px", "path_length_px"):
        if k in out:
            out[k] = np.asarray(out[k], dtype=np.float64) * factor
    return out


def _signal_without_empty_holes(amp, filled, options, core_tracks):
    strict = preprocess.signal_mask(amp, threshold=options.min_amplitude, min_size_px=9)
    holes, n = scipy.ndimage.label(filled & ~strict)
    if n == 0:
        return filled
    keep = np.zeros(n + 1, dtype=bool)
    ny, nx = amp.shape
    for r, c in zip(core_tracks["mean_row"], core_tracks["mean_col"], strict=True):
        r0, c0 = int(min(max(round(r), 0), ny - 1)), int(min(max(round(c), 0), nx - 1))
        window = holes[max(r0 - 1, 0) : r0 + 2, max(c0 - 1, 0) : c0 + 2]
        keep[np.unique(window)] = True
    keep[0] = False
    return strict | keep[holes]


def _summarise(maps: _Maps, *, cal, factor, options, period0, passband, trim, lag, windows, usable, sigma_px,
               mean_b, warnings, notes):
    nyb, nxb = maps.amplitude.shape
    dt_min = cal.frame_interval_min
    px_b = cal.pixel_size_um * factor
    amp = np.nan_to_num(maps.amplitude, nan=0.0)
    # small low-amplitude holes (spiral cores oscillate weakly) stay inside the signal
    wl_guess = float(np.nanmedian(maps.speed[0] * maps.period[0]))
    hole = int(max(64, (0.5 * wl_guess) ** 2)) if np.isfinite(wl_guess) else 64
    filled = preprocess.signal_mask(amp, threshold=options.min_amplitude, min_size_px=hole)
    tracks = _detect_and_track(maps.charges, signal=filled, n_frames=usable, period_frames=period0)
    persistent = tracking.persistent_tracks(
        tracks, min_lifetime_frames=max(1, int(round(options.persistent_periods * period0)))
    )
    # holes without a core are places without signal (obstacles, empty patches): out
    valid = _signal_without_empty_holes(amp, filled, options, persistent.tracks)

    # speeds only where the direction is steady and away from persistent cores
    wl_px = float(np.nanmedian(np.where(valid, maps.speed[0] * maps.period[0], np.nan)))
    # ... and where the smoothing kernel saw signal all round (no dead patch, no second territory)
    speed_ok = valid & (maps.coherence[0] >= options.min_coherence) & kernel_saw_signal(amp, sigma_px=sigma_px)
    per = persistent.tracks
    if len(per["track_id"]):
        rr, cc = np.mgrid[0:nyb, 0:nxb]
        rad = 0.5 * wl_px if np.isfinite(wl_px) else 5.0
        for r, c in zip(per["mean_row"], per["mean_col"], strict=True):
            speed_ok &= np.hypot(rr - r, cc - c) > rad
    # centres closer than a quarter wavelength are one
    merge_px = max(2.0, 0.25 * wl_px) if np.isfinite(wl_px) else 3.0
    cs = track_centres(
        maps.direction,
        maps.coherence,
        valid,
        merge_radius_px=merge_px,
        min_coherence=options.min_coherence,
        cores_rows=per["mean_row"],
        cores_cols=per["mean_col"],
        cores_ids=per["track_id"],
    )
    speed_ok &= kernel_in_one_territory(cs.labels, sigma_px=sigma_px)

    to_um_per_min = px_b / dt_min
    period_map = np.where(valid, maps.period[0] * dt_min, np.nan).astype(np.float32)
    speed_map = np.where(speed_ok, maps.speed[0] * to_um_per_min, np.nan).astype(np.float32)
    wavelength_map = (speed_map * period_map).astype(np.float32)
    fit_map = np.where(speed_ok, maps.fit_speed * to_um_per_min, np.nan).astype(np.float32)
    direction_map = np.where(speed_ok, np.rad2deg(maps.direction[0]), np.nan).astype(np.float32)

    # period time course and dispersion points (per window, per region of a 3 x 3 grid)
    course = []
    disp = {k: [] for k in ("window", "t_min", "region", "period_min", "speed_um_per_min", "n_pixels")}
    nreg = 3
    region = (np.minimum(np.arange(nyb) * nreg // nyb, nreg - 1)[:, None] * nreg
              + np.minimum(np.arange(nxb) * nreg // nxb, nreg - 1)[None, :])
    for i, (w0, w1) in enumerate(windows):
        t_mid = (trim + 0.5 * (w0 + w1)) * dt_min
        pw = np.where(valid, maps.period[i + 1], np.nan)
        q = quartiles(pw * dt_min)
        if q is not None:
            course.append({"t_min": float(t_mid), "period_min": q["median"], "q25": q["q25"], "q75": q["q75"]})
        ok = (speed_ok & (maps.coherence[i + 1] >= options.min_coherence) & np.isfinite(pw)
              & np.isfinite(maps.speed[i + 1]) & kernel_in_one_territory(cs.window_labels[i], sigma_px=sigma_px))
        for g in range(nreg * nreg):
            m = ok & (region == g)
            if m.sum() < 10:
                continue
            disp["window"].append(i)
            disp["t_min"].append(t_mid)
            disp["region"].append(g)
            disp["period_min"].append(float(np.median(pw[m])) * dt_min)
            disp["speed_um_per_min"].append(float(np.median(maps.speed[i + 1][m])) * to_um_per_min)
            disp["n_pixels"].append(int(m.sum()))
    dtypes = {"window": np.int64, "t_min": np.float64, "region": np.int64, "period_min": np.float64,
              "speed_um_per_min": np.float64, "n_pixels": np.int64}
    dispersion = {k: np.asarray(v, dtype=dtypes[k]) for k, v in disp.items()}

    px = cal.pixel_size_um
    dt_s = cal.frame_interval_s
    cores_rec = _to_recorded(tracks.cores, factor=factor, frame_offset=trim)
    tracks_rec = _to_recorded(tracks.tracks, factor=factor, frame_offset=trim)
    pers_rec = _to_recorded(persistent.tracks, factor=factor, frame_offset=trim)
    cores_um = tracking.cores_in_um(cores_rec, pixel_size_um=px, frame_interval_s=dt_s)
    tracks_um = tracking.tracks_in_um(tracks_rec, pixel_size_um=px, frame_interval_s=dt_s)
    spiral_cores = tracking.spiral_core_records(pers_rec, pixel_size_um=px, frame_interval_s=dt_s)
    field_px = float(valid.sum())
    density = (
        tracking.cores_per_cm2(len(per["track_id"]), field_area_px=field_px, pixel_size_um=px_b)
        if field_px > 0 else None
    )
    if not valid.any():
        warnings.append("no pixel carries a signal above the amplitude floor")
    period_q, speed_q = quartiles(period_map), quartiles(speed_map)
    if speed_q is None and period_q is not None:
        warnings.append("front speed not measured: no pixel has a steady wave direction away from cores and collisions")
    grid = _grid(cal, factor)
    centres, centres_tab, terr_course = _centre_records(
        cs, maps=maps, valid=valid, windows=windows, trim=trim, factor=factor, cal=cal, merge_px=merge_px,
        spiral_cores=spiral_cores,
    )
    summary = {
        "schema_version": 1,
        "source": None,  # filled by the caller that knows the file
        "calibration": cal.to_dict(),
        "period_min": period_q,
        "front_speed_um_per_min": speed_q,
        "wavelength_um": quartiles(wavelength_map),
        "period_timecourse": [{"t_min": c["t_min"], "period_min": c["period_min"]} for c in course],
        "spiral_cores": spiral_cores,
        "centres": centres,
        "warnings": list(warnings),
        # extra keys
        "centres_per_cm2": (len(centres) / (field_px * px_b * px_b * 1e-8)) if field_px > 0 else None,
        "unassigned_share": (
            float(np.sum(valid & (cs.labels == 0)) / field_px) if field_px > 0 else None
        ),
        "front_speed_activation_fit_um_per_min": quartiles(fit_map),
        "cores_per_cm2": density,
        "dominant_period_min": period0 * dt_min,
        "analysis": {
            "waves_version": __version__,
            "options": _options_dict(options),
            "grid": grid,
            "passband_period_min": [dt_min / passband[1], dt_min / passband[0]],
            "trimmed_frames_each_end": trim,
            "phase_method": options.phase_method,
            "delay_lag_frames": lag,
            "window_min": (windows[0][1] - windows[0][0]) * dt_min if windows else None,
            "window_step_min": (windows[1][0] - windows[0][0]) * dt_min if len(windows) > 1 else None,
            "window_centres_min": [(trim + 0.5 * (a + b)) * dt_min for a, b in windows],
            "smoothing_sigma_um": sigma_px * px_b,
            "signal_fraction": float(valid.mean()),
            "notes": notes,
        },
        "disclaimer": DISCLAIMER,
    }
    out_maps = {
        "period_min": period_map,
        "front_speed_um_per_min": speed_map,
        "wavelength_um": wavelength_map,
        "front_speed_activation_fit_um_per_min": fit_map,
        "direction_deg": direction_map,
        "territory_labels": cs.labels.astype(np.int32),
        "interval_cv": np.where(valid, maps.interval_cv, np.nan).astype(np.float32),
        "amplitude": maps.amplitude,
        "mean_image": mean_b,
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
        "centres": centres_tab,
        "territories_timecourse": terr_course,
    }
    stacks = {"territory_labels_windows": cs.window_labels}
    return summary, out_maps, tables, stacks


def _arrival_times(strips, shape) -> np.ndarray:
    """(y, x, m) arrival times (frames, NaN-padded) from the per-strip arrays."""
    m = max([t.shape[2] for _, t in strips], default=1)
    out = np.full(shape + (m,), np.nan, np.float32)
    for r0, t in strips:
        out[r0 : r0 + t.shape[0], :, : t.shape[2]] = t
    return out


def _centre_records(cs, *, maps, valid, windows, trim, factor, cal, merge_px, spiral_cores):
    """summary['centres'], the centres table and the per-window territory
    table, in calibrated units and recorded-image coordinates."""
    px = cal.pixel_size_um
    px_b = px * factor
    dt_min = cal.frame_interval_min
    nyb, nxb = valid.shape
    rr, cc = np.mgrid[0:nyb, 0:nxb]
    field_px = max(float(valid.sum()), 1.0)
    area_mm2 = px_b * px_b * 1e-6
    core_by_track = {c["id"]: c for c in spiral_cores}
    arrivals = _arrival_times(maps.arrivals, valid.shape)

    def window_min(w, end):
        if w < 0:
            return None
        a, b = windows[w]
        return float((trim + (b if end else a)) * dt_min)

    records = []
    tab = {k: [] for k in ("id", "kind", "x_um", "y_um", "charge", "rotation", "period_min", "interval_cv",
                           "territory_area_mm2", "equivalent_diameter_um", "field_share", "first_min",
                           "last_min")}
    c = cs.centres
    for i in range(len(c["id"])):
        r, col = c["row"][i], c["col"][i]
        near = valid & (np.hypot(rr - r, cc - col) <= merge_px)
        with warnings_module.catch_warnings():
            warnings_module.simplefilter("ignore", RuntimeWarning)
            period = float(np.nanmedian(maps.period[0][near])) * dt_min if near.any() else float("nan")
            cv = float(np.nanmedian(maps.interval_cv[near])) if near.any() else float("nan")
        # from the waves the centre emitted itself (not those that entrain it later)
        own = np.zeros(0)
        if np.isfinite(period):
            own = emission_intervals(arrivals, r, col, radius_px=merge_px,
                                     max_lag_frames=0.5 * period / dt_min)
        whole = c["first_window"][i] <= 0 and c["last_window"][i] in (-1, len(windows) - 1)
        if len(own):
            period = float(np.mean(own)) * dt_min  # = (last - first) / n over runs of own waves
            cv = float(np.std(own) / np.mean(own)) if len(own) >= 2 else float("nan")
        elif c["kind"][i] == "target" and not whole:
            period = cv = float("nan")  # a source for part of the movie; no own interval seen
        n = int(c["n_pixels"][i])
        area = n * area_mm2
        core = core_by_track.get(int(c["core_track"][i]))
        x_um = (col * factor + 0.5 * (factor - 1)) * px
        y_um = (r * factor + 0.5 * (factor - 1)) * px
        if core is not None:
            x_um, y_um = core["x_um"], core["y_um"]
        rec = {
            "id": int(c["id"][i]),
            "kind": str(c["kind"][i]),
            "x_um": float(x_um),
            "y_um": float(y_um),
            "period_min": period if np.isfinite(period) else None,
            "territory_area_mm2": float(area),
            # extra keys
            "equivalent_diameter_um": float(2e3 * np.sqrt(area / np.pi)),
            "field_share": float(n / field_px),
            "interval_cv": cv if np.isfinite(cv) else None,
            "charge": None if core is None else core["charge"],
            "rotation": None if core is None else core["rotation"],
            "first_min": window_min(int(c["first_window"][i]), False),
            "last_min": window_min(int(c["last_window"][i]), True),
        }
        records.append(rec)
        for k in tab:
            tab[k].append(rec[k])
    dtypes = {"id": np.int64, "kind": object, "rotation": object}
    centres_tab = {
        k: np.asarray([np.nan if v is None else v for v in vals] if k not in dtypes else
                      ["" if v is None else v for v in vals], dtype=dtypes.get(k, np.float64))
        for k, vals in tab.items()
    }
    centres_tab["charge"] = np.asarray([0 if v is None else v for v in tab["charge"]], dtype=np.int64)
    wa = cs.window_areas
    t_mid = np.asarray([(trim + 0.5 * (windows[w][0] + windows[w][1])) * dt_min for w in wa["window"]],
                       dtype=np.float64)
    course = {
        "window": wa["window"],
        "t_min": t_mid,
        "centre_id": wa["centre_id"],
        "territory_area_mm2": wa["n_pixels"].astype(np.float64) * area_mm2,
        "field_share": wa["n_pixels"].astype(np.float64) / field_px,
    }
    return records, centres_tab, course


def _options_dict(options: AnalysisOptions) -> dict:
    d = asdict(options)
    d["period_band_min"] = list(options.period_band_min)
    return d


def _empty_result(cal, options, warnings, notes, sigma_um, mean_b, grid, timings, t_start) -> Analysis:
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
            "grid": grid,
            "smoothing_sigma_um": sigma_um,
            "notes": notes,
        },
        "disclaimer": DISCLAIMER,
    }
    timings["total_s"] = time.perf_counter() - t_start
    return Analysis(summary=summary, maps={"mean_image": mean_b}, tables={}, warnings=tuple(warnings),
                    timings_s=timings)
