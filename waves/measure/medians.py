"""Medians along the last axis that skip NaN, without numpy's masked-array path.

`np.nanmedian(a, axis=-1)` on many short rows goes through numpy.ma (a copy,
a mask and a Python-level take per call) and costs several times a plain
sort.  Here the rows are sorted once (NaN sorts last), the finite values of a
row are its first n, and the median is the mean of its middle one or two:
the same numbers as np.nanmedian, NaN where a row has no finite value.
"""

from __future__ import annotations

import numpy as np


def nanmedian_last(a: np.ndarray) -> np.ndarray:
    """Median over the last axis ignoring NaN (float64; NaN for an all-NaN row)."""
    s = np.sort(np.asarray(a, dtype=np.float64), axis=-1)
    if s.shape[-1] == 0:
        return np.full(s.shape[:-1], np.nan)
    n = np.count_nonzero(~np.isnan(s), axis=-1)
    lo = np.take_along_axis(s, np.maximum((n - 1) // 2, 0)[..., None], axis=-1)[..., 0]
    hi = np.take_along_axis(s, np.minimum(n // 2, s.shape[-1] - 1)[..., None], axis=-1)[..., 0]
    return np.where(n == 0, np.nan, 0.5 * (lo + hi))


def window_medians(times: np.ndarray, values: np.ndarray, windows) -> np.ndarray:
    """(n_windows, y, x) float64: for each window [w0, w1), the NaN-skipping
    median of `values` (y, x, m) over the waves whose `times` (y, x, m,
    sorted, NaN-padded at the end) fall inside it; the same numbers as
    nanmedian_last(np.where((times >= w0) & (times < w1), values, nan)),
    but only the few waves of each window are gathered."""
    t = np.asarray(times)
    v = np.asarray(values)
    m = t.shape[-1]
    out = np.full((len(windows),) + t.shape[:-1], np.nan)
    with np.errstate(invalid="ignore"):
        for i, (w0, w1) in enumerate(windows):
            start = np.count_nonzero(t < w0, axis=-1)
            stop = np.count_nonzero(t < w1, axis=-1)
            k = int((stop - start).max()) if stop.size else 0
            if k == 0 or m == 0:
                continue
            idx = start[..., None] + np.arange(k)
            picked = np.take_along_axis(v, np.minimum(idx, m - 1), axis=-1).astype(np.float64)
            picked[idx >= stop[..., None]] = np.nan
            out[i] = nanmedian_last(picked)
    return out
