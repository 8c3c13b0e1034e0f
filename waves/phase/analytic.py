"""Analytic signal along the time axis, phase and amplitude.

The analytic signal is computed the usual way (Bray & Wikswo 2002): Fourier
transform along time, zero the negative frequencies, double the positive ones,
transform back; the phase is its angle.  Here the mean is removed by zeroing
the zero-frequency bin, and a band-pass can be applied in the same transform,
so detrending, filtering and the Hilbert step cost one forward and one inverse
FFT per pixel.  Work is done on whatever block of pixels the caller passes
(axis 0 is time), so memory is bounded by the block.

Frequencies are in cycles per frame here (the science core knows no
calibration); `passband_from_periods` converts periods in minutes.
"""

from __future__ import annotations

import math

import numba
import numpy as np
import scipy.fft

from waves.errors import WavesError

__all__ = [
    "analytic_signal",
    "spectral_weights",
    "passband_from_periods",
    "phase_and_amplitude",
    "phase_and_amplitude_numpy",
    "delay_embedding_phase",
]


def passband_from_periods(
    period_min_range: tuple[float, float], *, frame_interval_s: float, n_frames: int
) -> tuple[float, float]:
    """Convert a band of periods (minutes) to frequencies in cycles per frame.

    Refuses a band the sampling cannot resolve: the shortest period must span
    more than two frames (Nyquist) and the longest must fit in the movie.
    """
    lo_min, hi_min = (float(v) for v in period_min_range)
    if not (0 < lo_min < hi_min):
        raise WavesError(
            f"period band must be two increasing positive numbers of minutes, got {period_min_range!r}"
        )
    dt_min = frame_interval_s / 60.0
    if lo_min <= 2.0 * dt_min:
        raise WavesError(
            f"the shortest period of the band ({lo_min:g} min) is not longer than two frame "
            f"intervals ({2 * dt_min:g} min): frames are too far apart to resolve it; "
            "raise the band's lower end"
        )
    duration_min = n_frames * dt_min
    if lo_min >= duration_min:
        raise WavesError(
            f"the movie lasts {duration_min:g} min, shorter than the shortest period of the "
            f"band ({lo_min:g} min): too few frames to measure a period"
        )
    f_lo = dt_min / min(hi_min, duration_min)
    f_hi = dt_min / lo_min
    return f_lo, f_hi


def spectral_weights(
    n_frames: int, passband: tuple[float, float] | None = None, *, edge: float = 0.25
) -> np.ndarray:
    """One-sided weights (length n_frames // 2 + 1) that turn an rfft into the
    spectrum of the analytic signal: 0 at DC, 2 for positive frequencies, 1 at
    Nyquist for even n (as scipy.signal.hilbert), times an optional band-pass.

    The band-pass has raised-cosine shoulders of relative width `edge` outside
    [f_lo, f_hi] (cycles per frame), so it rings little.
    """
    n = int(n_frames)
    f = np.fft.rfftfreq(n)
    w = np.full(f.shape, 2.0)
    w[0] = 0.0
    if n % 2 == 0:
        w[-1] = 1.0
    if passband is not None:
        f_lo, f_hi = passband
        gain = np.ones_like(f)
        lo_edge = f_lo * (1.0 - edge)
        hi_edge = f_hi * (1.0 + edge)
        below = f < f_lo
        gain[below] = 0.0
        ramp = below & (f > lo_edge)
        gain[ramp] = 0.5 - 0.5 * np.cos(np.pi * (f[ramp] - lo_edge) / (f_lo - lo_edge))
        above = f > f_hi
        gain[above] = 0.0
        ramp = above & (f < hi_edge)
        gain[ramp] = 0.5 + 0.5 * np.cos(np.pi * (f[ramp] - f_hi) / (hi_edge - f_hi))
        w *= gain
    return w


