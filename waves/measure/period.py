"""Wave period per pixel and over time.

Two independent estimates:

- phase advance: the analytic signal z turns by angle(z[t+1] conj z[t]) per
  frame; the mean advance over a pixel's valid frames gives its period,
  2 pi / mean advance.  Using products of consecutive samples, wrapping never
  bites as long as a period spans more than two frames (Nyquist).  With a
  pulse train whose fundamental dominates its harmonics the phase winds once
  per wave, however narrow the pulses (Rouche's theorem), so this estimate
  counts waves, not harmonics.
- spectral peak: the dominant frequency of the pixel's power spectrum within a
  band (common practice), refined by parabolic interpolation of the log
  power, and corrected for harmonics by preferring a sub-harmonic that holds a
  good share of the peak power.

All periods here are in frames; multiply by frame_interval_s / 60 for minutes.
"""

from __future__ import annotations

import numpy as np
import scipy.fft

from waves.errors import WavesError

__all__ = [
    "phase_advance",
    "period_from_advance",
    "period_from_cycles",
    "windowed_period",
    "spectral_period",
    "quartiles",
]

TWO_PI = 2.0 * np.pi


def phase_advance(z: np.ndarray) -> np.ndarray:
    """Per-frame phase advance angle(z[t+1] * conj(z[t])) in (-pi, pi], float32,
    shape (t - 1, ...)."""
    z = np.asarray(z)
    if z.shape[0] < 2:
        raise WavesError("need at least two frames to measure a phase advance")
    prod = z[1:] * np.conj(z[:-1])
    return np.arctan2(prod.imag.astype(np.float32), prod.real.astype(np.float32))


