"""Cleaning steps applied to a (t, y, x) stack before phase mapping.

Every step is a function on arrays: standard numpy arrays (or memory maps) in,
float32 arrays out, options keyword-only.  The science core knows no file
formats; calibration enters only where a step needs it (`frame_interval_s`,
periods in minutes).  Nothing assumes the polarity of the bands: every step is
linear in the signal or works on magnitudes, so bright and dark bands are
treated alike.

How each step may be cut up by the analysis pipeline, which works on spatial
tiles (row blocks with halos) of a memory-mapped stack:

==========================  ==========================================================
step                        can be applied to
==========================  ==========================================================
`bin_frames`                any frame block; a row tile whose first row is a multiple
                            of the factor
`estimate_drift`            whole frames (binned if large), read one frame at a time
`apply_drift`               any frame block with its rows of `shifts`; a row tile with
                            `drift_halo_px(shifts)` rows of halo, then cropped
`illumination_gain`         the temporal mean image (whole field)
`apply_gain`                any block or tile with the matching part of the gain
`detrend_time`              any spatial tile holding all frames (pixels independent)
`bandpass_time`             any spatial tile holding all frames (pixels independent)
`smooth_space`              any frame block; a row tile with `halo_px(sigma_px)` rows
                            of halo, then cropped (exactly equal to the whole frame)
`difference_movie`          a frame block with `lag` extra frames at its end
`signal_mask`, `dish_mask`  whole-field maps (small: one value per pixel)
==========================  ==========================================================

Units: spatial options in pixels of the array passed (`sigma_px`), times in
seconds (`frame_interval_s`) and periods in minutes (`period_min_range`).
Shifts are (dy, dx) in pixels, rows first, as everywhere in (t, y, x).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.ndimage as ndi
from numba import njit, prange

# scipy.signal and scikit-image cost about a second to import; they are
# imported where they are used (band-pass, Otsu threshold, registration).
from waves.errors import InputError, WavesError

__all__ = [
    "DEFAULT_PERIOD_MIN_RANGE",
    "bin_frames",
    "estimate_drift",
    "apply_drift",
    "drift_halo_px",
    "illumination_gain",
    "apply_gain",
    "flatten_illumination",
    "detrend_time",
    "butterworth_sos",
    "bandpass_padlen",
    "bandpass_settle_frames",
    "bandpass_time",
    "sosfiltfilt_numba",
    "smooth_space",
    "halo_px",
    "sigma_for_wavelength",
    "smoothing_variance_px2",
    "signal_mask",
    "dish_mask",
    "difference_movie",
]

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


# --------------------------------------------------------------------------
# binning
# --------------------------------------------------------------------------


def bin_frames(frames, factor: int) -> np.ndarray:
    """Block-mean spatial binning by an integer `factor`, float32.

    `frames` is (t, y, x) or (y, x).  Rows and columns that do not fill a
    whole block are dropped at the bottom and right edges (row ny - ny %
    factor onwards, same for columns), so output pixel (r, c) is the mean of
    input rows r*factor .. r*factor + factor - 1 and the same columns; its
    centre sits at input pixel (r*factor + (factor-1)/2, c*factor + (factor-1)/2).
    The pixel size grows by `factor` (units.Calibration.binned).
    """
    arr = _as_real_array(frames, "frames", (2, 3))
    f = _positive(factor, "binning factor", integer=True)
    ny, nx = arr.shape[-2:]
    if f > min(ny, nx):
        raise WavesError(
            f"binning factor {f} is larger than the frame ({ny} x {nx} pixels); use a factor "
            f"of at most {min(ny, nx)}"
        )
    if f == 1:
        return _float32(arr).copy() if arr.dtype == np.float32 else _float32(arr)
    src = arr[None] if arr.ndim == 2 else arr
    out = np.empty((src.shape[0], ny // f, nx // f), dtype=np.float32)
    for t0 in range(0, src.shape[0], 64):  # bounded copies of memory-mapped input
        block = np.ascontiguousarray(src[t0 : t0 + 64])
        if block.dtype == np.bool_:
            block = block.view(np.uint8)
        _bin_kernel(block, f, out[t0 : t0 + 64])
    return out[0] if arr.ndim == 2 else out


def bin_frames_numpy(frames, factor: int) -> np.ndarray:
    """Readable numpy twin of `bin_frames` (reshape and mean in float64)."""
    arr = np.asarray(frames)
    f = int(factor)
    ny, nx = arr.shape[-2:]
    by, bx = ny // f, nx // f
    lead = arr.shape[:-2]
    blocks = arr[..., : by * f, : bx * f].reshape(lead + (by, f, bx, f))
    nd = blocks.ndim
    return blocks.mean(axis=(nd - 3, nd - 1), dtype=np.float64).astype(np.float32)


@njit(cache=True, nogil=True, parallel=True)
def _bin_kernel(block, factor, out):  # pragma: no cover - compiled
    """out[t, i, j] = mean of block[t, i*f:(i+1)*f, j*f:(j+1)*f], summed in float64."""
    n, ny, nx = out.shape
    inv = 1.0 / (factor * factor)
    for t in prange(n):
        row = np.empty(nx, dtype=np.float64)
        for i in range(ny):
            row[:] = 0.0
            for di in range(factor):
                r = i * factor + di
                for j in range(nx):
                    acc = 0.0
                    c0 = j * factor
                    for dj in range(factor):
                        acc += block[t, r, c0 + dj]
                    row[j] += acc
            for j in range(nx):
                out[t, i, j] = row[j] * inv


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


# --------------------------------------------------------------------------
# temporal detrend and band-pass
# --------------------------------------------------------------------------


def _as_time_block(block) -> tuple[np.ndarray, tuple[int, ...]]:
    arr = _as_real_array(block, "block", (1, 2, 3))
    return arr, arr.shape


def detrend_time(block, *, order: int = 1) -> np.ndarray:
    """Remove each pixel's least-squares polynomial trend of degree `order`
    along time (axis 0), float32 of the block's shape.

    order 0 removes the mean, 1 a straight line (like scipy.signal.detrend),
    2 a parabola, and so on.  Vectorised: the polynomial basis is made
    orthonormal once (QR of the Vandermonde matrix on t scaled to [-1, 1]) and
    the fit of every pixel is one matrix product, done in float64.
    """
    arr, shape = _as_time_block(block)
    order = _positive(order, "detrend order", integer=True, allow_zero=True)
    n = shape[0]
    if order >= n:
        raise WavesError(
            f"a degree-{order} trend needs more than {order} frames, the block has {n}; "
            "lower the order"
        )
    t = np.linspace(-1.0, 1.0, n) if n > 1 else np.zeros(1)
    q, _ = np.linalg.qr(np.vander(t, order + 1, increasing=True))
    x = np.asarray(arr, dtype=np.float64).reshape(n, -1)
    trend = q @ (q.T @ x)
    return (x - trend).astype(np.float32).reshape(shape)


def _band_frequencies(
    period_min_range, frame_interval_s: float, n_frames: int | None
) -> tuple[float, float]:
    """Band edges in cycles per frame (low, high) after checking the band."""
    dt_s = _positive(frame_interval_s, "frame_interval_s")
    try:
        lo_min, hi_min = (float(v) for v in period_min_range)
    except (TypeError, ValueError):
        raise WavesError(
            f"period_min_range must be two numbers of minutes (shortest, longest), got "
            f"{period_min_range!r}"
        ) from None
    if not (math.isfinite(lo_min) and math.isfinite(hi_min) and 0 < lo_min < hi_min):
        raise WavesError(
            "period_min_range must be two increasing positive numbers of minutes "
            f"(shortest, longest), got {period_min_range!r}"
        )
    dt_min = dt_s / 60.0
    if lo_min <= 2.0 * dt_min:
        raise WavesError(
            f"the shortest period of the band ({lo_min:g} min) is not longer than two frame "
            f"intervals ({2 * dt_min:g} min): frames are too far apart to resolve it; raise "
            "the band's shortest period or film faster"
        )
    if n_frames is not None and n_frames * dt_min < hi_min:
        raise WavesError(
            f"too few frames: the movie lasts {n_frames} frames x {dt_s:g} s = "
            f"{n_frames * dt_min:g} min, shorter than the band's longest period ({hi_min:g} "
            "min); lower the longest period or analyse a longer movie"
        )
    return dt_min / hi_min, dt_min / lo_min


def butterworth_sos(
    *, frame_interval_s: float, period_min_range=DEFAULT_PERIOD_MIN_RANGE, order: int = 2
) -> np.ndarray:
    """Second-order sections (scipy.signal.butter, output='sos') of the
    Butterworth band-pass passing periods in `period_min_range` minutes,
    designed in cycles per frame.  `order` is per edge (2 order sections)."""
    order = _positive(order, "filter order", integer=True)
    f_lo, f_hi = _band_frequencies(period_min_range, frame_interval_s, None)
    return _signal().butter(order, [f_lo, f_hi], btype="bandpass", output="sos", fs=1.0)


def bandpass_padlen(n_frames: int, *, frame_interval_s: float, period_min_range) -> int:
    """Frames of padding added at each end before filtering: one longest
    period (so the filter starts up on the padding, not on the movie),
    at most n_frames - 1."""
    f_lo, _ = _band_frequencies(period_min_range, frame_interval_s, n_frames)
    return int(min(n_frames - 1, math.ceil(1.0 / f_lo)))


def bandpass_settle_frames(
    *,
    frame_interval_s: float,
    period_min_range=DEFAULT_PERIOD_MIN_RANGE,
    order: int = 2,
    tolerance: float = 0.01,
) -> int:
    """Frames at each movie end that a start-up transient can still reach.

    The number of frames after which the forward filter's impulse response
    envelope stays below `tolerance` of its peak.  Padding absorbs most of
    the transient; the pipeline should still flag (or trim) this many frames
    at each end, since false phase singularities appear there otherwise.
    """
    tol = _positive(tolerance, "tolerance")
    sos = butterworth_sos(
        frame_interval_s=frame_interval_s, period_min_range=period_min_range, order=order
    )
    f_lo, _ = _band_frequencies(period_min_range, frame_interval_s, None)
    n = int(20 * math.ceil(1.0 / f_lo)) + 16
    impulse = np.zeros(n)
    impulse[0] = 1.0
    h = np.abs(_signal().sosfilt(sos, impulse))
    above = np.nonzero(h > tol * h.max())[0]
    return int(above[-1]) + 1


@njit(cache=True, nogil=True)
def _sosfiltfilt_kernel(ext, sos, zi, out, edge):  # pragma: no cover - compiled
    """Forward-backward SOS filter along axis 0 of `ext` (n_ext, m), float32.

    Transposed direct form II per section, state kept in float64; initial
    states zi * first sample (forward) and zi * last forward output
    (backward), as scipy.signal.sosfiltfilt.  The forward output overwrites
    `ext`; rows edge .. edge + out.shape[0] of the backward output go to `out`.
    """
    n_ext, m = ext.shape
    n_sec = sos.shape[0]
    n_out = out.shape[0]
    z0 = np.empty((n_sec, m))
    z1 = np.empty((n_sec, m))
    v = np.empty(m)  # one time step of all pixels, passed through the sections
    for direction in range(2):
        first = 0 if direction == 0 else n_ext - 1
        for s in range(n_sec):
            for j in range(m):
                z0[s, j] = zi[s, 0] * ext[first, j]
                z1[s, j] = zi[s, 1] * ext[first, j]
        for step in range(n_ext):
            k = step if direction == 0 else n_ext - 1 - step
            for j in range(m):
                v[j] = ext[k, j]
            for s in range(n_sec):
                b0 = sos[s, 0]
                b1 = sos[s, 1]
                b2 = sos[s, 2]
                a1 = sos[s, 4]
                a2 = sos[s, 5]
                # inner loop over pixels: contiguous, vectorised by the compiler
                for j in range(m):
                    x = v[j]
                    y = b0 * x + z0[s, j]
                    z0[s, j] = b1 * x - a1 * y + z1[s, j]
                    z1[s, j] = b2 * x - a2 * y
                    v[j] = y
            if direction == 0:
                for j in range(m):
                    ext[k, j] = v[j]
            elif edge <= k < edge + n_out:
                for j in range(m):
                    out[k - edge, j] = v[j]
    return out


def _pad_time(x: np.ndarray, padtype: str | None, padlen: int) -> np.ndarray:
    """Extend along axis 0 the way scipy.signal's odd_ext/even_ext/const_ext do."""
    if padtype is None or padlen == 0:
        return np.array(x, dtype=np.float32, order="C", copy=True)  # the kernel overwrites it
    n = x.shape[0]
    if padlen >= n:
        raise WavesError(f"padding of {padlen} frames needs more than {padlen} frames, got {n}")
    first, last = x[:1], x[-1:]
    left = x[padlen:0:-1]
    right = x[-2 : -(padlen + 2) : -1]
    if padtype == "odd":
        left, right = 2 * first - left, 2 * last - right
    elif padtype == "even":
        pass
    elif padtype == "constant":
        left = np.repeat(first, padlen, axis=0)
        right = np.repeat(last, padlen, axis=0)
    else:
        raise WavesError(f"padtype must be 'odd', 'even', 'constant' or None, got {padtype!r}")
    return np.concatenate([left, x, right], axis=0).astype(np.float32, copy=False)


