"""Passes 1 and 2: the cleaned-movie buffer, binning and cleaning passes."""

from __future__ import annotations

import os
import pathlib
import tempfile

import numpy as np

from waves import preprocess
from waves.analyse.options import AnalysisOptions
from waves.errors import InputError

# --------------------------------------------------------------------------- helpers


class _NoBar:
    """What a disabled progress bar does: nothing (tqdm.auto costs ~0.05 s to import)."""

    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def _progress(total: int, desc: str, enabled: bool):
    if not enabled:
        return _NoBar()
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="block", disable=False, leave=False)


class _Movie:
    """The cleaned movie: an in-memory array, or a float32 scratch file read
    and written through short-lived memory maps, so that its pages do not
    pile up in this process's resident memory."""

    def __init__(self, shape: tuple[int, int, int], *, in_memory: bool, folder: pathlib.Path | None):
        self.shape = shape
        self.path = None
        if in_memory:
            self._array = np.empty(shape, dtype=np.float32)
        else:
            self._array = None
            base = folder if folder is not None else pathlib.Path(tempfile.gettempdir())
            base.mkdir(parents=True, exist_ok=True)
            fd, name = tempfile.mkstemp(prefix=".waves-scratch-", suffix=".f32", dir=base)
            os.close(fd)
            self.path = pathlib.Path(name)
            with open(self.path, "r+b") as fh:
                fh.truncate(int(np.prod(shape)) * 4)

    def _map(self, mode: str) -> np.ndarray:
        if self._array is not None:
            return self._array
        return np.memmap(self.path, dtype=np.float32, mode=mode, shape=self.shape)

    def write(self, t0: int, block: np.ndarray) -> None:
        m = self._map("r+")
        m[t0 : t0 + len(block)] = block
        if m is not self._array:
            m.flush()
        del m

    def frames(self, t0: int, t1: int) -> np.ndarray:
        m = self._map("r")
        out = np.array(m[t0:t1], dtype=np.float32)
        del m
        return out

    def rows(self, a0: int, a1: int) -> np.ndarray:
        m = self._map("r")
        out = np.array(m[:, a0:a1, :], dtype=np.float32)
        del m
        return out

    def view(self) -> np.ndarray:
        """The whole movie as an array (in memory) or a read-only memory map."""
        return self._map("r")

    def close(self) -> None:
        self._array = None
        if self.path is not None:
            try:
                self.path.unlink()
            except FileNotFoundError:
                pass


def clean_buffer(shape: tuple[int, int, int], *, folder: pathlib.Path | None = None,
                 max_memory_bytes: float = 1e9) -> _Movie:
    """A float32 (t, y, x) buffer for a movie written frame by frame (e.g. the
    simulator's clean field): in memory up to `max_memory_bytes`, else a
    scratch file in `folder` that `close()` deletes."""
    nbytes = float(np.prod(shape)) * 4
    return _Movie(tuple(int(v) for v in shape), in_memory=nbytes <= max_memory_bytes, folder=folder)


