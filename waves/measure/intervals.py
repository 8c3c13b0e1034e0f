"""95 % intervals of a field's median by resampling independent units.

Neighbouring pixels of a measured map are not independent (the smoothing, the
activation fit's radius, a wave crossing them all at once): a bootstrap over
pixels gives intervals far too narrow.  The units here are cells of a two-way
table, time windows x spatial blocks larger than the correlation length; the
bootstrap draws windows and blocks with replacement, independently (a two-way
"pigeonhole" bootstrap, McCullagh 2000, Bernoulli 6:285-301, from memory), and
the statistic is the median of the drawn cells' medians.  The interval is the
percentile interval of that statistic (Efron & Tibshirani 1993, ch. 13).
"""

from __future__ import annotations

import warnings

import numpy as np

from waves.measure.medians import nanmedian_last

N_BOOT = 2000
LEVEL = 0.95
MIN_CELL_PIXELS = 4  # a cell with fewer measured pixels has no median


def block_labels(shape: tuple[int, int], block_px: float) -> tuple[np.ndarray, int]:
    """(y, x) int labels of square blocks of side `block_px` (at least 1 px), and their count."""
    ny, nx = shape
    b = max(1, int(round(block_px)))
    nby, nbx = -(-ny // b), -(-nx // b)
    lab = (np.arange(ny)[:, None] // b) * nbx + (np.arange(nx)[None, :] // b)
    return lab.astype(np.int64), int(nby * nbx)


def cell_medians(maps: np.ndarray, labels: np.ndarray, n_blocks: int) -> np.ndarray:
    """(windows, blocks) medians of `maps` ((windows, y, x), NaN = not measured)
    over each block; NaN where a cell holds fewer than MIN_CELL_PIXELS values."""
    maps = np.asarray(maps, dtype=np.float64)
    out = np.full((maps.shape[0], n_blocks), np.nan)
    flat_lab = labels.ravel()
    order = np.argsort(flat_lab, kind="stable")
    bounds = np.searchsorted(flat_lab[order], np.arange(n_blocks + 1))
    for i, m in enumerate(maps):
        v = m.ravel()[order]
        for g in range(n_blocks):
            seg = v[bounds[g] : bounds[g + 1]]
            seg = seg[np.isfinite(seg)]
            if seg.size >= MIN_CELL_PIXELS:
                out[i, g] = np.median(seg)
    return out


def two_way_interval(cells: np.ndarray, *, n_boot: int = N_BOOT, level: float = LEVEL,
                     seed: int = 0) -> tuple[float, float] | None:
    """Percentile interval of the median of cell medians, windows (rows) and
    blocks (columns) drawn with replacement; None with fewer than two
    informative windows and blocks together than 3 (no spread to resample)."""
    cells = np.asarray(cells, dtype=np.float64)
    rows = np.flatnonzero(np.isfinite(cells).any(axis=1))
    cols = np.flatnonzero(np.isfinite(cells).any(axis=0))
    cells = cells[np.ix_(rows, cols)]
    nw, nb = cells.shape
    if nw * nb < 3 or np.isfinite(cells).sum() < 3:
        return None
    rng = np.random.default_rng(seed)
    stats = np.empty(n_boot)
    chunk = max(1, int(2e6 // (nw * nb)))  # draws at a time: a few MB of gathered cells
    for k0 in range(0, n_boot, chunk):
        k1 = min(n_boot, k0 + chunk)
        wi = rng.integers(0, nw, (k1 - k0, nw))
        bi = rng.integers(0, nb, (k1 - k0, nb))
        v = cells[wi[:, :, None], bi[:, None, :]].reshape(k1 - k0, -1)
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # a draw of empty cells only: NaN
            stats[k0:k1] = nanmedian_last(v)
    stats = stats[np.isfinite(stats)]
    if stats.size < n_boot // 2:
        return None
    a = 0.5 * (1.0 - level)
    lo, hi = np.quantile(stats, [a, 1.0 - a])
    return float(lo), float(hi)
