"""The cell field: where cells and signal are, and mask-aware binning and smoothing.

A dish edge, an empty patch, dust specks and saturated or dead camera pixels
carry no wave signal.  A plain Gaussian smoothing averages the waves with
them, spreads the signal past the edge and bends the fronts there (measured
on a dish-edge field: speeds of 800-1300 um/min next to the edge, territories
35 % too large).  This module finds those places from cheap statistics of the
movie and confines binning and smoothing to the cells:

- `scan_bad_pixels`: saturated (at the file's full scale in most frames) and
  dead (constant) recorded pixels, from a few frames spread over the movie;
- `bin_weighted`: block-mean binning over good recorded pixels only;
- `FieldStats`: per analysis pixel, streaming over frame blocks, the temporal
  mean and the spread left after each frame is divided by its mean level (a
  lamp fade or a flicker cancels) and a straight line in time is removed;
- `find_cell_field`: the mask on the analysis grid (outside the dish and
  empty regions: no temporal variance; static bright specks: bright, small,
  little modulation), with what was excluded and why;
- `smooth_in_field`: normalised convolution, smooth(x m) / smooth(m), so that
  nothing outside the mask pulls signal in and the field's signal does not
  spread out;
- `measurable`: the field minus a margin along its edge where the kernel and
  the gradient/fit halo still reach outside.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.ndimage as ndi

from waves.errors import InputError
from waves.preprocess.binning import bin_frames
from waves.preprocess.spatial import smooth_space

__all__ = [
    "BadPixels",
    "CellField",
    "FieldStats",
    "bin_weighted",
    "file_cell_field",
    "find_cell_field",
    "margin_px",
    "measurable",
    "scan_bad_pixels",
    "smooth_in_field",
    "user_cell_mask",
]

SATURATED_FRACTION = 0.5  # a pixel at full scale in at least half the frames carries no signal
OUTSIDE_CONTRAST = 3.0  # cells' temporal spread over the empty region's, at least (else: no empty region)
SPECK_RADIUS_UM = 60.0  # the largest static speck the top-hat looks for (radius)


# --------------------------------------------------------------------------- bad camera pixels


@dataclass(frozen=True)
class BadPixels:
    """Saturated and dead recorded pixels (recorded grid, bool) and the full
    scale that saturation refers to (None for float data)."""

    saturated: np.ndarray
    dead: np.ndarray
    full_scale: float | None
    n_frames_scanned: int

    @property
    def any(self) -> np.ndarray:
        return self.saturated | self.dead


def _full_scale(dtype: np.dtype, top: float) -> float | None:
    """Full scale of an integer movie: the smallest 2^k - 1 (k = 8, 10, 12,
    14, 16, ...) at or above its largest value (12-bit cameras write uint16
    files that top out at 4095); None for float data."""
    if not np.issubdtype(dtype, np.integer):
        return None
    for bits in (8, 10, 12, 14, 16, 32):
        if top <= (1 << bits) - 1:
            return float((1 << bits) - 1)
    return float(np.iinfo(dtype).max)


def scan_bad_pixels(data, *, n_frames: int = 32) -> BadPixels:
    """Saturated and dead pixels of a (t, y, x) movie from `n_frames` frames
    spread evenly over it (one frame in memory at a time).

    Saturated: at the file's full scale (`_full_scale`) in at least half of
    the scanned frames.  Dead: the same value in every scanned frame (at
    least 8 frames; a pixel that truly carries light or noise changes)."""
    nt = int(data.shape[0])
    idx = np.unique(np.linspace(0, nt - 1, min(nt, int(n_frames))).round().astype(np.int64))
    lo = hi = None
    at_top = None
    top = -np.inf
    frames = []
    for i in idx:
        f = np.asarray(data[int(i)])
        frames.append(i)
        top = max(top, float(f.max()))
        if lo is None:
            lo, hi = f.copy(), f.copy()
        else:
            np.minimum(lo, f, out=lo)
            np.maximum(hi, f, out=hi)
    fs = _full_scale(np.asarray(data[0]).dtype, top)
    shape = tuple(int(v) for v in data.shape[1:])
    if fs is not None and top >= fs:
        at_top = np.zeros(shape, dtype=np.int32)
        for i in idx:
            at_top += np.asarray(data[int(i)]) >= fs
        saturated = at_top >= SATURATED_FRACTION * len(idx)
    else:
        saturated = np.zeros(shape, dtype=bool)
    dead = (lo == hi) & ~saturated if len(idx) >= 8 else np.zeros(shape, dtype=bool)
    return BadPixels(saturated=saturated, dead=dead, full_scale=fs, n_frames_scanned=len(idx))


# --------------------------------------------------------------------------- binning over good pixels


def bin_weighted(frames, factor: int, weight: np.ndarray, coverage: np.ndarray) -> np.ndarray:
    """Block means of `frames` ((t, y, x) or (y, x)) over the recorded pixels
    with weight 1 only: bin(x w) / bin(w), 0 where a block has no good pixel.
    `coverage` is bin_frames(weight, factor) (precomputed once)."""
    w = weight.astype(np.float32)
    x = np.asarray(frames, dtype=np.float32) * w
    b = bin_frames(x, factor) if factor > 1 else x
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(coverage > 0, b / np.where(coverage > 0, coverage, 1.0), 0.0)
    return out.astype(np.float32)


# --------------------------------------------------------------------------- streaming statistics


FLICKER_JUMP = 0.05  # a frame whose level jumps this much from the frames before it is a flicker frame


class FieldStats:
    """Streaming per-pixel statistics of the binned movie, block by block.

    What is left of each pixel's time course after a least-squares
    quadratic in time (a lamp fade, linear or exponential, to 0.1 %) is its
    temporal spread (`spread`): the waves' modulation inside the cells, only
    noise outside them and on light that never changes (a bright rim, a
    speck's own light).  A flicker frame, whose mean level over the good
    pixels jumps by more than FLICKER_JUMP from the median of the 4 frames
    before it, is divided by that jump first.  The frame's level is not
    divided out in general: the waves move it too (coherent fronts), and
    dividing by it would put the waves onto the constant light."""

    def __init__(self, shape_yx: tuple[int, int], good: np.ndarray | None = None) -> None:
        self.shape = tuple(int(v) for v in shape_yx)
        self.good = np.ones(self.shape, dtype=bool) if good is None else np.asarray(good, dtype=bool)
        self._s = [np.zeros(self.shape, np.float64) for _ in range(4)]  # sums of y, y t, y t^2, y^2
        self._n = 0
        self._levels: list[float] = []
        self._tsum = np.zeros(5)  # sums of t^0 .. t^4
        self.flicker_frames: list[int] = []

    def add(self, t0: int, block: np.ndarray) -> None:
        b = np.asarray(block, dtype=np.float64)
        level = b[:, self.good].mean(axis=1) if self.good.any() else b.reshape(len(b), -1).mean(axis=1)
        scale = np.ones(len(b))
        for j, lev in enumerate(level):
            before = self._levels[-4:]
            if len(before) >= 2:
                ref = float(np.median(before))
                if ref != 0 and abs(lev / ref - 1.0) > FLICKER_JUMP:
                    scale[j] = lev / ref
                    self.flicker_frames.append(t0 + j)
                    lev = ref
            self._levels.append(float(lev))
        b = b / scale[:, None, None]
        t = np.arange(t0, t0 + len(b), dtype=np.float64) / 1000.0  # scaled: sums of t^4 stay moderate
        self._s[0] += b.sum(axis=0)
        self._s[1] += np.tensordot(t, b, axes=(0, 0))
        self._s[2] += np.tensordot(t * t, b, axes=(0, 0))
        self._s[3] += np.einsum("tyx,tyx->yx", b, b)
        self._n += len(b)
        self._tsum += [float((t**k).sum()) for k in range(5)]

    def spread(self) -> np.ndarray:
        """Temporal standard deviation left after a least-squares quadratic
        in time at each pixel, float64."""
        n = max(self._n, 1)
        ts = self._tsum
        g = np.array([[ts[i + j] for j in range(3)] for i in range(3)])
        c = np.stack(self._s[:3])  # (3, y, x): sums of y t^k
        try:
            ginv = np.linalg.pinv(g)
        except np.linalg.LinAlgError:  # pragma: no cover - pinv of a 3 x 3
            ginv = np.zeros((3, 3))
        fitted = np.einsum("iyx,ij,jyx->yx", c, ginv, c)  # sum of squares explained by the quadratic
        var = (self._s[3] - fitted) / n
        return np.sqrt(np.maximum(var, 0.0))

    def mean(self) -> np.ndarray:
        return self._s[0] / max(self._n, 1)


# --------------------------------------------------------------------------- the mask


@dataclass(frozen=True)
class CellField:
    """The cell field on the analysis grid.

    mask        (y, x) bool: True where cells (and signal) are.
    outside     analysis pixels excluded as outside the dish / empty.
    specks      analysis pixels excluded as static bright specks.
    uncovered   analysis pixels with no good recorded pixel (all saturated or dead).
    source      'automatic' or 'file'.
    """

    mask: np.ndarray
    outside: np.ndarray
    specks: np.ndarray
    uncovered: np.ndarray
    source: str
    bad: BadPixels | None = None
    extra: dict = field(default_factory=dict)

    @property
    def trivial(self) -> bool:
        return bool(self.mask.all())


def _remove_small(mask: np.ndarray, min_px: int) -> np.ndarray:
    labels, n = ndi.label(mask)
    if n == 0:
        return mask
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    keep = sizes >= min_px
    keep[0] = False
    return keep[labels]


def _outside_regions(spread: np.ndarray, min_px: int) -> np.ndarray:
    """Large regions without temporal variance: the lower of Otsu's two
    classes of log(spread) (smoothed over one pixel so the grain of the cells
    does not break the field), when the classes' medians differ by more than
    OUTSIDE_CONTRAST, keeping only components of at least `min_px` pixels."""
    from skimage.filters import threshold_otsu

    pos = spread > 0
    if pos.sum() < 16:
        return ~pos
    floor = float(spread[pos].min())
    logs = ndi.gaussian_filter(np.log(np.maximum(spread, floor)), 1.0, mode="nearest")
    if float(logs.max() - logs.min()) < 1e-9:
        return np.zeros(spread.shape, dtype=bool)
    t = threshold_otsu(logs)
    low, high = logs[logs <= t], logs[logs > t]
    if low.size == 0 or high.size == 0 or np.median(high) - np.median(low) < math.log(OUTSIDE_CONTRAST):
        return np.zeros(spread.shape, dtype=bool)
    out = _remove_small(logs <= t, min_px)
    # holes of cells smaller than an outside region inside it are outside too, and vice versa
    out = ~_remove_small(~out, min_px)
    return out


def _specks(mean_b: np.ndarray, spread: np.ndarray, inside: np.ndarray, radius_px: int) -> np.ndarray:
    """Static bright specks: much brighter than their surroundings (white
    top-hat of the mean image), small (inside a disk of `radius_px`) and
    with little temporal modulation for their brightness (light added on
    top of the cells: spread / level well below the field's)."""
    if inside.sum() < 16:
        return np.zeros(mean_b.shape, dtype=bool)
    size = 2 * radius_px + 1
    opened = ndi.grey_opening(mean_b.astype(np.float64), size=(size, size), mode="nearest")
    top = mean_b - opened
    vals = top[inside]
    med = float(np.median(vals))
    mad = 1.4826 * float(np.median(np.abs(vals - med))) + 1e-12
    level = float(np.median(mean_b[inside]))
    rel = spread * np.abs(opened) / np.maximum(np.abs(mean_b), 1e-12)  # modulation left if the light were the cells'
    rel_field = float(np.median(spread[inside]))
    strong = inside & (top > med + 8.0 * mad) & (top > 0.2 * abs(level)) & (rel < 0.7 * rel_field)
    weak = inside & (top > med + 4.0 * mad)
    labels, n = ndi.label(weak, structure=np.ones((3, 3), bool))
    if n == 0 or not strong.any():
        return np.zeros(mean_b.shape, dtype=bool)
    seeded = np.zeros(n + 1, dtype=bool)
    seeded[np.unique(labels[strong])] = True
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    seeded &= sizes <= (2 * radius_px + 1) ** 2  # small: not a bright region of cells
    seeded[0] = False
    return ndi.binary_dilation(seeded[labels], structure=np.ones((3, 3), bool)) & inside


def find_cell_field(mean_b: np.ndarray, stats: FieldStats, *, coverage: np.ndarray, factor: int,
                    pixel_size_um: float, wavelength_px: float | None, bad: BadPixels | None) -> CellField:
    """The automatic cell field on the analysis grid (pixel size
    `pixel_size_um`), from the binned temporal mean, the streaming spread
    and the fraction of good recorded pixels per analysis pixel."""
    spread = stats.spread()
    uncovered = coverage <= 0
    lam = wavelength_px if wavelength_px is not None and np.isfinite(wavelength_px) else 16.0
    min_px = int(max(64, (0.5 * lam) ** 2))
    outside = _outside_regions(np.where(uncovered, 0.0, spread), min_px) & ~uncovered
    inside = ~outside & ~uncovered
    radius = max(1, int(math.ceil(SPECK_RADIUS_UM / pixel_size_um)))
    specks = _specks(mean_b, spread, inside, radius) if inside.any() else np.zeros_like(inside)
    mask = inside & ~specks
    return CellField(mask=mask, outside=outside, specks=specks, uncovered=uncovered, source="automatic", bad=bad)


def user_cell_mask(mask, shape_yx: tuple[int, int]) -> np.ndarray:
    """A user's cell mask (nonzero = cells) checked against the recorded
    frame shape; bool."""
    arr = np.asarray(mask)
    if arr.ndim != 2:
        raise InputError(f"a cell mask must be a single 2-D image, got an array of shape {arr.shape}")
    if tuple(arr.shape) != tuple(shape_yx):
        raise InputError(
            f"the cell mask is {arr.shape[0]} x {arr.shape[1]} pixels but the movie's frames are "
            f"{shape_yx[0]} x {shape_yx[1]}; give a mask of the recorded frame size (before --bin)"
        )
    if arr.dtype.kind not in "biuf":
        raise InputError(f"a cell mask must hold numbers (nonzero = cells), got {arr.dtype}")
    out = np.nan_to_num(arr.astype(np.float64), nan=0.0) != 0
    if not out.any():
        raise InputError("the cell mask is all zero: no pixel marked as cells (nonzero = cells)")
    return out


def file_cell_field(coverage_cells: np.ndarray, coverage_good: np.ndarray, bad: BadPixels | None) -> CellField:
    """The cell field from a user's mask: analysis pixels of which at least
    half the recorded pixels are cells, and some are good."""
    mask = (coverage_cells >= 0.5) & (coverage_good > 0)
    outside = coverage_cells < 0.5
    uncovered = ~outside & (coverage_good <= 0)
    return CellField(mask=mask, outside=outside, specks=np.zeros_like(mask), uncovered=uncovered, source="file",
                     bad=bad)


# --------------------------------------------------------------------------- smoothing and margin


def smooth_in_field(frames: np.ndarray, mask: np.ndarray, *, sigma_px: float, norm: np.ndarray | None = None):
    """Normalised convolution: smooth_space(x m) / smooth_space(m) inside the
    mask, 0 outside.  `norm` is smooth_space(m) (precomputed once)."""
    m = mask.astype(np.float32)
    if norm is None:
        norm = smooth_space(m, sigma_px=sigma_px)
    s = smooth_space(np.asarray(frames, dtype=np.float32) * m, sigma_px=sigma_px)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(mask, s / np.where(norm > 0, norm, 1.0), 0.0)
    return out.astype(np.float32)


def margin_px(sigma_px: float, halo_px: int) -> float:
    """How far from the mask edge measurements start: the smoothing kernel's
    reach (1.5 sigma, where a one-sided kernel still bends the fronts) plus
    the halo of the gradient and the activation fit."""
    return 1.5 * max(float(sigma_px), 0.0) + float(halo_px)


def measurable(mask: np.ndarray, *, margin: float) -> np.ndarray:
    """Pixels of `mask` farther than `margin` pixels from any pixel outside
    it (the frame's own border does not count: the smoothing is cut
    symmetrically there)."""
    if mask.all():
        return mask.copy()
    dist = ndi.distance_transform_edt(mask)
    return mask & (dist > margin)
