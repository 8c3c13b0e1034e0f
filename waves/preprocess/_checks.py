"""Argument checks and constants shared by the preprocessing modules."""

from __future__ import annotations

import math

import numpy as np

# scipy.signal and scikit-image cost about a second to import; they are
# imported where they are used (band-pass, Otsu threshold, registration).
from waves.errors import InputError, WavesError

# Default band of periods, minutes.  Aggregating amoeba fields show periods of
# about 5-10 min early, falling to 2-4 min late (REFERENCES.md, [read] and
# [memory]); 2-20 min keeps both with a margin on the slow side.
DEFAULT_PERIOD_MIN_RANGE: tuple[float, float] = (2.0, 20.0)

# Gaussian kernels are cut at this many sigmas (scipy.ndimage's default).
_TRUNCATE = 4.0


# --------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------


def _signal():
    import scipy.signal

    return scipy.signal


def _as_real_array(data, name: str, ndims: tuple[int, ...], *, check_finite: bool = True):
    """`data` as a numpy array (memory maps stay memory maps) after checking
    dimensions, dtype and, for floats, finiteness."""
    try:
        arr = np.asarray(data)
    except Exception as exc:  # ragged lists and the like
        raise InputError(
            f"{name} must be a numeric array, got {type(data).__name__}: {exc}"
        ) from None
    if arr.dtype == bool:
        arr = arr.astype(np.uint8)
    if not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
        raise InputError(
            f"{name} must hold real numbers (integers or floats), got dtype {arr.dtype}; "
            "convert complex or object data before preprocessing"
        )
    if arr.ndim not in ndims:
        want = " or ".join(f"{d}-D" for d in ndims)
        axes = {1: "(t,)", 2: "(y, x)", 3: "(t, y, x)"}
        names = " or ".join(axes.get(d, f"{d}-D") for d in ndims)
        raise InputError(f"{name} must be {want} {names}, got shape {arr.shape}")
    if arr.size == 0:
        raise InputError(f"{name} is empty (shape {arr.shape}); give at least one pixel and frame")
    if check_finite and np.issubdtype(arr.dtype, np.floating) and not np.isfinite(arr).all():
        bad = int(arr.size - np.count_nonzero(np.isfinite(arr)))
        raise InputError(
            f"{name} holds {bad} NaN or infinite values; replace them (e.g. with the pixel's "
            "temporal mean) or crop them away before preprocessing"
        )
    return arr


def _positive(value, name: str, *, integer: bool = False, allow_zero: bool = False):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise WavesError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        least = "zero or more" if allow_zero else "positive"
        raise WavesError(f"{name} must be a {least} finite number, got {value!r}")
    if integer:
        if v != int(v):
            raise WavesError(f"{name} must be a whole number, got {value!r}")
        return int(v)
    return v


def _float32(arr: np.ndarray) -> np.ndarray:
    return np.asarray(arr, dtype=np.float32)
