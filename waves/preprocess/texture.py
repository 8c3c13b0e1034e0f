"""Streaming cells: the texture-motion estimate and the motion-compensated background.

In a dark-field movie the waves are a small (3-5 %) modulation of the cells'
scattering, ``B(x, t) = T_t(x) * (1 + m e(x, t))``.  When the cells stream, the
granular texture ``T_t`` moves, and at every pixel the passing grains make
temporal fluctuations in the wave band that are many times larger than the
waves (after the spatial smoothing still ~3x).  The waves do not move with the
cells.  Two steps separate them:

1. `estimate_cell_motion`: the texture's velocity field on a coarse grid of
   tiles, from plain cross-correlation (FFT, Hann-windowed reference tile
   against a larger unwindowed search region: no pull toward zero shift) of
   spatially high-passed frames `lag` frames apart, at a few frame pairs spread
   over the movie; a sub-pixel Gaussian (log-parabola) peak fit per axis and the
   median over the pairs.  The high-pass (frame minus its Gaussian blur at a
   fraction of the wavelength) leaves the texture and takes most of the wave
   out, so the waves hardly pull the estimate.
2. `remove_moving_background`: at every frame t the background (the texture,
   slow mounds, static structure) is the Gaussian-weighted temporal mean of the
   frames s around t, each warped along the cell motion to where its cells are
   at t, ``sum_s w(s - t) B(x + v(x) (s - t), s)``; the wave, which does not move
   with the cells, averages out of it when the temporal weight is wider than the
   longest period of the band.  Frame minus background is the wave signal.  The
   weights are symmetric in s - t, so a small error of v cancels at first order.

Both work on the cleaned (binned, mean-removed, smoothed) movie, through
`read(t0, t1)` and `write(t0, block)` callables, a bounded number of frames in
memory at a time.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.ndimage as ndi

from waves.errors import WavesError

__all__ = ["CellMotion", "estimate_cell_motion", "remove_moving_background", "tile_shifts"]


@dataclass(frozen=True)
class CellMotion:
    """Texture motion on a coarse grid.

    velocity_px_per_frame  (2, gy, gx) [drow, dcol] per frame at the tile centres
                           (tiles without texture filled from their neighbours).
    valid                  (gy, gx) bool: tiles whose texture correlated and moved steadily
                           (the same velocity at a short and a long lag).
    centres_row, centres_col  tile centres (pixels of the analysed grid).
    speed_px_per_frame     median speed over the valid tiles (NaN if none).
    valid_fraction         fraction of tiles that are valid.
    lag_frames             frames between the correlated frames.
    """

    velocity_px_per_frame: np.ndarray
    valid: np.ndarray
    centres_row: np.ndarray
    centres_col: np.ndarray
    speed_px_per_frame: float
    valid_fraction: float
    lag_frames: int

    def field(self, shape_yx: tuple[int, int]) -> np.ndarray:
        """(2, y, x) velocity (px per frame) at every pixel, bilinear between tile
        centres, constant beyond the outer ones."""
        ny, nx = shape_yx
        gy, gx = self.valid.shape
        rr = np.interp(np.arange(ny), self.centres_row, np.arange(gy))
        cc = np.interp(np.arange(nx), self.centres_col, np.arange(gx))
        coords = np.stack(np.meshgrid(rr, cc, indexing="ij"))
        return np.stack([ndi.map_coordinates(self.velocity_px_per_frame[k], coords, order=1, mode="nearest")
                         for k in range(2)]).astype(np.float32)


# --------------------------------------------------------------------------- tile correlation


def _peak_offset(c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sub-pixel peak of each (n, h, w) correlation surface: the integer maximum and
    a Gaussian (log-parabola) fit through it and its neighbours on each axis, a
    parabola where a neighbour is not positive (common practice, no source)."""
    n, h, w = c.shape
    flat = c.reshape(n, -1).argmax(axis=1)
    i, j = np.divmod(flat, w)
    i = np.clip(i, 1, h - 2)
    j = np.clip(j, 1, w - 2)
    k = np.arange(n)

    def vertex(m, z, p):
        with np.errstate(invalid="ignore", divide="ignore"):
            pos = (m > 0) & (z > 0) & (p > 0)
            lm, lz, lp = (np.log(np.where(pos, v, 1.0)) for v in (m, z, p))
            g = 0.5 * (lm - lp) / (lm - 2 * lz + lp)
            q = 0.5 * (m - p) / (m - 2 * z + p)
            out = np.where(pos, g, q)
        return np.clip(np.nan_to_num(out), -1.0, 1.0)

    di = vertex(c[k, i - 1, j], c[k, i, j], c[k, i + 1, j])
    dj = vertex(c[k, i, j - 1], c[k, i, j], c[k, i, j + 1])
    return i + di, j + dj