def _bin_pass(data, *, factor: int, movie: _Movie, block: int, bar, resampler=None, weight=None, coverage=None,
              stats=None, workers: int = 1, first_half: np.ndarray | None = None) -> np.ndarray:
    """Read the recording once: bin every frame block into `movie`, refuse
    non-finite or flat movies, and return the temporal-mean image (binned).
    With a `waves.preprocess.GridResampler` the binned frames are put on its
    uniform time grid (`movie` has the grid's frames) as they are read.
    With a recorded-grid `weight` (good, in-field pixels) and its binned
    `coverage`, bins average only those pixels; `stats` (a
    preprocess.FieldStats) gathers the cell field's statistics; with
    `workers` > 1 (and no resampler) on a second thread, block after block
    in order, while the next block is read and binned.  `first_half`
    (binned shape, float64, zeros) receives the mean of the first half of
    the movie's frames (first_half_frames)."""
    nt = data.shape[0]
    half = first_half_frames(movie.shape[0])
    mean = np.zeros(movie.shape[1:], dtype=np.float64)
    lo, hi = np.inf, -np.inf
    pool, pending = None, []
    if stats is not None and resampler is None and int(workers) > 1:
        from concurrent.futures import ThreadPoolExecutor

        pool = ThreadPoolExecutor(max_workers=1)  # one thread: the blocks reach the statistics in order
    try:
        for t0 in range(0, nt, block):
            raw = np.asarray(data[t0 : t0 + block])
            if weight is not None:  # cell field: only good, in-field recorded pixels
                b = preprocess.bin_weighted(raw, factor, weight, coverage)
            else:
                b = preprocess.bin_frames(raw, factor) if factor > 1 else raw.astype(np.float32)
            if not np.isfinite(b).all():
                bad = np.flatnonzero(~np.isfinite(b).reshape(len(b), -1).all(axis=1)) + t0
                raise InputError(
                    f"frames {', '.join(map(str, bad[:5]))}{' ...' if len(bad) > 5 else ''} hold NaN or "
                    "infinite values; replace them or choose other frames with --frames"
                )
            lo = min(lo, float(b.min()))
            hi = max(hi, float(b.max()))
            w0 = t0
            if resampler is not None:
                w0, b = resampler.push(t0, b)
            mean += b.sum(axis=0, dtype=np.float64)
            if first_half is not None and w0 < half:
                first_half += b[: half - w0].sum(axis=0, dtype=np.float64)
            if len(b):
                if pool is not None:  # b is this block's own array: nothing changes it later
                    pending.append(pool.submit(stats.add, w0, b))
                elif stats is not None:
                    stats.add(w0, b)
                movie.write(w0, b)
            bar.update(1)
        for f in pending:
            f.result()
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
    if hi - lo <= 0:
        raise InputError(f"the movie is flat: every pixel of every frame is {lo:g}; there are no waves to measure")
    if first_half is not None:
        first_half /= max(half, 1)
    return (mean / movie.shape[0]).astype(np.float32)


def first_half_frames(n_frames: int) -> int:
    """How many frames the first half of a movie of `n_frames` holds."""
    return int(n_frames) // 2


def static_grain(reference: np.ndarray, first_half: np.ndarray, *, n_frames: int, level: float,
                 mask: np.ndarray | None = None) -> np.ndarray:
    """Each pixel's static grain: the flattened mean image `reference` over
    its field `level`, held to 1/TEXTURE_CLIP..TEXTURE_CLIP, and pulled to 1
    where the texture moves.  How static it is comes from the two halves of
    the movie (`first_half`, flattened like `reference`; the second half is
    what the whole mean leaves): the local correlation of their grain-scale
    detail (each minus its Gaussian smoothing over GRAIN_SCALE_PX), over a
    window of GRAIN_WINDOW_PX, clipped to 0..1.  Static cells correlate near
    1; streaming cells (their texture displaced by more than a grain between
    the halves' centres) and pure noise near 0 (common practice, no source)."""
    from scipy import ndimage

    n = int(n_frames)
    n1 = first_half_frames(n)
    first = first_half.astype(np.float64)
    second = (n * reference.astype(np.float64) - n1 * first) / max(n - n1, 1)
    inside = np.ones(reference.shape, dtype=bool) if mask is None else mask

    def detail(x):
        w = ndimage.gaussian_filter(inside.astype(np.float64), GRAIN_SCALE_PX)
        sm = ndimage.gaussian_filter(np.where(inside, x, 0.0), GRAIN_SCALE_PX)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(inside & (w > 0), x - sm / np.maximum(w, 1e-12), 0.0)

    d1, d2 = detail(first), detail(second)
    g = ndimage.gaussian_filter
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = g(d1 * d2, GRAIN_WINDOW_PX) / np.sqrt(g(d1 * d1, GRAIN_WINDOW_PX) * g(d2 * d2, GRAIN_WINDOW_PX))
    rho = np.clip(np.nan_to_num(rho, nan=0.0), 0.0, 1.0)
    grain = np.clip(reference / level, 1.0 / TEXTURE_CLIP, TEXTURE_CLIP)
    return (1.0 + rho * (grain - 1.0)).astype(np.float32)


