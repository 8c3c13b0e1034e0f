"""Signal and dish masks, and the difference movie."""

from __future__ import annotations

import math

import numpy as np
import scipy.ndimage as ndi

from waves.errors import InputError, WavesError
from waves.preprocess._checks import (
    _TRUNCATE,
    _as_real_array,
    _float32,
    _positive,
)

# --------------------------------------------------------------------------
# masks
# --------------------------------------------------------------------------


def _remove_small(mask: np.ndarray, min_size_px: int) -> np.ndarray:
    """Drop True components smaller than min_size_px (8-connected)."""
    if min_size_px <= 1 or not mask.any():
        return mask
    labels, count = ndi.label(mask, structure=np.ones((3, 3), dtype=bool))
    sizes = np.bincount(labels.ravel(), minlength=count + 1)
    keep = sizes >= min_size_px
    keep[0] = False
    return keep[labels]


def signal_mask(
    std_map, *, threshold: float | None = None, min_size_px: int = 64, min_contrast: float = 2.0
) -> np.ndarray:
    """Pixels that carry a signal: True where `std_map` (e.g. the temporal
    standard deviation or the analytic amplitude of the band-passed signal;
    magnitudes, so band polarity does not matter) is above a threshold.

    Without `threshold` (same units as the map) the threshold is Otsu's
    (skimage.filters.threshold_otsu) on log(std), which splits noise-only from
    signal pixels whatever the signal's scale.  If the two classes' medians
    differ by less than `min_contrast` times there is no separate noise-only
    region and every pixel with a positive value counts as signal.  Then
    True islands and False holes smaller than `min_size_px` pixels are removed.
    """
    s = _as_real_array(std_map, "std map", (2,))
    min_size = _positive(min_size_px, "min_size_px", integer=True, allow_zero=True)
    contrast = _positive(min_contrast, "min_contrast")
    s = s.astype(np.float64)
    if (s < 0).any():
        raise InputError("the std/amplitude map has negative values; pass a magnitude map")
    positive = s > 0
    if threshold is not None:
        mask = s > _positive(threshold, "threshold", allow_zero=True)
    elif positive.sum() < 2:
        mask = positive
    else:
        logs = np.log(s[positive])
        if logs.max() - logs.min() < 1e-12:
            mask = positive
        else:
            from skimage.filters import threshold_otsu

            t = threshold_otsu(logs)
            low, high = logs[logs <= t], logs[logs > t]
            if (
                high.size == 0
                or low.size == 0
                or np.median(high) - np.median(low) < math.log(contrast)
            ):
                mask = positive
            else:
                mask = s > math.exp(t)
    mask = _remove_small(mask, min_size)
    mask = ~_remove_small(~mask, min_size)
    return mask


def dish_mask(
    mean_image,
    *,
    threshold: float | None = None,
    outside: str = "dark",
    smooth_sigma_px: float = 2.0,
    min_contrast: float = 2.0,
) -> np.ndarray:
    """The dish: True inside, False in the large dark (or bright) surround.

    The mean image is smoothed (Gaussian, `smooth_sigma_px`) so the cell
    texture does not break the dish into pieces, thresholded (Otsu unless
    `threshold` is given, in image units), the largest connected inside
    region kept and its holes filled.  When no surround is visible (the
    Otsu classes' means differ by less than `min_contrast` times) the whole
    frame is the dish.
    """
    img = _as_real_array(mean_image, "mean image", (2,))
    if outside not in ("dark", "bright"):
        raise WavesError(f"outside must be 'dark' or 'bright', got {outside!r}")
    sigma = _positive(smooth_sigma_px, "smooth_sigma_px", allow_zero=True)
    contrast = _positive(min_contrast, "min_contrast")
    x = img.astype(np.float64)
    if sigma > 0:
        x = ndi.gaussian_filter(x, sigma, truncate=_TRUNCATE)
    if threshold is None:
        if x.max() - x.min() <= 1e-12 * max(1.0, abs(x.max())):
            return np.ones(x.shape, dtype=bool)
        from skimage.filters import threshold_otsu

        t = threshold_otsu(x)
        hi, lo = x[x > t].mean(), x[x <= t].mean()
        # the surround is one class, the dish the other, whichever is darker
        visible = hi > 0 and (lo <= 0 or hi / lo >= contrast)
        if not visible:
            return np.ones(x.shape, dtype=bool)
    else:
        try:
            t = float(threshold)
        except (TypeError, ValueError):
            raise WavesError(f"threshold must be a number, got {threshold!r}") from None
        if not math.isfinite(t):
            raise WavesError(f"threshold must be a finite number, got {threshold!r}")
    inside = x > t if outside == "dark" else x <= t
    labels, count = ndi.label(inside)
    if count == 0:
        raise InputError(
            "no pixel is inside the dish at this threshold; lower the threshold or check "
            "the 'outside' option"
        )
    sizes = np.bincount(labels.ravel())
    sizes[0] = 0
    return ndi.binary_fill_holes(labels == int(np.argmax(sizes)))


# --------------------------------------------------------------------------
# difference movie
# --------------------------------------------------------------------------


def difference_movie(frames, *, lag: int = 3) -> np.ndarray:
    """Frame n + lag minus frame n, float32 of shape (t - lag, y, x).

    A common way to show dark-field waves: only what moves remains, the static
    texture cancels (Eckstein et al. 2018 showed frame n + 3 minus n at 20 s
    per frame).  Output frame n belongs to the time between frames n and
    n + lag.  A frame block needs `lag` extra frames at its end.
    """
    arr = _as_real_array(frames, "frames", (3,))
    lag = _positive(lag, "lag", integer=True)
    if lag >= arr.shape[0]:
        raise WavesError(
            f"a difference at lag {lag} needs more than {lag} frames, got {arr.shape[0]}; "
            "lower the lag"
        )
    return _float32(arr[lag:]) - _float32(arr[:-lag])
