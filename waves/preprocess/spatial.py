"""Spatial Gaussian smoothing, its halo and the variance it leaves."""

from __future__ import annotations

import numpy as np
import scipy.ndimage as ndi

from waves.preprocess._checks import (
    _TRUNCATE,
    _as_real_array,
    _float32,
    _positive,
)

# --------------------------------------------------------------------------
# spatial smoothing
# --------------------------------------------------------------------------


def halo_px(sigma_px: float) -> int:
    """Halo (pixels) a tile needs so that `smooth_space` on it, cropped,
    equals the whole-frame result exactly: the Gaussian kernel's radius,
    int(4 sigma + 0.5) as scipy.ndimage computes it."""
    sigma = _positive(sigma_px, "sigma_px", allow_zero=True)
    return int(_TRUNCATE * sigma + 0.5)


def _symmetric_edges(x: np.ndarray, out: np.ndarray, axis: int, sigma: float, radius: int) -> None:
    """Redo, along `axis`, the positions closer than `radius` to either end
    with the Gaussian cut symmetrically at their distance d from the end
    (taps -d .. d, renormalised; d = 0 leaves the sample as it is)."""
    n = x.shape[axis]
    taps = np.exp(-0.5 * (np.arange(radius + 1) / sigma) ** 2)
    for i in sorted({*range(min(radius, n)), *range(max(n - radius, 0), n)}):
        d = min(i, n - 1 - i)
        if d >= radius:
            continue
        w = np.concatenate([taps[d:0:-1], taps[: d + 1]])
        w /= w.sum()
        seg = np.take(x, np.arange(i - d, i + d + 1), axis=axis)
        val = np.tensordot(seg, w.astype(np.float64), axes=([axis], [0]))
        idx = [slice(None)] * x.ndim
        idx[axis] = i
        out[tuple(idx)] = val


def smooth_space(frames, *, sigma_px: float) -> np.ndarray:
    """Gaussian smoothing of every frame (sigma `sigma_px` pixels along y and
    x, none along t), float32.  Works on (t, y, x) or a single (y, x) frame.

    Within a kernel radius (int(4 sigma + 0.5), `halo_px`) of the frame's
    edges the kernel is cut symmetrically about each pixel: a pixel d pixels
    from an edge is averaged over d pixels on either side, and an edge pixel
    is left as it is.  Every pixel's kernel is thus even in y and in x, so a
    plane wave keeps its phase everywhere and only loses amplitude.  A
    reflected or truncated one-sided kernel would instead mix in a mirrored
    wave, flatten the phase gradient and bias front speeds high near the
    edges (+60 % at the edge pixels of a lambda/12 smoothing).  Away from
    the edges this is scipy.ndimage.gaussian_filter1d along each axis.
    """
    arr = _as_real_array(frames, "frames", (2, 3))
    sigma = _positive(sigma_px, "sigma_px", allow_zero=True)
    x = _float32(arr)
    if sigma == 0:
        return x.copy() if x is arr else x
    radius = int(_TRUNCATE * sigma + 0.5)
    cur = x
    for axis in (x.ndim - 2, x.ndim - 1):
        out = np.empty(x.shape, dtype=np.float32)
        ndi.gaussian_filter1d(cur, sigma, axis=axis, output=out, truncate=_TRUNCATE, mode="reflect")
        _symmetric_edges(cur, out, axis, sigma, radius)
        cur = out
    return cur


def smoothing_variance_px2(n: int, *, sigma_px: float) -> np.ndarray:
    """Variance (pixels squared) of the 1-D kernel `smooth_space` applies at
    each of `n` positions along an axis: about sigma^2 inside, falling to 0
    at the ends where the kernel is cut symmetrically (an edge pixel is not
    smoothed).  Used to correct the curvature bias of smoothed phase fields
    (`waves.measure.speed.smoothing_speed_correction`)."""
    sigma = _positive(sigma_px, "sigma_px", allow_zero=True)
    n = int(n)
    out = np.zeros(n, dtype=np.float64)
    if sigma == 0 or n == 0:
        return out
    radius = int(_TRUNCATE * sigma + 0.5)
    j = np.arange(-radius, radius + 1)
    taps = np.exp(-0.5 * (j / sigma) ** 2)
    for i in range(n):
        d = min(i, n - 1 - i, radius)
        w = taps[radius - d : radius + d + 1]
        out[i] = float((w * j[radius - d : radius + d + 1] ** 2).sum() / w.sum())
    return out


def sigma_for_wavelength(
    wavelength_um: float, *, pixel_size_um: float, fraction: float = 1 / 12
) -> float:
    """Smoothing sigma (pixels) for waves of `wavelength_um`: fraction x
    wavelength, default 1/12.

    A Gaussian of sigma s passes a wave of wavelength L with gain
    exp(-2 pi^2 s^2 / L^2): 0.87 at s = L/12, so the wave loses 13 % of its
    amplitude, while white pixel noise (variance spread up to the pixel
    Nyquist frequency) keeps a fraction 1 / (4 pi s^2) of its variance,
    e.g. 1/314 for s = 5 px.  Larger fractions eat the wave (0.58 at L/6).
    """
    wl = _positive(wavelength_um, "wavelength_um")
    px = _positive(pixel_size_um, "pixel_size_um")
    fr = _positive(fraction, "fraction")
    return wl * fr / px