def tile_shifts(a: np.ndarray, b: np.ndarray, *, tile_px: int, search_px: int,
                step_px: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Displacement (drow, dcol) of the content of frame `a` into frame `b`, per tile.

    Tiles of `tile_px` (Hann-windowed, mean removed) of `a` are cross-correlated
    (FFT, no normalisation) with regions of `b` larger by `search_px` on every side;
    tiles start every `step_px` (default tile_px // 2) at least `search_px` from the
    edges.  Returns (shifts (gy, gx, 2), peak correlation coefficient (gy, gx),
    tile-centre rows, tile-centre cols)."""
    a = np.asarray(a, dtype=np.float32)
    b = np.asarray(b, dtype=np.float32)
    if a.shape != b.shape or a.ndim != 2:
        raise WavesError(f"tile_shifts needs two frames of the same (y, x) shape, got {a.shape} and {b.shape}")
    ny, nx = a.shape
    s, m = int(tile_px), int(search_px)
    step = int(step_px) if step_px else max(1, s // 2)
    r0 = np.arange(m, ny - s - m + 1, step)
    c0 = np.arange(m, nx - s - m + 1, step)
    if r0.size == 0 or c0.size == 0:
        raise WavesError(f"frames of {ny} x {nx} px are too small for tiles of {s} px with {m} px of search")
    big = s + 2 * m
    win = np.outer(np.hanning(s + 2), np.hanning(s + 2))[1:-1, 1:-1].astype(np.float32)
    ta = np.lib.stride_tricks.sliding_window_view(a, (s, s))[r0][:, c0]  # (gy, gx, s, s)
    tb = np.lib.stride_tricks.sliding_window_view(b, (big, big))[r0 - m][:, c0 - m]
    # weighted normalised cross-correlation (the tile's Hann weights w): at each lag d
    # sum w a' b(x + d) / sqrt(sum w a'^2 * (sum w b^2 - (sum w b)^2 / sum w)), a' = a minus
    # its weighted mean; every sum over x an FFT correlation
    ta = ta.astype(np.float64)
    tb = tb.astype(np.float64)
    sw = float(win.sum())
    ta = ta - (ta * win).sum(axis=(2, 3), keepdims=True) / sw
    tb = tb - tb.mean(axis=(2, 3), keepdims=True)
    fa = np.fft.rfft2(ta * win, s=(big, big))
    fw = np.fft.rfft2(win, s=(big, big))
    fb = np.fft.rfft2(tb, s=(big, big))
    fb2 = np.fft.rfft2(tb * tb, s=(big, big))
    gy, gx = r0.size, c0.size

    def corr(f, g):  # lag index m + d: the tile sits m px inside its region; no lag wraps around
        return np.fft.irfft2(np.conj(f) * g, s=(big, big))[..., : 2 * m + 1, : 2 * m + 1]

    num = corr(fa, fb)
    e1 = corr(fw, fb)
    var_b = corr(fw, fb2) - e1 * e1 / sw
    var_a = (ta * ta * win).sum(axis=(2, 3))[..., None, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        ncc = np.where(var_b > 1e-12 * var_a, num / np.sqrt(var_a * np.maximum(var_b, 1e-300)), 0.0)
    ncc = np.nan_to_num(ncc).reshape(gy * gx, 2 * m + 1, 2 * m + 1)
    pi, pj = _peak_offset(ncc)
    shifts = np.stack([pi - m, pj - m], axis=-1).reshape(gy, gx, 2)
    k = np.arange(gy * gx)
    coef = ncc[k, np.rint(pi).astype(int), np.rint(pj).astype(int)].reshape(gy, gx)
    return shifts, coef.astype(np.float32), r0 + 0.5 * (s - 1), c0 + 0.5 * (s - 1)


# --------------------------------------------------------------------------- the motion estimate


def _highpass(frame: np.ndarray, sigma_px: float) -> np.ndarray:
    f = np.asarray(frame, dtype=np.float32)
    return f - ndi.gaussian_filter(f, sigma_px, mode="nearest")


def _pair_velocity(read, nt: int, lag: int, *, n_pairs: int, tile_px: int, step_px: int, search_px: int,
                   highpass_px: float, min_coef: float):
    """Median over `n_pairs` frame pairs (t, t + lag) of the tile shifts / lag."""
    starts = np.unique(np.linspace(0, nt - 1 - lag, n_pairs).astype(int))
    vel, ok = [], []
    centres = None
    for t in starts:
        a = _highpass(read(t, t + 1)[0], highpass_px)
        b = _highpass(read(t + lag, t + lag + 1)[0], highpass_px)
        sh, coef, rows, cols = tile_shifts(a, b, tile_px=tile_px, search_px=search_px, step_px=step_px)
        edge = (np.abs(sh) >= search_px - 1.0).any(axis=-1)  # a peak at the rim of the search: not found
        vel.append(sh / lag)
        ok.append((coef >= min_coef) & ~edge)
        centres = (rows, cols)
    vel = np.stack(vel)  # (p, gy, gx, 2)
    ok = np.stack(ok)
    n_ok = ok.sum(axis=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # tiles never valid give NaN
        med = np.nanmedian(np.where(ok[..., None], vel, np.nan), axis=0)
    valid = n_ok >= max(2, (len(starts) + 1) // 2)
    return med, valid, centres


def estimate_cell_motion(read, n_frames: int, shape_yx: tuple[int, int], *, smoothing_px: float,
                         max_lag_frames: int, tile_px: int | None = None, n_pairs: int = 6,
                         target_shift_px: float = 2.5, min_coef: float = 0.5) -> CellMotion:
    """Velocity of the cell texture (px per frame) on a coarse grid of tiles.

    read(t0, t1) returns frames t0..t1-1 (float, (n, y, x)) of the cleaned movie;
    `smoothing_px` is the spatial smoothing it carries (sets the high-pass and the tile
    size).  A first pass at a short lag finds the speed roughly; the second uses the lag
    (<= max_lag_frames) that moves the texture by about `target_shift_px`, where the
    sub-pixel error is small against the shift.  Tiles whose texture does not correlate
    (coefficient < min_coef in most pairs: no cells, noise only) are not valid and get
    the velocity of the nearest tile that correlated; tiles whose short- and long-lag
    velocities disagree by more than 40 % (+ 0.15 px over the short lag) are not valid
    either (the speed and the valid fraction count only steady tiles)."""
    ny, nx = (int(v) for v in shape_yx)
    nt = int(n_frames)
    s = int(tile_px) if tile_px else int(min(32, max(12, round(6 * max(smoothing_px, 1.0)))))
    s = min(s, max(6, min(ny, nx) // 3))
    hp = max(1.0, 1.5 * float(smoothing_px))
    if nt < 3 or min(ny, nx) < s + 4:
        raise WavesError(f"a movie of {nt} frames of {ny} x {nx} px is too small to estimate cell motion")
    step = max(s // 2, int(math.ceil(max(ny, nx) / 12)))  # at most ~12 x 12 tiles
    lag1 = max(1, min(4, nt - 1))
    m1 = max(3, s // 3)
    v1, ok1, (rows1, cols1) = _pair_velocity(read, nt, lag1, n_pairs=n_pairs, tile_px=s, step_px=step,
                                             search_px=m1, highpass_px=hp, min_coef=min_coef)
    sp1 = float(np.nanmedian(np.hypot(v1[..., 0], v1[..., 1])[ok1])) if ok1.any() else 0.0
    lag = int(np.clip(round(target_shift_px / max(sp1, 1e-6)), lag1, max(lag1, min(max_lag_frames, nt - 1))))
    m = int(max(3, math.ceil(1.5 * sp1 * lag + 2)))
    m = min(m, max(3, (min(ny, nx) - s) // 2 - 1))
    vel, valid, (rows, cols) = _pair_velocity(read, nt, lag, n_pairs=n_pairs, tile_px=s, step_px=step,
                                              search_px=m, highpass_px=hp, min_coef=min_coef)
    # texture moves steadily: the short and the long lag must agree (waves, which move
    # an order of magnitude faster and repeat every period, do not give a steady shift)
    ri = np.clip(np.rint(np.interp(rows, rows1, np.arange(rows1.size))).astype(int), 0, rows1.size - 1)
    ci = np.clip(np.rint(np.interp(cols, cols1, np.arange(cols1.size))).astype(int), 0, cols1.size - 1)
    v1n, ok1n = v1[ri][:, ci], ok1[ri][:, ci]
    tol = 0.4 * np.hypot(vel[..., 0], vel[..., 1]) + 0.15 / lag1
    with np.errstate(invalid="ignore"):
        steady = valid & ok1n & (np.hypot(vel[..., 0] - v1n[..., 0], vel[..., 1] - v1n[..., 1]) <= tol)
    speed = np.hypot(vel[..., 0], vel[..., 1])
    med_speed = float(np.median(speed[steady])) if steady.any() else float("nan")
    filled = np.moveaxis(vel, -1, 0).copy()
    if valid.any():  # tiles without texture take the velocity of the nearest tile with texture
        _, (ir, ic) = ndi.distance_transform_edt(~valid, return_indices=True)
        filled = filled[:, ir, ic]
    else:
        filled[:] = 0.0
    filled = np.nan_to_num(filled)
    return CellMotion(velocity_px_per_frame=filled.astype(np.float32), valid=steady, centres_row=rows,
                      centres_col=cols, speed_px_per_frame=med_speed, valid_fraction=float(steady.mean()),
                      lag_frames=int(lag))


# --------------------------------------------------------------------------- the moving background


def background_weights(sigma_frames: float, step_frames: int) -> tuple[np.ndarray, np.ndarray]:
    """Frame offsets (multiples of `step_frames` within 2.5 sigma) and their Gaussian weights."""
    k = int(max(1, math.floor(2.5 * sigma_frames / step_frames)))
    offsets = np.arange(-k, k + 1) * int(step_frames)
    return offsets, np.exp(-0.5 * (offsets / sigma_frames) ** 2)


def remove_moving_background(read, write, n_frames: int, shape_yx: tuple[int, int], velocity_yx: np.ndarray, *,
                             sigma_frames: float, step_frames: int = 1, block: int = 32,
                             rim_px: int = 0) -> np.ndarray:
    """Subtract from every frame its motion-compensated background, in place.

    background(x, t) = sum_k w_k B(x + v(x) o_k, t + o_k) / sum_k w_k over the offsets o_k
    of `background_weights` (bilinear warps, as scipy.ndimage.map_coordinates order 1).  Near the movie's ends, and where cells
    come in across the frame edge, an offset is used only where its mirror -o_k is
    inside the movie and the frame too, and the weights are renormalised: the window
    shrinks but stays even, so it shifts no phase; where it is short it takes part of
    the wave, which then shows a low amplitude rather than a wrong phase.  read/write move frame blocks of the movie;
    frames still needed after their block is written are kept in memory.  Pixels closer
    than `rim_px` to the frame edge (the spatial smoothing is cut short there, and the
    texture left in them does not warp back), and pixels whose even window keeps less
    than MIN_WINDOW_WEIGHT of its weight, are set to 0 (no signal).  Returns that
    (y, x) bool map of pixels left out."""
    nt = int(n_frames)
    ny, nx = (int(v) for v in shape_yx)
    v = np.asarray(velocity_yx, dtype=np.float64)
    if v.shape != (2, ny, nx):
        raise WavesError(f"velocity field has shape {v.shape}, expected (2, {ny}, {nx})")
    offsets, w = background_weights(float(sigma_frames), int(step_frames))
    rr, cc = np.mgrid[0:ny, 0:nx].astype(np.float64)
    e = float(rim_px)  # the rim's pixels are barely smoothed: no warp samples from them
    inside = []
    for o in offsets:
        cr, ccol = rr + v[0] * o, cc + v[1] * o
        inside.append((cr >= e) & (cr <= ny - 1 - e) & (ccol >= e) & (ccol <= nx - 1 - e))
    # symmetric windows only: an offset counts where its mirror counts too, so the filter
    # stays even in time (zero phase, first-order cancellation of a velocity error)
    inside = [(inside[i] & inside[-1 - i]).astype(np.float32) for i in range(len(offsets))]
    # where cells came in across the edge within the window, the even window is short and
    # holds part of the wave: such pixels carry no usable signal and are set to 0
    full = float(w.sum())
    short = sum(wk * ins for wk, ins in zip(w, inside, strict=True)) < MIN_WINDOW_WEIGHT * full
    if rim_px > 0:
        r = int(rim_px)
        short[:r] = short[-r:] = True
        short[:, :r] = short[:, -r:] = True
    # bilinear taps of every offset, computed once (the warp does not change with t):
    # four flat source indices and four weights that hold the Gaussian weight and `inside`
    taps = []
    for o, wk, ins in zip(offsets, w, inside, strict=True):
        cr = np.clip(rr + v[0] * o, 0, ny - 1)
        ccol = np.clip(cc + v[1] * o, 0, nx - 1)
        r0 = np.minimum(np.floor(cr), max(ny - 2, 0)).astype(np.int64)
        c0 = np.minimum(np.floor(ccol), max(nx - 2, 0)).astype(np.int64)
        fr, fc = cr - r0, ccol - c0
        g = wk * ins
        i00 = (r0 * nx + c0).ravel()
        dr, dc = (nx if ny > 1 else 0), (1 if nx > 1 else 0)
        idx = [i00, i00 + dc, i00 + dr, i00 + dr + dc]
        wts = [(g * (1 - fr) * (1 - fc)).ravel(), (g * (1 - fr) * fc).ravel(),
               (g * fr * (1 - fc)).ravel(), (g * fr * fc).ravel()]
        taps.append((int(o), [i.astype(np.intp) for i in idx], [x.astype(np.float32) for x in wts], g.ravel()))
    halo = int(np.abs(offsets).max())
    tail = np.zeros((0, ny, nx), dtype=np.float32)  # originals of the frames before the block
    for t0 in range(0, nt, block):
        t1 = min(nt, t0 + block)
        lo, hi = max(0, t0 - halo), min(nt, t1 + halo)
        fresh = np.asarray(read(t0, hi), dtype=np.float32)  # not yet overwritten
        src = np.concatenate([tail[len(tail) - (t0 - lo):] if t0 > lo else tail[:0], fresh])  # frames lo..hi-1
        out = np.empty((t1 - t0, ny, nx), dtype=np.float32)
        for t in range(t0, t1):
            num = np.zeros(ny * nx, dtype=np.float32)
            den = np.zeros(ny * nx, dtype=np.float32)
            for o, idx, wts, g in taps:
                if t - abs(o) < 0 or t + abs(o) >= nt:
                    continue
                f = src[t + o - lo].ravel()
                for i, wt in zip(idx, wts, strict=True):
                    num += wt * f[i]
                den += g
            out[t - t0] = src[t - lo] - (num / np.maximum(den, 1e-12)).reshape(ny, nx)
        out[:, short] = 0.0
        write(t0, out)
        keep = min(halo, t1 - lo)
        tail = src[t1 - lo - keep : t1 - lo].copy()
    return short


# --------------------------------------------------------------------------- the whole step

MIN_WINDOW_WEIGHT = 0.8  # even window shorter than ~1.3 sd (of 2.5): holds part of the wave
MIN_VALID_FRACTION = 0.5  # fewer tiles with steadily moving texture: no cell stream to follow
MIN_SHIFT_PX = 0.5  # texture moving less than this over the background window is left alone
# aggregating amoebae crawl and stream at up to ~20 um/min (from memory, no source); waves
# run at 100-400 um/min.  A steady "motion" faster than this is the waves themselves
# (an untextured field tracked by the tiles), never corrected
MAX_CELL_SPEED_UM_PER_MIN = 40.0


def correct_streaming(read, write, shape_tyx: tuple[int, int, int], *,
                      smoothing_px: float, pixel_size_um: float,
                      frame_interval_s: float, period_band_min: tuple[float, float],
                      block: int = 32) -> tuple[dict, str | None]:
    """Estimate the cell texture's motion on the cleaned movie and, where the cells
    stream, subtract the motion-compensated background from every frame (in place).

    The background's temporal Gaussian has sd 0.19 x the longest period of the band:
    it keeps half of a wave at that period and removes none of the shorter ones
    (transfer 1 - exp(-2 pi^2 sd^2 / P^2)).  Returns the summary block and a note
    for a biologist (None when nothing was done)."""
    nt, ny, nx = (int(v) for v in shape_tyx)
    dt_min = float(frame_interval_s) / 60.0
    sigma_frames = max(1.0, 0.19 * float(period_band_min[1]) / dt_min)
    # the window is sampled every `step` frames: the sampled Gaussian's transform repeats at
    # 1 / step, which must stay clear (3 sd of it) above the band's highest frequency
    f_hi = dt_min / float(period_band_min[0])
    step = max(1, int(math.floor(1.0 / (f_hi + 3.0 / (2.0 * math.pi * sigma_frames)))))
    offsets, _ = background_weights(sigma_frames, step)
    block_out = {"method": "texture motion by tile cross-correlation; motion-compensated background subtracted",
                 "cell_motion_um_per_min": None, "moving_tile_fraction": 0.0, "corrected": False,
                 "background_window_min": float(2 * np.abs(offsets).max() * dt_min)}
    try:
        motion = estimate_cell_motion(read, nt, (ny, nx), smoothing_px=smoothing_px,
                                      max_lag_frames=max(1, nt // 3))
    except WavesError:
        return block_out, None  # too small a movie to follow texture
    to_um_per_min = float(pixel_size_um) / dt_min
    speed = motion.speed_px_per_frame
    block_out["moving_tile_fraction"] = motion.valid_fraction
    if np.isfinite(speed):
        block_out["cell_motion_um_per_min"] = speed * to_um_per_min
    moving = (motion.valid_fraction >= MIN_VALID_FRACTION and np.isfinite(speed)
              and speed * float(np.abs(offsets).max()) >= MIN_SHIFT_PX
              and speed * to_um_per_min <= MAX_CELL_SPEED_UM_PER_MIN)
    if not moving:
        return block_out, None
    rim = max(2, int(math.ceil(smoothing_px)))
    left_out = remove_moving_background(read, write, nt, (ny, nx), motion.field((ny, nx)),
                                        sigma_frames=sigma_frames, step_frames=step, block=block, rim_px=rim)
    block_out["corrected"] = True
    block_out["edge_px_left_out"] = rim
    block_out["left_out_fraction"] = float(left_out.mean())
    note = (f"cells were streaming (texture moving at {speed * to_um_per_min:.1f} um/min, median over the "
            "field): the moving cell texture was removed before the waves were measured; "
            f"{100 * float(left_out.mean()):.0f} % of the field, along the frame edges where cells came in "
            "or the smoothing is cut short, was left out")
    return block_out, note


def plaquettes_inside(mask: np.ndarray) -> np.ndarray:
    """(y, x) bool: True at (r, c) when all four corners of the plaquette whose top-left
    pixel is (r, c) lie in `mask`.  A plaquette with a corner outside the signal (no
    cells, a left-out edge) winds whenever a front crosses it: no core is taken from it."""
    m = np.asarray(mask, dtype=bool)
    out = np.zeros_like(m)
    out[:-1, :-1] = m[:-1, :-1] & m[1:, :-1] & m[:-1, 1:] & m[1:, 1:]
    return out