def in_threads(fn, items, workers: int) -> list:
    """[fn(item) for item in items], on `workers` threads when more than one
    (for work in numpy and scipy.ndimage, which release the GIL; results in order)."""
    items = list(items)
    if int(workers) <= 1 or len(items) <= 1:
        return [fn(item) for item in items]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=int(workers)) as pool:
        return list(pool.map(fn, items))


# largest correction of a pixel's own grain (waves.render's texture is +-15 %), and the scales
# (analysis-grid px) of the test that the grain stands still (static_grain)
TEXTURE_CLIP = 1.5
GRAIN_SCALE_PX = 2.0
GRAIN_WINDOW_PX = 6.0


def _clean(*, sigma_px: float, options: AnalysisOptions, movie: _Movie, mean_b: np.ndarray, factor: int,
           block: int, bar, workers: int, notes: list, brightness=None,
           field_mask: np.ndarray | None = None, shifts: np.ndarray | None = None,
           first_half: np.ndarray | None = None) -> None:
    """Remove the per-frame brightness (`brightness`, a
    waves.preprocess.brightness.Brightness, or None), register (by `shifts`,
    analysis-grid px, waves.analyse.drift_auto), flatten, remove the mean and
    smooth the binned movie in place.
    With a `field_mask` (the cell field, preprocess.cellfield) the gain fit,
    the mean and the smoothing see only the field; outside is set to 0."""
    nt = movie.shape[0]
    gain = None
    if options.flatten and float(mean_b.max()) > 0:
        dish = preprocess.dish_mask(mean_b)  # a dark surround must not enter the gain fit
        if field_mask is not None and (dish & field_mask).any():
            dish = dish & field_mask
        gain = preprocess.illumination_gain(mean_b, sigma_px=max(mean_b.shape) / 8.0, mask=dish)
        gain = np.maximum(gain, 1e-3 * float(gain.max()))
    reference = mean_b / gain if gain is not None else mean_b
    if gain is not None and first_half is not None:
        # a static cell texture scales each pixel's modulation (a multiplicative grain):
        # smoothing the grain-weighted signal moves a core's zero by a fifth of a pixel and
        # biases speeds by a few tenths of a percent, so each pixel is divided by its own
        # static grain (static_grain: none where the texture moves)
        level = float(np.median(reference[dish])) if dish.any() else 0.0
        if level > 0:
            gain = (gain * static_grain(reference, first_half / gain, n_frames=nt, level=level, mask=dish))
            gain = gain.astype(np.float32)
            reference = mean_b / gain
    field = None if field_mask is None or field_mask.all() else field_mask
    norm = preprocess.smooth_space(field.astype(np.float32), sigma_px=sigma_px) if field is not None else None
    # small holes (specks, dead pixels) are bridged by the kernel; larger ones stay 0
    keep = preprocess.fill_small_holes(field, preprocess.small_hole_px(sigma_px)) if field is not None else None

    def one(t0):
        b = movie.frames(t0, t0 + block)
        if brightness is not None:  # lamp fade and flicker: (frame - offset_t) / gain_t
            b = preprocess.remove_brightness(b, brightness, first_frame=t0)
        if shifts is not None:
            b = preprocess.apply_drift(b, shifts[t0 : t0 + len(b)])
        if gain is not None:
            b /= gain
        b -= reference
        if field is not None:  # normalised convolution inside the cell field, 0 outside
            b = (preprocess.smooth_in_field(b, field, sigma_px=sigma_px, norm=norm, keep=keep) if sigma_px > 0.3
                 else np.where(field, b, 0.0).astype(np.float32))
        elif sigma_px > 0.3:
            b = preprocess.smooth_space(b, sigma_px=sigma_px)
        movie.write(t0, b)
        bar.update(1)

    starts = range(0, nt, block)
    if workers > 1 and movie.path is None:
        # frame blocks are independent; scipy.ndimage releases the GIL
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(one, starts))
    else:
        for t0 in starts:
            one(t0)
