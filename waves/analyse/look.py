"""The first look: dominant wavelength (sets the analysis grid) and dominant period."""

from __future__ import annotations

import numpy as np
import scipy.ndimage

from waves import preprocess
from waves.analyse.clean import _Movie
from waves.measure.period import spectral_period
from waves.preprocess.binning import bin_frames_in_order

LOOK_PAD = 4  # zero-padding of the look's spectra: radial bins of a quarter of the field's frequency step
LOOK_FRAMES = 24  # frames the look averages (12 left a recording with every degradation at once without a peak)
LOOK_SMOOTH_PX = 4.0  # Gaussian sigma (recorded px) of the look's frames: texture out, waves kept
NO_WAVE_HINT_PROMINENCE = 10.0  # an out-of-band peak named when nothing is found in the band
# More than this share of the pixels peaking within RED_EDGE_RATIO of the band's longest
# period is a red continuum's signature (measured: 56 % on tests/test_analyse_look.py's red
# field; 0-1.4 % on the all-degradations class fields, a Barkley spiral, two paced channels and
# a slow baseline swing)
RED_EDGE_SHARE = 0.25
RED_EDGE_RATIO = 1.15
HARMONIC_SHARE = 0.25  # as waves.measure.period.spectral_period's default
PEAK_BAND_RATIO = 1.3  # the pixels' periods are looked for within this ratio of the pooled peak
LOOK_PROMINENCE = 3.0  # how far a wave ring's peak stands above the spectrum's trend (common practice, no source)


def _prominent_peak(radial: np.ndarray, lo: int, hi: int) -> int | None:
    """The local maximum of `radial` in [lo, hi) that stands highest above
    the spectrum two to three main-lobe widths of the window away on either
    side, if it stands LOOK_PROMINENCE times above it and 4 times above the
    median; None otherwise.

    Why not the highest bin: moving cell texture puts power at the grain
    scale that, weighted by k, can top a wave ring's peak (measured:
    streaming cells at 10 um/min made the look pick 1 px binning and 8 um
    smoothing where 2 px and 60 um were right).  Waves make a narrow peak,
    as narrow as the field allows (the Hann window's main lobe, two
    frequency steps of the field on either side); grains of random size and
    place make a broad bump."""
    lobe = 2 * LOOK_PAD
    seg = radial[lo:hi]
    floor = 4.0 * float(np.median(seg))
    peaks = lo + 1 + np.flatnonzero((seg[1:-1] >= seg[:-2]) & (seg[1:-1] >= seg[2:]))
    if seg.size > 1 and seg[0] >= seg[1]:  # a wavelength of half the field sits on the range's first bin
        peaks = np.r_[lo, peaks]
    best, k_best = 0.0, None
    for k in peaks:
        if radial[k] < floor:
            continue
        ring = np.r_[max(lo, k - 3 * lobe) : max(lo, k - 2 * lobe), min(hi, k + 2 * lobe) : min(hi, k + 3 * lobe)]
        if ring.size < lobe // 2:
            continue
        score = float(radial[k]) / max(float(np.median(radial[ring])), 1e-300)
        if score > best:
            best, k_best = score, int(k)
    return k_best if best >= LOOK_PROMINENCE else None


