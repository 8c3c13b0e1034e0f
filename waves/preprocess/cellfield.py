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
    "fill_small_holes",
    "find_specks",
    "margin_px",
    "measurable",
    "scan_bad_pixels",
    "small_hole_px",
    "smooth_in_field",
    "user_cell_mask",
]

SATURATED_FRACTION = 0.5  # a pixel at full scale in at least half the frames carries no signal
OUTSIDE_CONTRAST = 3.0  # cells' temporal spread over the empty region's, at least (else: no empty region)
SPECK_RADIUS_UM = 60.0  # the largest static speck looked for (radius)
SPECK_GROW_RATIO = 1.3  # a speck's rim, grown from its core, is still this much brighter than around
SPECK_LEVEL_RATIO = 1.3  # a speck core is at least this many times brighter than the cells around it
SPECK_GRAIN_SDS = 5.0  # ... and this many relative sds of the cell texture's level above it


# --------------------------------------------------------------------------- bad camera pixels


@dataclass(frozen=True)
class BadPixels:
    """Recorded pixels that carry no wave signal (recorded grid, bool):
    saturated, dead (constant) and static bright specks; and the full scale
    that saturation refers to (None for float data)."""

    saturated: np.ndarray
    dead: np.ndarray
    specks: np.ndarray
    full_scale: float | None
    n_frames_scanned: int

    @property
    def any(self) -> np.ndarray:
        return self.saturated | self.dead | self.specks


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


def find_specks(mean: np.ndarray, std: np.ndarray, *, radius_px: float, exclude: np.ndarray | None = None):
    """Static bright specks on a frame: light added on top of the cells that
    does not take part in the waves.

    Where cells scatter, the waves modulate the scattered light, so the
    temporal spread is proportional to the level (spread = k level, k
    varying slowly over the field); a speck adds light without spread.  The
    added light is estimated as level - spread / k_local (k_local the ratio
    of Gaussian-smoothed spread and level, sigma 2 `radius_px`, over pixels
    whose spread / level is at least half the median); pixels where
    it exceeds 40 % of the local level, which are 30 % brighter than it (a
    spiral's core has little spread too, but no extra light), and whose spread is at least 0.3
    times that of the cells around (the cells under a speck still wave, an
    empty surround does not), make a speck's core; cores larger
    than a disk of `radius_px` or longer than its diameter are not specks (a
    rim, a bright region of cells); nor are pixels within 3 pixels of the empty
    surround cores (the rim lies there).  A core grows by up to 2 pixels over pixels above 15 %, then by
    one pixel more."""
    m = np.asarray(mean, dtype=np.float64)
    sd = np.asarray(std, dtype=np.float64)
    ok = np.ones(m.shape, bool) if exclude is None else ~exclude
    if ok.sum() < 16:
        return np.zeros(m.shape, dtype=bool)
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.where(m > 0, sd / m, 0.0)
    # k from pixels that take part in the waves (not the empty surround, not the specks)
    w = (ok & (rel > 0.5 * float(np.median(rel[ok])))).astype(np.float64)
    sig = max(2.0 * float(radius_px), 2.0)
    g = lambda a: ndi.gaussian_filter(a, sig, mode="nearest")  # noqa: E731
    local_level = g(m * ok) / np.maximum(g(ok.astype(np.float64)), 1e-12)
    k = g(sd * w) / np.maximum(g(m * w), 1e-300)
    if not w.any() or not np.isfinite(k).all() or float(np.median(k[ok])) <= 0:
        return np.zeros(m.shape, dtype=bool)
    added = m - sd / np.maximum(k, 1e-300)
    level = np.maximum(local_level, 1e-300)
    # under a speck the cells still wave (their spread stays); the empty surround has noise only
    waving = sd > 0.3 * g(sd * w) / np.maximum(g(w), 1e-12)
    # not within 3 pixels of the empty surround: a rim lies along the dish edge
    near_quiet = ndi.binary_dilation(ok & ~waving, structure=np.ones((3, 3), bool), iterations=3)
    # and at least twice the level of the texture around (median): shot noise makes the spread of
    # bright texture grains grow more slowly than their level, which the spread model alone takes
    # for added light (measured: a third of a textured 8-bit field flagged, none above 2.2x)
    median_level = _local_median(m, size=int(2 * math.ceil(2.0 * float(radius_px)) + 1))
    # how grainy the cells are (robust relative sd of the level about its local median): a speck
    # must stand above the texture's own bright grains, which reach 1 + ~5 sd (measured: none
    # above 2.2x at a relative sd of 0.3, thousands of pixels above 2x at 0.4)
    with np.errstate(invalid="ignore", divide="ignore"):
        rel_level = np.where(median_level > 0, m / median_level - 1.0, 0.0)[ok]
    grain = 1.4826 * float(np.median(np.abs(rel_level - np.median(rel_level)))) if rel_level.size else 0.0
    ratio = max(SPECK_LEVEL_RATIO, 1.0 + SPECK_GRAIN_SDS * grain)
    strong = ok & (added > 0.4 * level) & waving & ~near_quiet & (m > ratio * median_level)
    # the rim of a speck is brighter than the texture too; a spiral's core (little spread, not bright) is not
    weak = ok & (added > 0.15 * level) & waving & (m > SPECK_GROW_RATIO * median_level)
    labels, n = ndi.label(strong, structure=np.ones((3, 3), bool))
    if n == 0:
        return np.zeros(m.shape, dtype=bool)
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    keep = sizes <= math.pi * float(radius_px) ** 2
    span = 2.0 * float(radius_px) + 1.0  # compact: a rim along the dish edge is long and thin
    for i, sl in enumerate(ndi.find_objects(labels), start=1):
        if sl is not None and max(sl[0].stop - sl[0].start, sl[1].stop - sl[1].start) > span:
            keep[i] = False
    keep[0] = False
    seeds = keep[labels]
    grown = seeds | (weak & ndi.binary_dilation(seeds, structure=np.ones((3, 3), bool), iterations=2))
    return ndi.binary_dilation(grown, structure=np.ones((3, 3), bool)) & ok


