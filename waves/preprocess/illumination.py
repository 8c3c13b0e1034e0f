"""Illumination gain: smooth background estimated and divided out."""

from __future__ import annotations

import numpy as np
import scipy.ndimage as ndi

from waves.errors import InputError
from waves.preprocess._checks import (
    _TRUNCATE,
    _as_real_array,
    _float32,
    _positive,
)

# --------------------------------------------------------------------------
# illumination
# --------------------------------------------------------------------------


def _local_linear_smooth(image: np.ndarray, weight: np.ndarray, sigma: float):
    """Gaussian-weighted local linear regression of `image` (weights `weight`,
    0 outside the field), evaluated at every pixel; float64.

    A plain Gaussian blur is biased near the frame edge and near a mask edge
    by the local slope (reflected or missing neighbours); fitting a plane in
    each Gaussian window removes that first-order bias, which matters for
    vignetting, whose slope is largest at the edges.  Returns the estimate
    and the local weight sum (tiny where no weighted pixel is in reach).
    """
    radius = int(_TRUNCATE * sigma + 0.5)
    k = np.arange(-radius, radius + 1, dtype=np.float64)
    g = np.exp(-0.5 * (k / sigma) ** 2)
    g /= g.sum()
    kernels = [g, g * k, g * k * k]

    def conv(arr, ay, ax):
        out = ndi.correlate1d(arr, kernels[ay], axis=0, mode="constant", cval=0.0)
        return ndi.correlate1d(out, kernels[ax], axis=1, mode="constant", cval=0.0)

    wf = weight * image
    s00, s10, s01 = conv(weight, 0, 0), conv(weight, 1, 0), conv(weight, 0, 1)
    s20, s11, s02 = conv(weight, 2, 0), conv(weight, 1, 1), conv(weight, 0, 2)
    t0, t1, t2 = conv(wf, 0, 0), conv(wf, 1, 0), conv(wf, 0, 1)
    # intercept of the weighted plane fit, Cramer's rule on the 3x3 normal equations
    det = (
        s00 * (s20 * s02 - s11 * s11)
        - s10 * (s10 * s02 - s11 * s01)
        + s01 * (s10 * s11 - s20 * s01)
    )
    num = t0 * (s20 * s02 - s11 * s11) - s10 * (t1 * s02 - s11 * t2) + s01 * (t1 * s11 - s20 * t2)
    scale = np.maximum(s00, 1e-300) ** 3 * sigma**4
    ok = det > 1e-9 * scale
    with np.errstate(invalid="ignore", divide="ignore"):
        plane = num / det
        blur = t0 / s00
    # where the window holds too few pixels for a plane (a thin rim), use the blur
    est = np.where(ok, plane, blur)
    return est, s00


def illumination_gain(mean_image, *, sigma_px: float, mask=None) -> np.ndarray:
    """Smooth multiplicative gain of the illumination, (y, x) float32, mean 1
    over the field (or over `mask`).

    The temporal mean image holds the static field times the vignetting of the
    optics; its large-scale component (Gaussian window of `sigma_px`: make it
    larger than the cell texture and comparable to a wavelength or more) is
    the gain.  It is estimated by Gaussian-weighted local linear regression,
    which, unlike a plain blur, is not pulled down at the frame edges where
    vignetting is steepest.  With a boolean `mask` (True = inside the dish,
    see `dish_mask`) only masked pixels enter the fit, so a dark surround
    does not bias the gain near the dish edge; pixels beyond the fit's reach
    take the nearest estimated value.
    """
    img = _as_real_array(mean_image, "mean image", (2,))
    sigma = _positive(sigma_px, "sigma_px")
    img = img.astype(np.float64)
    if mask is None:
        inside = np.ones(img.shape, dtype=bool)
    else:
        inside = np.asarray(mask)
        if inside.shape != img.shape or inside.dtype != bool:
            raise InputError(
                f"mask must be a boolean array of the image's shape {img.shape}, got "
                f"{inside.dtype} {inside.shape}"
            )
        if not inside.any():
            raise InputError("mask is empty: no pixel to estimate the illumination from")
    gain, weight = _local_linear_smooth(img, inside.astype(np.float64), sigma)
    far = ~(weight > 1e-6) | ~np.isfinite(gain)
    if far.all():
        raise InputError("mask is too small to estimate the illumination from; give a larger one")
    if far.any():  # pixels beyond the kernel's reach: nearest estimated value
        _, (iy, ix) = ndi.distance_transform_edt(far, return_indices=True)
        gain = gain[iy, ix]
    level = float(np.mean(gain[inside]))
    if not level > 0:
        raise InputError(
            "the mean image has no light (its mean is not positive), so no illumination gain "
            "can be divided out; flatten raw intensities, not background-subtracted ones"
        )
    floor = 1e-3 * level
    if float(gain[inside].min()) <= floor:
        raise InputError(
            "the smoothed illumination falls to (almost) zero inside the field; give a mask "
            "of the lit region (dish_mask) or a larger sigma_px"
        )
    return (np.maximum(gain, floor) / level).astype(np.float32)


