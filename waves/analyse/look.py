"""The first look: dominant wavelength (sets the analysis grid) and dominant period."""

from __future__ import annotations

import numpy as np

from waves import preprocess
from waves.analyse.clean import _Movie
from waves.measure.period import spectral_period


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