def _local_median(image: np.ndarray, *, size: int) -> np.ndarray:
    """Median over a size x size square about each pixel (within the image at
    its borders), on the image quantised to 8 bits of 1.5 x its 99.9th
    percentile: skimage.filters.rank.median keeps a running histogram, ~25x
    faster than scipy.ndimage.median_filter's sort for a 25-px square, and the
    quantisation step (~1/170 of the bright texture's level, ~0.5 % of a
    typical level) is far below the 30 % a speck must stand out by."""
    from skimage.filters.rank import median as rank_median

    finite = np.isfinite(image)
    top = 1.5 * float(np.percentile(image[finite], 99.9)) if finite.any() else 0.0
    if not top > 0:
        return np.zeros(image.shape, dtype=np.float64)
    q = np.clip(np.where(finite, image, 0.0) / top * 255.0, 0.0, 255.0).round().astype(np.uint8)
    return rank_median(q, np.ones((size, size), dtype=bool)).astype(np.float64) * (top / 255.0)


def scan_bad_pixels(data, *, n_frames: int = 32, speck_radius_px: float = 6.0) -> BadPixels:
    """Saturated, dead and speck pixels of a (t, y, x) movie from `n_frames`
    frames spread evenly over it (one frame in memory at a time).

    Saturated: at the file's full scale (`_full_scale`) in at least half of
    the scanned frames.  Dead: the same value in every scanned frame (at
    least 8 frames; a pixel that truly carries light or noise changes).
    Specks: `find_specks` on the scanned frames' mean and spread (the
    scanned frames fall at all phases of the waves)."""
    nt = int(data.shape[0])
    idx = np.unique(np.linspace(0, nt - 1, min(nt, int(n_frames))).round().astype(np.int64))
    shape = tuple(int(v) for v in data.shape[1:])
    lo = hi = None
    s1 = np.zeros(shape, np.float64)
    s2 = np.zeros(shape, np.float64)
    top = -np.inf
    for i in idx:
        f = np.asarray(data[int(i)])
        top = max(top, float(f.max()))
        if lo is None:
            lo, hi = f.copy(), f.copy()
        else:
            np.minimum(lo, f, out=lo)
            np.maximum(hi, f, out=hi)
        ff = f.astype(np.float64)
        s1 += ff
        s2 += ff * ff
    fs = _full_scale(np.asarray(data[0]).dtype, top)
    if fs is not None and top >= fs:
        at_top = np.zeros(shape, dtype=np.int32)
        for i in idx:
            at_top += np.asarray(data[int(i)]) >= fs
        saturated = at_top >= SATURATED_FRACTION * len(idx)
    else:
        saturated = np.zeros(shape, dtype=bool)
    enough = len(idx) >= 8
    dead = (lo == hi) & ~saturated if enough else np.zeros(shape, dtype=bool)
    n = float(len(idx))
    mean = s1 / n
    std = np.sqrt(np.maximum(s2 / n - mean * mean, 0.0))
    specks = (find_specks(mean, std, radius_px=speck_radius_px, exclude=saturated | dead) if enough
              else np.zeros(shape, dtype=bool))
    return BadPixels(saturated=saturated, dead=dead, specks=specks, full_scale=fs, n_frames_scanned=len(idx))


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