def apply_gain(frames, gain) -> np.ndarray:
    """frames / gain (gain from `illumination_gain`, broadcast over time), float32."""
    arr = _as_real_array(frames, "frames", (2, 3))
    g = _as_real_array(gain, "gain", (2,))
    if g.shape != arr.shape[-2:]:
        raise InputError(f"gain must have the frames' shape {arr.shape[-2:]}, got {g.shape}")
    if not (g > 0).all():
        raise InputError("gain must be positive everywhere; build it with illumination_gain")
    return (_float32(arr) / g.astype(np.float32)).astype(np.float32, copy=False)


def flatten_illumination(frames, *, sigma_px: float, mask=None) -> np.ndarray:
    """Divide out uneven (multiplicative) illumination, float32.

    Dividing by the smoothed temporal-mean image corrects vignetting, which
    multiplies both the background and the band contrast; subtracting would
    leave the bands' amplitude uneven.  The result keeps the field's mean
    level (the gain has mean 1).  Whole-array convenience for
    `apply_gain(frames, illumination_gain(frames.mean(0), sigma_px=...))`;
    a tiled pipeline computes the gain once from the mean image and applies
    it per tile.
    """
    arr = _as_real_array(frames, "frames", (3,))
    mean_image = arr.mean(axis=0, dtype=np.float64)
    gain = illumination_gain(mean_image, sigma_px=sigma_px, mask=mask)
    return apply_gain(arr, gain)


def relative_amplitude(amplitude, mean_image, *, sigma_px: float, mask=None, flattened: bool) -> np.ndarray:
    """Amplitude map (y, x) in units of the local brightness: fractional
    modulation, float32, so a signal floor set on it does not follow the
    illumination.

    `mean_image` is the temporal mean of the movie before flattening.  When
    the movie was flattened (divided by `illumination_gain`, mean 1 over the
    field) its brightness is the field's mean level everywhere; otherwise it
    is the smooth illumination itself (`illumination_gain` of the mean image
    times that level), estimated the same way (`sigma_px`, `mask`)."""
    amp = _as_real_array(amplitude, "amplitude", (2,), check_finite=False).astype(np.float64)
    img = _as_real_array(mean_image, "mean image", (2,)).astype(np.float64)
    if img.shape != amp.shape:
        raise InputError(f"mean image must have the amplitude map's shape {amp.shape}, got {img.shape}")
    inside = np.ones(img.shape, dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    level = float(np.mean(img[inside]))
    if not level > 0:
        raise InputError("the mean image has no light (its mean is not positive); no relative amplitude")
    if flattened:
        return (amp / level).astype(np.float32)
    gain = illumination_gain(img, sigma_px=sigma_px, mask=inside)
    return (amp / (gain.astype(np.float64) * level)).astype(np.float32)