def sosfiltfilt_numba(
    sos, x, *, padtype: str | None = "odd", padlen: int | None = None
) -> np.ndarray:
    """Zero-phase SOS filter along axis 0, compiled; same arguments and
    padding as scipy.signal.sosfiltfilt(sos, x, axis=0, padtype, padlen),
    float32 out.  padlen None means scipy's default, 3 * (2 * sections + 1)
    less trailing zero coefficients."""
    sos = np.ascontiguousarray(np.asarray(sos, dtype=np.float64))
    if sos.ndim != 2 or sos.shape[1] != 6 or not np.allclose(sos[:, 3], 1.0):
        raise WavesError(
            "sos must be (n_sections, 6) with a0 = 1, as scipy.signal.butter(output='sos')"
        )
    arr = _as_real_array(x, "x", (1, 2, 3))
    shape = arr.shape
    n = shape[0]
    x2 = np.asarray(arr, dtype=np.float32).reshape(n, -1)
    if padlen is None:
        ntaps = 2 * sos.shape[0] + 1 - min(int((sos[:, 2] == 0).sum()), int((sos[:, 5] == 0).sum()))
        padlen = 3 * ntaps
    padlen = int(padlen) if padtype is not None else 0
    if padlen < 0:
        raise WavesError(f"padlen must be zero or more, got {padlen}")
    if padlen >= n:
        raise WavesError(
            f"too few frames: padding of {padlen} frames needs more than {padlen} frames, got {n}"
        )
    ext = _pad_time(x2, padtype, padlen)  # a fresh C-ordered array: the kernel overwrites it
    zi = np.ascontiguousarray(_signal().sosfilt_zi(sos))
    out = np.empty((n, x2.shape[1]), dtype=np.float32)
    _sosfiltfilt_kernel(ext, sos, zi, out, padlen)
    return out.reshape(shape)