def analytic_signal(
    signal: np.ndarray,
    *,
    passband: tuple[float, float] | None = None,
    workers: int | None = None,
    detrend_degree: int | None = None,
    pad_frames: int = 0,
    overwrite_x: bool = False,
) -> np.ndarray:
    """Analytic signal of `signal` along axis 0 (time), as complex64.

    Without a passband this equals scipy.signal.hilbert of the mean-removed
    signal.  With one, frequencies outside [f_lo, f_hi] cycles per frame are
    removed in the same transform.

    The FFT treats the series as periodic: a slow trend (a fading lamp, cells
    settling) becomes a sawtooth whose jump at the wrap-around rings through
    the pass band.  `detrend_degree` removes each pixel's least-squares
    polynomial of that degree first (a quadratic spans less than one cycle
    over the movie, far below a band that holds several periods), and
    `pad_frames` mirrors that many frames onto each end (even reflection,
    the end frame not repeated), so the series is continuous where the
    transform joins its ends; the padding is cut off again.  With
    `overwrite_x` a float32 `signal` may be detrended in place (no copy).
    """
    x = np.asarray(signal)
    if x.ndim < 1 or x.shape[0] < 2:
        raise WavesError("an analytic signal needs at least two samples along time")
    n = x.shape[0]
    x = x.astype(np.float32, copy=detrend_degree is not None and not overwrite_x)
    if detrend_degree is not None:
        x = _detrend_poly(x, int(detrend_degree))
    pad = int(pad_frames)
    if not 0 <= pad:
        raise WavesError(f"pad_frames must be >= 0, got {pad_frames!r}")
    pad = min(pad, n - 1)
    if pad:
        x = np.concatenate([x[pad:0:-1], x, x[-2 : -pad - 2 : -1]], axis=0)
    m = x.shape[0]
    spec = scipy.fft.rfft(x, axis=0, workers=workers)
    del x
    w = spectral_weights(m, passband).astype(np.float32)
    spec *= w.reshape((-1,) + (1,) * (spec.ndim - 1))
    full = np.zeros((m,) + spec.shape[1:], dtype=np.complex64)
    full[: spec.shape[0]] = spec
    del spec
    z = scipy.fft.ifft(full, axis=0, overwrite_x=True, workers=workers).astype(np.complex64, copy=False)
    return z[pad : pad + n] if pad else z


def _detrend_poly(x: np.ndarray, degree: int) -> np.ndarray:
    """x minus its least-squares polynomial of `degree` along axis 0, in place
    (float32 x; orthonormal basis from a QR of the scaled Vandermonde matrix)."""
    n = x.shape[0]
    if degree < 0 or n <= degree + 1:
        return x
    t = np.linspace(-1.0, 1.0, n)
    q, _ = np.linalg.qr(np.vander(t, degree + 1, increasing=True))
    q = q.astype(np.float32)
    flat = x.reshape(n, -1)
    for c0 in range(0, flat.shape[1], 4096):  # pixel chunks: the fitted trend never costs a whole copy
        part = flat[:, c0 : c0 + 4096]
        part -= q @ (q.T @ part)
    return x


@numba.njit(cache=True, nogil=True, parallel=True)
def _phase_amp_kernel(z, phase, amp):
    for i in numba.prange(z.shape[0]):
        re = z[i].real
        im = z[i].imag
        phase[i] = math.atan2(im, re)
        amp[i] = math.sqrt(re * re + im * im)


def phase_and_amplitude(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Phase in (-pi, pi] and amplitude |z| of an analytic signal, float32
    (compiled; `phase_and_amplitude_numpy` is its twin)."""
    z = np.asarray(z)
    if z.dtype != np.complex64 or not z.flags.c_contiguous:
        return phase_and_amplitude_numpy(z)
    phase = np.empty(z.shape, dtype=np.float32)
    amp = np.empty(z.shape, dtype=np.float32)
    _phase_amp_kernel(z.reshape(-1), phase.reshape(-1), amp.reshape(-1))
    return phase, amp


def phase_and_amplitude_numpy(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Phase in (-pi, pi] and amplitude |z| of an analytic signal, float32."""
    z = np.asarray(z)
    re = z.real.astype(np.float32, copy=False)
    im = z.imag.astype(np.float32, copy=False)
    return np.arctan2(im, re), np.hypot(re, im)


def delay_embedding_phase(signal: np.ndarray, *, lag_frames: int) -> np.ndarray:
    """Phase from delay embedding per pixel (Gray, Pertsov & Jalife 1998).

    The published form is atan2(x(t + lag) - m, x(t) - m), m the pixel's
    temporal mean, lag about a quarter period; it turns clockwise as time goes
    on.  Here the sine axis is negated, atan2(-(x(t + lag) - m), x(t) - m), so
    that the phase increases in time like the analytic-signal phase: for
    x = cos(w t) and lag = T/4 both give w t.  The last `lag_frames` frames
    have no partner and are NaN.
    """
    x = np.asarray(signal, dtype=np.float32)
    lag = int(lag_frames)
    if not 0 < lag < x.shape[0]:
        raise WavesError(
            f"delay lag must be between 1 and {x.shape[0] - 1} frames, got {lag_frames!r}"
        )
    m = x.mean(axis=0, keepdims=True)
    out = np.full(x.shape, np.nan, dtype=np.float32)
    # x(t) plays the cosine, x(t + lag) the sine of a phase that increases in
    # time: for cos(w t), x(t + T/4) = -sin(w t), so use -(x(t+lag) - m).
    out[:-lag] = np.arctan2(-(x[lag:] - m), x[:-lag] - m)
    return out