def _dominant_wavelength_px(sample: np.ndarray) -> float | None:
    """Dominant spatial wavelength (pixels) of frames from their radially
    averaged power spectrum (Hann window, zero-padded LOOK_PAD times, the peak
    placed by a parabola through its bin and neighbours); None when there is no
    clear peak."""
    ny, nx = sample.shape[1:]
    n = LOOK_PAD * max(ny, nx)  # a square padded grid: the same frequency step on both axes
    win = np.outer(np.hanning(ny), np.hanning(nx)).astype(np.float32)
    power = np.zeros((n, n // 2 + 1))
    for frame in sample:
        x = frame - frame.mean()
        power += np.abs(np.fft.rfft2(x * win, s=(n, n))) ** 2
    fy = np.fft.fftfreq(n)[:, None]
    fx = np.fft.rfftfreq(n)[None, :]
    df = 1.0 / n
    bins = np.rint(np.hypot(fy, fx) / df).astype(int)
    nb = bins.max() + 1
    radial = np.bincount(bins.ravel(), power.ravel(), nb) / np.maximum(np.bincount(bins.ravel(), None, nb), 1)
    # rings and spirals: the transform of cos(k0 r) falls as 1/sqrt(k) about
    # its peak, which pulls a ring average's peak to low k; the ring sum
    # (average times k) does not (the Hankel transform's asymptotics, from memory)
    radial = radial * np.arange(nb)
    lo, hi = 2 * LOOK_PAD, int(0.5 / df)  # above the field-size scale, below the pixel Nyquist
    if hi <= lo + 1:
        return None
    k = _prominent_peak(radial, lo, hi)
    if k is None:
        return None
    if lo < k < hi - 1:
        a, b, c = radial[k - 1], radial[k], radial[k + 1]
        den = a - 2.0 * b + c
        k = k + (0.5 * (a - c) / den if den < 0 else 0.0)
    return 1.0 / (k * df)


# --------------------------------------------------------------------------- passes 1 and 2


def _wavelength_look(data, *, shifts_px: np.ndarray | None = None, lag_frames: int = 0,
                     compiled: bool = True) -> float | None:
    """Dominant wavelength (recorded pixels) of LOOK_FRAMES frames spread over the movie.

    With `shifts_px` ((t, 2) recorded px, waves.analyse.drift_auto) the frames
    are put back first and the border strip the shift leaves empty is cut off;
    with `lag_frames` > 0 the look is on differences frame t + lag minus frame
    t, so that static (and slowly moving) cell texture drops out and the
    waves, which change within a quarter period, dominate.  `compiled`=False
    bins with numpy (the same values), for a thread beside the compiled kernels'."""
    nt, ny, nx = data.shape
    lag = int(min(max(lag_frames, 0), nt - 1))
    idx = np.linspace(0, nt - 1 - lag, min(nt - lag, LOOK_FRAMES)).astype(int)
    sample = np.asarray(data[idx], dtype=np.float32)
    later = np.asarray(data[idx + lag], dtype=np.float32) if lag > 0 else None
    if not np.isfinite(sample).all() or (later is not None and not np.isfinite(later).all()):
        return None  # the binning pass names the bad frames
    # waves span many pixels: a 2x2-binned look finds the wavelength as well, for a quarter of the work
    look_bin = 2 if min(ny, nx) >= 256 else 1
    if shifts_px is not None and np.abs(shifts_px).max() > 0:
        sample = preprocess.apply_drift(sample, shifts_px[idx])
        if later is not None:
            later = preprocess.apply_drift(later, shifts_px[idx + lag])
        m = int(np.ceil(np.abs(shifts_px).max()))
        if min(ny, nx) - 2 * m >= 16:
            sample = sample[:, m : ny - m, m : nx - m]
            later = None if later is None else later[:, m : ny - m, m : nx - m]
    if later is not None:
        sample = later - sample
    else:
        sample = sample - sample.mean(axis=0, keepdims=True)
    if look_bin > 1:
        sample = (preprocess.bin_frames if compiled else bin_frames_in_order)(sample, look_bin)
    # cell texture (grains a few pixels across, streaming or drifting) must not outshine the waves:
    # a Gaussian of LOOK_SMOOTH_PX keeps 84 % of a 60-px wave's power and 11 % of a 17-px
    # grain pattern's (exp(-(2 pi sigma / lambda)^2)); waves shorter than ~15 px need no
    # binning anyway, and without a clear peak the grid stays unbinned
    sample = scipy.ndimage.gaussian_filter(sample, (0.0,) + (LOOK_SMOOTH_PX / look_bin,) * 2, mode="nearest")
    lam = _dominant_wavelength_px(sample)
    return None if lam is None else lam * look_bin


def _dominant_period_frames(movie: _Movie, passband: tuple[float, float],
                            significant: np.ndarray | None = None) -> tuple[float | None, float]:
    """Median dominant period (frames) over a sparse grid of pixels, and the
    fraction of those pixels whose spectral peak stands clear of the noise.
    With `significant` (the (y, x) map of waves.analyse.detect) only its
    pixels count, and the fraction is theirs."""
    x, spec, f = _sampled_spectra(movie)
    band = (f >= passband[0]) & (f <= passband[1])
    if band.sum() < 3:
        return None, 0.0
    if significant is not None:
        ny, nx = movie.shape[1:]
        clear = np.asarray(significant, bool)[:: max(1, ny // 24), :: max(1, nx // 24)].ravel()
        if not clear.any():
            return None, 0.0
    else:
        pb = spec[band]
        # a noise spectrum is flat: its peak is a few times its median; waves stand far out
        clear = pb.max(axis=0) > 20.0 * np.median(pb, axis=0) + 1e-30
        if clear.mean() < 0.1:
            return None, float(clear.mean())
    frac = float(clear.mean())
    periods = spectral_period(x[:, clear], passband=passband)
    periods = periods[np.isfinite(periods)]
    if periods.size == 0:
        return None, frac
    if np.mean(periods >= 1.0 / (RED_EDGE_RATIO * passband[0])) <= RED_EDGE_SHARE:
        # the pixels' own peaks (with their sub-harmonic check) hold several pacemakers'
        # periods alike: their median sets a pass band that keeps them all
        return float(np.median(periods)), frac
    # many pixels peak in the band's slowest bins: a red continuum (slowly changing texture)
    # outweighs the waves there; the waves are the pooled spectra's most prominent peak
    f_star = _pooled_peak(spec[:, clear], f, band)
    if f_star is None:
        return None, frac
    narrow = (max(passband[0], f_star / PEAK_BAND_RATIO), min(passband[1], f_star * PEAK_BAND_RATIO))
    periods = spectral_period(x[:, clear], passband=narrow)
    periods = periods[np.isfinite(periods)]
    if periods.size == 0:
        return None, frac
    return float(np.median(periods)), frac


def _sampled_spectra(movie: _Movie):
    """(x, power, freqs): the time courses of a sparse grid of pixels (about 24 x 24,
    mean removed), their Hann-windowed power spectra and the frequencies (cycles/frame)."""
    nt, ny, nx = movie.shape
    step_r, step_c = max(1, ny // 24), max(1, nx // 24)
    x = np.concatenate([movie.rows(r, r + 1)[:, 0, ::step_c] for r in range(0, ny, step_r)], axis=1)
    x = x - x.mean(axis=0)
    spec = np.abs(np.fft.rfft(x * np.hanning(nt)[:, None].astype(np.float32), axis=0)) ** 2
    return x, spec, np.fft.rfftfreq(nt)


def _pooled(power: np.ndarray, band: np.ndarray) -> np.ndarray:
    """Each pixel's spectrum over its in-band median, the median over pixels."""
    power = np.asarray(power, dtype=np.float64)
    norm = power / np.maximum(np.median(power[band], axis=0, keepdims=True), 1e-300)
    return np.median(norm, axis=1)


def _trend_ratio(pooled: np.ndarray, freqs: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """pooled[idx] over its running median from f / PEAK_BAND_RATIO**2 to f * PEAK_BAND_RATIO**2."""
    w = PEAK_BAND_RATIO**2
    trend = np.array([np.median(pooled[(freqs >= freqs[k] / w) & (freqs <= freqs[k] * w)]) for k in idx])
    return pooled[idx] / np.maximum(trend, 1e-300)


def _local_max(pooled: np.ndarray) -> np.ndarray:
    left = np.r_[-np.inf, pooled[:-1]]
    right = np.r_[pooled[1:], -np.inf]
    return (pooled >= left) & (pooled >= right)


def band_warnings(movie: _Movie, passband: tuple[float, float], period_frames: float | None, *,
                  frame_interval_min: float, band_min: tuple[float, float]) -> list[str]:
    """What the period band may hide: the dominant period at the band's edge, a
    sub-harmonic peak outside the band (the half-period trap: a band that ends
    below the waves' period finds their second harmonic), a stronger peak
    outside it; each with the band to try.  With `period_frames` None (nothing
    found in the band): a clear periodic signal outside it."""
    _, spec, f = _sampled_spectra(movie)
    band = (f >= passband[0]) & (f <= passband[1])
    if band.sum() < 3:
        return []
    nt = movie.shape[0]
    out = []
    lo, hi = band_min
    has = spec[band].max(axis=0) > 0  # pixels outside the cell field are 0
    if not has.any():
        return []
    pooled = _pooled(spec[:, has], band)
    usable = (f >= 2.0 / nt) & (f < 0.5)  # two cycles in the movie at least; below Nyquist
    peaks = _local_max(pooled) & usable
    idx = np.flatnonzero(peaks)
    ratio = dict(zip(idx.tolist(), _trend_ratio(pooled, f, idx).tolist(), strict=True)) if len(idx) else {}
    if period_frames is None:
        clear = [k for k, r in ratio.items() if not band[k] and r >= NO_WAVE_HINT_PROMINENCE]
        if not clear:
            return []
        k = max(clear, key=lambda j: ratio[j])
        p_out = 1.0 / f[k] * frame_interval_min
        return [f"a clear periodic signal ({p_out:.3g} min) lies outside the period band {lo:g}-{hi:g} min; if it is "
                f"the waves, try --period-band {min(lo, 0.5 * p_out):.3g} {max(hi, 2.0 * p_out):.3g}"]
    p = period_frames * frame_interval_min
    k0 = int(np.argmin(np.abs(f - 1.0 / period_frames)))
    p0 = float(pooled[max(0, k0 - 1) : k0 + 2].max())
    suggest = None
    k_sub = int(np.argmin(np.abs(f - 0.5 / period_frames)))
    near = [k for k in (k_sub - 1, k_sub, k_sub + 1) if k in ratio and not band[k]]
    if near:
        k = max(near, key=lambda j: pooled[j])
        if ratio[k] >= LOOK_PROMINENCE and pooled[k] >= HARMONIC_SHARE * p0:
            p_sub = 1.0 / f[k] * frame_interval_min
            suggest = (lo, max(hi, 2.5 * p_sub))
            out.append(f"the waves may have a period of {p_sub:.3g} min, outside the period band {lo:g}-{hi:g} min: "
                       f"what was measured ({p:.3g} min) looks like its second harmonic; try --period-band "
                       f"{suggest[0]:g} {suggest[1]:.3g}")
    if suggest is None:
        stronger = [k for k, r in ratio.items() if not band[k] and r >= LOOK_PROMINENCE and pooled[k] > p0]
        if stronger:
            k = max(stronger, key=lambda j: pooled[j])
            p_out = 1.0 / f[k] * frame_interval_min
            suggest = (min(lo, 0.5 * p_out), max(hi, 2.0 * p_out))
            out.append(f"a stronger periodic signal ({p_out:.3g} min) lies outside the period band {lo:g}-{hi:g} min; "
                       f"if it is the waves, try --period-band {suggest[0]:.3g} {suggest[1]:.3g}")
    if suggest is None and (p <= 1.05 * lo or p >= hi / 1.05):
        edge = "lower" if p <= 1.05 * lo else "upper"
        out.append(f"the dominant period ({p:.3g} min) sits at the {edge} edge of the period band {lo:g}-{hi:g} min: "
                   "the waves' period may lie beyond it; try a band that reaches past it")
    return out


def _pooled_peak(power: np.ndarray, freqs: np.ndarray, band: np.ndarray) -> float | None:
    """The in-band local maximum of the pooled power that stands highest above the
    pooled spectrum's own broad trend: each pixel's power spectrum (bins,
    pixels; all frequencies) over its in-band median, the median over
    pixels, over its running median across frequencies from f /
    PEAK_BAND_RATIO**2 to f * PEAK_BAND_RATIO**2 (reaching past the band's
    edges, so that a continuum rising beyond an edge is trend, not peak).
    Waves make a peak a few bins wide; cell texture that changes slowly
    (streaming cells, growing mounds) makes a red-noise continuum rising
    toward the band's low end, which on a recording with every degradation
    at once was the highest in-band bin of 57 % of the pixels (the median
    pixel's period came out 15.2 min for 6 min waves)."""
    if band.sum() < 3 or power.shape[1] == 0:
        return None
    pooled = _pooled(power, band)
    idx = np.flatnonzero(band)
    ratio = _trend_ratio(pooled, freqs, idx)
    # only local maxima (against the neighbours in or out of the band): a peak's flank above
    # a noise floor has a high ratio too, and a band edge on a continuum rising beyond it is no peak
    peak = _local_max(pooled)[idx]
    if not peak.any():
        return None
    freqs, pooled = freqs[idx], pooled[idx]
    k = int(np.argmax(np.where(peak, ratio, -np.inf)))
    # a harmonic of spiky waves can stand out more than their fundamental: as
    # waves.measure.period.spectral_period does, a sub-harmonic (1/3, then 1/2)
    # with at least HARMONIC_SHARE of the peak's power is the period, when it is a peak
    # itself standing LOOK_PROMINENCE above the trend (a red continuum is no sub-harmonic)
    step = float(freqs[1] - freqs[0])
    for div in (3, 2):
        j = int(np.argmin(np.abs(freqs - freqs[k] / div)))
        if abs(freqs[j] - freqs[k] / div) > 1.01 * step:
            continue  # the sub-harmonic lies below the band
        j = max(0, j - 1) + int(np.argmax(pooled[max(0, j - 1) : j + 2]))
        if peak[j] and ratio[j] >= LOOK_PROMINENCE and pooled[j] >= HARMONIC_SHARE * pooled[k]:
            return float(freqs[j])
    return float(freqs[k])
