"""The first look: dominant wavelength (sets the analysis grid) and dominant period."""

from __future__ import annotations

import numpy as np

from waves import preprocess
from waves.analyse.clean import _Movie
from waves.measure.period import spectral_period

LOOK_PAD = 4  # zero-padding of the look's spectra: radial bins of a quarter of the field's frequency step
LOOK_FRAMES = 12


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
    k = lo + int(np.argmax(radial[lo:hi]))
    if radial[k] < 4.0 * np.median(radial[lo:hi]):
        return None
    if lo < k < hi - 1:
        a, b, c = radial[k - 1], radial[k], radial[k + 1]
        den = a - 2.0 * b + c
        k = k + (0.5 * (a - c) / den if den < 0 else 0.0)
    return 1.0 / (k * df)


# --------------------------------------------------------------------------- passes 1 and 2


def _wavelength_look(data, *, shifts_px: np.ndarray | None = None, lag_frames: int = 0) -> float | None:
    """Dominant wavelength (recorded pixels) of a dozen frames spread over the movie.

    With `shifts_px` ((t, 2) recorded px, waves.analyse.drift_auto) the frames
    are put back first and the border strip the shift leaves empty is cut off;
    with `lag_frames` > 0 the look is on differences frame t + lag minus frame
    t, so that static (and slowly moving) cell texture drops out and the
    waves, which change within a quarter period, dominate."""
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
    lam = _dominant_wavelength_px(preprocess.bin_frames(sample, look_bin) if look_bin > 1 else sample)
    return None if lam is None else lam * look_bin


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
