"""Spatial block-mean binning (numpy twin and compiled kernel)."""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from waves.errors import WavesError
from waves.preprocess._checks import (
    _as_real_array,
    _float32,
    _positive,
)

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


def bin_frames_in_order(frames, factor: int) -> np.ndarray:
    """`bin_frames` in numpy with the kernel's arithmetic in the kernel's order
    (the same float32 values), for threads other than the one that runs the
    compiled parallel kernels (not every numba threading layer takes
    launches from two threads at once).  (t, y, x) or (y, x), factor > 1."""
    arr = np.asarray(frames)
    f = int(factor)
    src = arr[None] if arr.ndim == 2 else arr
    n, ny, nx = src.shape
    by, bx = ny // f, nx // f
    blocks = src[:, : by * f, : bx * f].reshape(n, by, f, bx, f)
    row = np.zeros((n, by, bx))
    for di in range(f):
        acc = np.zeros((n, by, bx))
        for dj in range(f):
            acc += blocks[:, :, di, :, dj]
        row += acc
    out = (row * (1.0 / (f * f))).astype(np.float32)
    return out[0] if arr.ndim == 2 else out


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