class FieldStats:
    """Streaming per-pixel statistics of the binned movie, block by block.

    What is left of each pixel's time course after a least-squares
    quadratic in time (a lamp fade, linear or exponential, to 0.1 %) is its
    temporal spread (`spread`): the waves' modulation inside the cells, only
    noise outside them and on light that never changes (a bright rim, a
    speck's own light).  The frame's mean level is not divided out, nor
    are jumps of it taken for flicker: the waves move it too (coherent
    fronts of bands of 25 % contrast move it by more than 5 %), and dividing
    by it would put the waves onto the constant light.  A few flicker frames
    of +-10 % add a spread of about 1.4 % of the level everywhere, which
    leaves an empty surround far below the cells' spread."""

    def __init__(self, shape_yx: tuple[int, int], good: np.ndarray | None = None,
                 real: np.ndarray | None = None) -> None:
        """`real` ((n frames,) bool or None): frames as recorded; the
        frame-to-frame noise (`slow_spread`) comes only from pairs of them
        (an interpolated frame has less noise: with 10 % of the frames
        interpolated the noise left in a dark surround's slow spread made a
        dim dish edge look like cells)."""
        self.shape = tuple(int(v) for v in shape_yx)
        self.real = None if real is None else np.asarray(real, dtype=bool)
        self.good = np.ones(self.shape, dtype=bool) if good is None else np.asarray(good, dtype=bool)
        self._s = [np.zeros(self.shape, np.float64) for _ in range(4)]  # sums of y, y t, y t^2, y^2
        self._n = 0
        self._tsum = np.zeros(5)  # sums of t^0 .. t^4
        self._d2 = np.zeros(self.shape, np.float64)  # sum of squared frame-to-frame differences
        self._nd = 0
        self._last: np.ndarray | None = None

    def add(self, t0: int, block: np.ndarray) -> None:
        b = np.asarray(block, dtype=np.float64)
        if len(b):
            prev = b[:-1] if self._last is None else np.concatenate([self._last[None], b[:-1]])
            first = t0 + len(b) - len(prev)  # frame index of the first difference's later frame
            d = b[len(b) - len(prev):] - prev
            if self.real is not None:
                idx = np.arange(first, t0 + len(b))
                both = self.real[idx] & self.real[idx - 1]
                d = d[both]
            self._d2 += np.einsum("tyx,tyx->yx", d, d)
            self._nd += len(d)
            self._last = b[-1].copy()
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

    def slow_spread(self) -> np.ndarray:
        """The part of `spread` that is slow against the frame interval:
        sqrt(spread^2 - mean(d^2) / 2), d the frame-to-frame difference.
        White camera noise of variance s^2 gives mean(d^2) = 2 s^2, waves
        many frames long almost nothing, so this is the waves' own spread
        (measured: with shot and read noise the cells' spread was only 1.6x
        the empty surround's; their slow spread is many times it)."""
        if self._nd == 0:
            return self.spread()
        var = self.spread() ** 2 - 0.5 * self._d2 / self._nd
        return np.sqrt(np.maximum(var, 0.0))


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
    classes of log(spread), when the classes' medians differ by more than
    OUTSIDE_CONTRAST, keeping only components of at least `min_px` pixels.
    The threshold is raised to a third of the cells' median spread when
    Otsu's lies lower: with a contrast of 100 or more Otsu's midpoint (in
    log) would count pixels a tenth on cells as cells."""
    from skimage.filters import threshold_otsu

    pos = spread > 0
    if pos.sum() < 16:
        return ~pos
    floor = float(spread[pos].min())
    logs = np.log(np.maximum(spread, floor))
    if float(logs.max() - logs.min()) < 1e-9:
        return np.zeros(spread.shape, dtype=bool)
    t = threshold_otsu(logs)
    low, high = logs[logs <= t], logs[logs > t]
    if low.size == 0 or high.size == 0 or np.median(high) - np.median(low) < math.log(OUTSIDE_CONTRAST):
        return np.zeros(spread.shape, dtype=bool)
    # a pixel half on cells waves half as much: the edge is where the spread falls to ~1/3 of the cells'
    t = max(t, float(np.median(high)) - math.log(3.0))
    low = logs <= t
    out = _remove_small(low, min_px)
    # the corners a round dish leaves are small but sit on the frame's border: they count too
    lab, n = ndi.label(low & ~out)
    if n:
        sizes = np.bincount(lab.ravel(), minlength=n + 1)
        edge = np.zeros(n + 1, dtype=bool)
        edge[np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))] = True
        keep = edge & (sizes >= max(16, min_px // 8))
        keep[0] = False
        out |= keep[lab]
    # islands and holes smaller than an outside region: the grain of the cells, a weak spot
    out = ~_remove_small(~out, min_px)
    return out


def find_cell_field(mean_b: np.ndarray, stats: FieldStats, *, coverage: np.ndarray, factor: int,
                    pixel_size_um: float, wavelength_px: float | None, bad: BadPixels | None) -> CellField:
    """The automatic cell field on the analysis grid (pixel size
    `pixel_size_um`), from the binned temporal mean, the streaming spread
    and the fraction of good recorded pixels per analysis pixel."""
    # relative to the level: an illumination ramp scales the cells' spread with their light
    # (a 0.3x corner fell below the outside threshold); empty regions have no slow spread at all
    level = np.abs(stats.mean())
    spread = np.where(level > 0, stats.slow_spread() / np.maximum(level, 1e-12), 0.0)
    uncovered = coverage <= 0
    lam = wavelength_px if wavelength_px is not None and np.isfinite(wavelength_px) else 16.0
    min_px = int(max(64, (0.5 * lam) ** 2))
    outside = _outside_regions(np.where(uncovered, 0.0, spread), min_px) & ~uncovered
    mask = ~outside & ~uncovered
    specks = np.zeros(mask.shape, dtype=bool)
    if bad is not None and bad.specks.any():  # analysis pixels mostly covered by specks
        sp = bad.specks.astype(np.float32)
        specks = (bin_frames(sp, factor) if factor > 1 else sp) >= 0.5
    return CellField(mask=mask, outside=outside, specks=specks & ~outside, uncovered=uncovered, source="automatic",
                     bad=bad)


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


def fill_small_holes(mask: np.ndarray, max_px: int) -> np.ndarray:
    """`mask` with its holes of fewer than `max_px` pixels filled (specks, a
    few dead pixels: the normalised convolution bridges them)."""
    if mask.all() or max_px <= 1:
        return mask.copy()
    holes = ~mask
    return mask | (holes & ~_remove_small(holes, int(max_px)))


def small_hole_px(sigma_px: float) -> int:
    """Holes up to about a kernel's core, (2 sigma)^2 pixels (at least 9),
    are bridged; larger ones are places without cells."""
    return int(max(9, (2.0 * float(sigma_px)) ** 2))


def smooth_in_field(frames: np.ndarray, mask: np.ndarray, *, sigma_px: float, norm: np.ndarray | None = None,
                    keep: np.ndarray | None = None):
    """Normalised convolution: smooth_space(x m) / smooth_space(m), kept on
    `keep` (default: the mask; e.g. the mask with its small holes filled,
    which the kernel bridges), 0 elsewhere.  `norm` is smooth_space(m)
    (precomputed once)."""
    m = mask.astype(np.float32)
    if norm is None:
        norm = smooth_space(m, sigma_px=sigma_px)
    s = smooth_space(np.asarray(frames, dtype=np.float32) * m, sigma_px=sigma_px)
    with np.errstate(invalid="ignore", divide="ignore"):
        keep = mask if keep is None else keep & (norm > 1e-3)
        out = np.where(keep, s / np.where(norm > 0, norm, 1.0), 0.0)
    return out.astype(np.float32)


def margin_px(sigma_px: float, halo_px: int) -> float:
    """How far from the mask edge measurements start: the smoothing kernel's
    reach (1.5 sigma, where a one-sided kernel still bends the fronts) plus
    the halo of the gradient and the activation fit."""
    return 1.5 * max(float(sigma_px), 0.0) + float(halo_px)


def measurable(mask: np.ndarray, *, margin: float, hole_margin: float = 0.0, small_hole_px: int = 0) -> np.ndarray:
    """Pixels of `mask` farther than `margin` pixels from any pixel outside
    it (the frame's own border does not count: the smoothing is cut
    symmetrically there).  Holes of fewer than `small_hole_px` pixels (a
    speck, a few dead pixels) take only `hole_margin`: the normalised
    convolution loses a small part of its kernel there, not half of it."""
    if mask.all():
        return mask.copy()
    holes = ~mask
    small = holes & ~_remove_small(holes, max(int(small_hole_px), 1)) if small_hole_px > 0 else np.zeros_like(mask)
    big = holes & ~small
    out = mask.copy()
    if big.any():
        out &= ndi.distance_transform_edt(~big) > margin
    if small.any():
        out &= ndi.distance_transform_edt(~small) > hole_margin
    return out
