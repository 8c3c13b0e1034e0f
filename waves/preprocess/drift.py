"""Rigid drift (translation) estimation and correction."""

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
# drift (rigid translation) estimation and correction
# --------------------------------------------------------------------------


def _texture(image: np.ndarray, texture_sigma_px: float | None) -> np.ndarray:
    """Image minus its Gaussian-smoothed self: keeps the fine static texture of
    the cell field, drops broad features such as wave bands and vignetting."""
    img = image.astype(np.float32, copy=True)
    if texture_sigma_px is not None:
        img -= ndi.gaussian_filter(img, texture_sigma_px, truncate=_TRUNCATE)
    else:
        img -= img.mean(dtype=np.float64)
    return img


def _sample_indices(start: int, stop: int, max_frames: int) -> np.ndarray:
    n = stop - start
    if n <= max_frames:
        return np.arange(start, stop)
    return np.unique(np.linspace(start, stop - 1, max_frames).round().astype(np.intp))


def _reference(frames, idx, how: str, shifts=None) -> np.ndarray:
    """Temporal mean or median of frames[idx] (optionally drift-corrected).

    Moving bands pass every pixel, so the temporal mean/median of many frames
    keeps the static texture and washes the bands out."""
    stack = np.empty((len(idx),) + frames.shape[1:], dtype=np.float32)
    for k, i in enumerate(idx):
        frame = _float32(frames[i])
        if shifts is not None and np.any(shifts[i] != 0):
            frame = ndi.shift(frame, -shifts[i], order=1, mode="nearest")
        stack[k] = frame
    if how == "median":
        return np.median(stack, axis=0).astype(np.float32)
    return stack.mean(axis=0, dtype=np.float64).astype(np.float32)


def _checked_texture(image: np.ndarray, texture_sigma_px, what: str) -> np.ndarray:
    tex = _texture(image, texture_sigma_px)
    # float32 rounding leaves about 1e-7 of the level behind in a flat image
    if not float(np.abs(tex).max()) > 1e-5 * float(np.abs(image).max()):
        raise InputError(
            f"{what} is featureless (no texture left after removing its mean or blur), so "
            "drift cannot be measured on it; remove blank frames, or skip drift correction"
        )
    return tex


def _register(ref_tex: np.ndarray, frame: np.ndarray, upsample: int, texture_sigma_px, index):
    """Displacement (dy, dx) of `frame`'s content relative to the reference."""
    if np.issubdtype(frame.dtype, np.floating) and not np.isfinite(frame).all():
        raise InputError(
            f"frame {index} holds NaN or infinite values; replace them before registering"
        )
    moving = _checked_texture(_float32(frame), texture_sigma_px, f"frame {index}")
    from skimage.registration import phase_cross_correlation

    shift, _, _ = phase_cross_correlation(
        ref_tex, moving, upsample_factor=upsample, normalization=None
    )
    # skimage returns the shift that moves `moving` onto the reference: the
    # content's displacement is its negative.
    return -np.asarray(shift, dtype=np.float64)