def bandpass_time(
    block,
    *,
    frame_interval_s: float,
    period_min_range=DEFAULT_PERIOD_MIN_RANGE,
    order: int = 2,
    padtype: str | None = "odd",
    method: str = "numba",
) -> np.ndarray:
    """Zero-phase Butterworth band-pass along time (axis 0), float32.

    Keeps periods between period_min_range = (shortest, longest) minutes
    (default 2-20 min, see DEFAULT_PERIOD_MIN_RANGE) with a Butterworth
    band-pass of `order` per edge run forward and backward (no phase shift).
    Each pixel's series is extended by one longest period at each end
    (`bandpass_padlen`; odd reflection by default, as scipy) so the filter
    starts up on the padding; `bandpass_settle_frames` says how many end
    frames may still carry a transient.  Refuses a band whose shortest period
    spans two frames or fewer, and a movie shorter than the longest period.

    method 'numba' (default, compiled; 0.1-0.3 s for 600 x 64 x 512 float32
    here, about 7x the 'scipy' path) or 'scipy' (scipy.signal.sosfiltfilt in
    float64); both give the same result within float32 rounding.
    Pixels are independent: any spatial tile holding all frames may be passed.
    """
    arr, shape = _as_time_block(block)
    if method not in ("numba", "scipy"):
        raise WavesError(f"method must be 'numba' or 'scipy', got {method!r}")
    n = shape[0]
    sos = butterworth_sos(
        frame_interval_s=frame_interval_s, period_min_range=period_min_range, order=order
    )
    padlen = bandpass_padlen(
        n, frame_interval_s=frame_interval_s, period_min_range=period_min_range
    )
    if padtype not in ("odd", "even", "constant", None):
        raise WavesError(f"padtype must be 'odd', 'even', 'constant' or None, got {padtype!r}")
    if method == "numba":
        return sosfiltfilt_numba(sos, arr, padtype=padtype, padlen=padlen)
    y = _signal().sosfiltfilt(
        sos, np.asarray(arr, dtype=np.float64), axis=0, padtype=padtype, padlen=padlen
    )
    return y.astype(np.float32)


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