def period_from_advance(advance: np.ndarray, *, valid: np.ndarray | None = None) -> np.ndarray:
    """Period in frames per pixel from per-frame advances (t - 1, ...).

    `valid` (same shape, bool) selects the frames that count.  A pixel whose
    mean advance is not positive, or that has no valid frame, gets NaN.
    """
    adv = np.asarray(advance, dtype=np.float32)
    if valid is None:
        mean = adv.mean(axis=0)
    else:
        v = np.asarray(valid, dtype=bool)
        n = v.sum(axis=0)
        total = np.where(v, adv, 0.0).sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(n > 0, total / np.maximum(n, 1), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        period = np.where(mean > 0, TWO_PI / mean, np.nan)
    return period.astype(np.float32)


def period_from_cycles(advance: np.ndarray) -> np.ndarray:
    """Period in frames per pixel from whole cycles of the unwrapped phase.

    The cumulative phase is followed from the first time it passes a multiple
    of 2 pi to the last time it passes another; the period is the time between
    them divided by the number of whole cycles.  Measuring between equal phase
    levels removes the bias that an uneven phase speed within a cycle (narrow
    pulses) gives a plain mean advance over a window that is not a whole number
    of cycles.  Pixels with less than one whole cycle get NaN.
    """
    adv = np.asarray(advance, dtype=np.float64)
    n = adv.shape[0]
    flat = adv.reshape(n, -1)
    cum = np.concatenate([np.zeros((1, flat.shape[1])), np.cumsum(flat, axis=0)], axis=0)
    levels = cum / TWO_PI
    m_first = np.floor(levels[0]) + 1.0  # first whole level above the start (0 -> 1)
    m_last = np.floor(np.max(levels, axis=0))
    cycles = m_last - m_first
    cols = np.arange(flat.shape[1])

    def crossing_time(level, first):
        above = levels >= level[None, :]
        if first:
            i = np.argmax(above, axis=0)
        else:
            # last upward passage: last index i with levels[i-1] < level <= levels[i]
            up = above[1:] & ~above[:-1]
            i = n - np.argmax(up[::-1], axis=0)
        i = np.clip(i, 1, n)
        lo = levels[i - 1, cols]
        hi = levels[i, cols]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(hi > lo, (level - lo) / (hi - lo), 0.0)
        return i - 1 + frac

    t1 = crossing_time(m_first, True)
    t2 = crossing_time(m_last, False)
    with np.errstate(invalid="ignore", divide="ignore"):
        period = np.where(cycles >= 1, (t2 - t1) / cycles, np.nan)
    return period.reshape(adv.shape[1:]).astype(np.float32)


def windowed_period(
    advance: np.ndarray,
    *,
    window_frames: int,
    step_frames: int,
    valid: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Period (frames) per pixel in sliding windows over time.

    Returns (centres, periods): window-centre frame positions (in the frame
    index of `advance`'s first sample + 0.5, i.e. between frames) and an array
    (n_windows, ...) of periods.
    """
    adv = np.asarray(advance, dtype=np.float32)
    n = adv.shape[0]
    window_frames = int(window_frames)
    step_frames = int(step_frames)
    if window_frames < 2 or step_frames < 1:
        raise WavesError("window must span at least 2 frames and the step at least 1")
    if window_frames > n:
        raise WavesError(
            f"a {window_frames}-frame window does not fit in {n + 1} frames; shorten the window"
        )
    starts = np.arange(0, n - window_frames + 1, step_frames)
    out = np.empty((len(starts),) + adv.shape[1:], dtype=np.float32)
    for i, s in enumerate(starts):
        sl = slice(s, s + window_frames)
        out[i] = period_from_advance(adv[sl], valid=None if valid is None else valid[sl])
    centres = starts + window_frames / 2.0
    return centres.astype(np.float64), out


def spectral_period(
    signal: np.ndarray,
    *,
    passband: tuple[float, float],
    harmonic_share: float = 0.25,
) -> np.ndarray:
    """Dominant period (frames) per pixel from the power spectrum along axis 0.

    The signal is mean-removed and Hann-windowed; the peak in `passband`
    (cycles per frame) is refined by a parabola through the log power of the
    peak bin and its neighbours.  If the power at half (or a third of) the
    peak frequency is at least `harmonic_share` of the peak's, the peak is
    taken to be a harmonic and the sub-harmonic is reported.  Pixels without
    power in the band get NaN.
    """
    x = np.asarray(signal, dtype=np.float32)
    n = x.shape[0]
    if n < 8:
        raise WavesError(f"need at least 8 frames for a spectral period, got {n}")
    win = np.hanning(n).astype(np.float32).reshape((-1,) + (1,) * (x.ndim - 1))
    spec = scipy.fft.rfft((x - x.mean(axis=0)) * win, axis=0)
    power = (spec.real**2 + spec.imag**2).astype(np.float64)
    f = np.fft.rfftfreq(n)
    f_lo, f_hi = passband
    band = (f >= f_lo) & (f <= f_hi)
    if band.sum() < 1:
        raise WavesError(
            "the period band holds no frequency bin of this movie: widen the band "
            "or use a longer movie"
        )
    idx_band = np.flatnonzero(band)
    p_band = power[idx_band]
    k = idx_band[np.argmax(p_band, axis=0)]
    flat = power.reshape(power.shape[0], -1)
    kf = k.reshape(-1)
    cols = np.arange(flat.shape[1])
    peak = flat[kf, cols]

    def refine(kk):
        kk = np.clip(kk, 1, len(f) - 2)
        a = np.log(flat[kk - 1, cols] + 1e-30)
        b = np.log(flat[kk, cols] + 1e-30)
        c = np.log(flat[kk + 1, cols] + 1e-30)
        denom = a - 2 * b + c
        with np.errstate(invalid="ignore", divide="ignore"):
            delta = np.where(np.abs(denom) > 1e-12, 0.5 * (a - c) / denom, 0.0)
        return (kk + np.clip(delta, -0.5, 0.5)) / n

    freq = refine(kf)
    corrected = np.zeros(kf.shape, dtype=bool)
    # harmonic check: look for a strong peak near f/2 and f/3 inside the band
    for div in (3, 2):
        ksub = np.rint(kf / div).astype(int)
        ok = ksub >= 1
        ksub = np.clip(ksub, 1, len(f) - 2)
        # best bin within +-1 of the nominal sub-harmonic
        trio = np.stack([flat[ksub - 1, cols], flat[ksub, cols], flat[ksub + 1, cols]])
        best = ksub + np.argmax(trio, axis=0) - 1
        psub = flat[best, cols]
        take = ok & ~corrected & (f[best] >= f_lo) & (psub >= harmonic_share * peak)
        if take.any():
            freq = np.where(take, refine(best), freq)
            corrected |= take
    with np.errstate(invalid="ignore", divide="ignore"):
        period = np.where((peak > 0) & (freq > 0), 1.0 / freq, np.nan)
    return period.reshape(power.shape[1:]).astype(np.float32)


def quartiles(values: np.ndarray) -> dict | None:
    """Median and quartiles of the finite values, or None when there are none."""
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return None
    q25, med, q75 = np.percentile(v, [25, 50, 75])
    return {"median": float(med), "q25": float(q25), "q75": float(q75), "n": int(v.size)}