def estimate_drift(
    frames,
    *,
    reference: str = "median",
    upsample: int = 10,
    max_frames: int = 50,
    window_frames: int = 60,
    texture_sigma_px: float | None = 3.0,
    passes: int = 2,
) -> np.ndarray:
    """Rigid drift of every frame, (t, 2) float64 array of (dy, dx) in pixels.

    Row i is the displacement of frame i's content relative to the reference
    image: a feature at (r, c) in the reference appears at (r + dy, c + dx)
    in frame i.  `apply_drift` undoes it.  Found by cross-correlation
    (skimage.registration.phase_cross_correlation, precision 1/`upsample`
    pixel) without spectral whitening, so that the high-pass below can keep
    broad bands out of the correlation (whitening would undo it and amplify
    pixel noise).

    Reference images (`reference`):
    - 'median' or 'mean': temporal median/mean of up to `max_frames` frames
      spread evenly over the movie.  Wave bands move, so they wash out of this
      image while the static cell texture stays; bands are thus not mistaken
      for drift.  With `passes` = 2 the reference is rebuilt once from the
      drift-corrected frames and every frame registered again, which sharpens
      a reference blurred by large drift.
    - 'running': for slow drift over hours, during which the texture changes.
      The movie is cut into consecutive blocks of `window_frames` frames (make
      it span a few wave periods), each with its own median reference; block
      references are registered to their predecessor and the offsets summed,
      frames are registered to their own block's reference.  Shifts are then
      relative to the first block's reference; errors add up as a random walk
      over blocks (about 1/upsample px per block at most).  `passes` does not
      apply here.

    Shifts are relative to the reference, whose origin is the typical
    position of the frames it was built from; subtract shifts[0] to make
    them relative to the first frame instead.  Drift measured on binned
    frames is in binned pixels: multiply by the factor for the full frames.

    `texture_sigma_px` (default 3 px): register high-pass versions (image
    minus its Gaussian blur of this sigma), which keep the cell texture and
    drop wave bands and uneven illumination.  Make it a few times the texture
    grain and well below the wavelength; None registers mean-removed images.
    On a textured field with moving target bands twice the texture's
    amplitude the error stays below 0.1 px (tests/test_preprocess.py).
    """
    arr = _as_real_array(frames, "frames", (3,), check_finite=False)
    if reference not in ("median", "mean", "running"):
        raise WavesError(
            f"drift reference must be 'median', 'mean' or 'running', got {reference!r}"
        )
    upsample = _positive(upsample, "upsample", integer=True)
    max_frames = _positive(max_frames, "max_frames", integer=True)
    window_frames = _positive(window_frames, "window_frames", integer=True)
    passes = _positive(passes, "passes", integer=True)
    if texture_sigma_px is not None:
        texture_sigma_px = _positive(texture_sigma_px, "texture_sigma_px")
    n = arr.shape[0]
    if min(arr.shape[1:]) < 8:
        raise InputError(
            f"frames of {arr.shape[1]} x {arr.shape[2]} pixels are too small to register; "
            "give at least 8 x 8 pixels"
        )

    shifts = np.zeros((n, 2), dtype=np.float64)
    if reference in ("median", "mean"):
        idx = _sample_indices(0, n, max_frames)
        for p in range(passes):
            if p > 0 and np.abs(shifts).max() < 0.5:
                break  # the reference was not blurred by drift: nothing to refine
            ref = _reference(arr, idx, reference, shifts if p > 0 else None)
            ref_tex = _checked_texture(ref, texture_sigma_px, "the reference image")
            new = np.empty_like(shifts)
            for i in range(n):
                new[i] = _register(ref_tex, arr[i], upsample, texture_sigma_px, i)
            # a rebuilt reference is made of frames put back by `shifts`, so it
            # sits where the first one did: the new shifts keep its origin
            shifts = new
        return shifts

    starts = list(range(0, n, window_frames))
    if len(starts) > 1 and n - starts[-1] < max(2, window_frames // 2):
        starts.pop()  # fold a short last block into its predecessor
    stops = starts[1:] + [n]
    offset = np.zeros(2)
    prev_tex = None
    for start, stop in zip(starts, stops, strict=True):
        ref = _reference(arr, _sample_indices(start, stop, max_frames), "median")
        ref_tex = _checked_texture(
            ref, texture_sigma_px, f"the reference of frames {start}-{stop - 1}"
        )
        if prev_tex is not None:
            from skimage.registration import phase_cross_correlation

            shift, _, _ = phase_cross_correlation(
                prev_tex, ref_tex, upsample_factor=upsample, normalization=None
            )
            offset = offset - np.asarray(shift, dtype=np.float64)
        for i in range(start, stop):
            shifts[i] = offset + _register(ref_tex, arr[i], upsample, texture_sigma_px, i)
        prev_tex = ref_tex
    return shifts


def _check_shifts(shifts, n_frames: int) -> np.ndarray:
    s = _as_real_array(shifts, "shifts", (2,)).astype(np.float64)
    if s.shape != (n_frames, 2):
        raise InputError(
            f"shifts must be ({n_frames}, 2) (dy, dx per frame, as estimate_drift returns), "
            f"got shape {s.shape}"
        )
    return s


def apply_drift(frames, shifts) -> np.ndarray:
    """Undo a drift: frame i is shifted by -shifts[i] (scipy.ndimage.shift,
    linear interpolation, edges extended with the nearest pixel), float32.

    Works on any block of frames given the matching rows of `shifts`, and on
    a row tile read with `drift_halo_px(shifts)` rows of halo (crop the halo
    afterwards; the result then equals the whole-frame correction).
    """
    arr = _as_real_array(frames, "frames", (3,))
    s = _check_shifts(shifts, arr.shape[0])
    out = np.empty(arr.shape, dtype=np.float32)
    for i in range(arr.shape[0]):
        frame = _float32(arr[i])
        if s[i, 0] == 0 and s[i, 1] == 0:
            out[i] = frame
        else:
            ndi.shift(frame, -s[i], output=out[i], order=1, mode="nearest")
    return out


def drift_halo_px(shifts) -> int:
    """Rows of halo a row tile needs so that `apply_drift` on the tile equals
    the whole-frame result (linear interpolation reads floor and floor + 1)."""
    s = _as_real_array(shifts, "shifts", (2,))
    if s.shape[-1] != 2:
        raise InputError(f"shifts must be (t, 2), got shape {s.shape}")
    return int(math.floor(float(np.abs(s[:, 0]).max()))) + 2
