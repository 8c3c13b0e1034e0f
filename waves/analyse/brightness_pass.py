"""The brightness pass: per-frame lamp gain and offset of the binned movie,
flicker frames, and what the analysis says about them.

Between the binning pass and the cleaning pass: `estimate` reads the binned
movie once (a strided sample of the cell field's pixels per frame), the
cleaning pass divides the slow gain out (`waves.preprocess.brightness`), and
`replace_flicker` then overwrites each flicker frame of the cleaned movie by
linear interpolation in time of its neighbours (the cleaning is linear per
frame, so this equals cleaning an interpolated raw frame).
"""

from __future__ import annotations

import dataclasses
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from waves import preprocess
from waves.analyse.clean import _Movie
from waves.preprocess import brightness as pb

FADE_NOTE_PERCENT = 10.0  # a slow brightness change above this is named in the notes
# A lamp gain is told from the waves only when the static image (cell texture, illumination)
# dominates: the per-frame fit's residual (waves and noise) must stay below this fraction of the
# mean image's robust spread.  Measured: 0.04-0.07 on textured synthetic recordings (a 4 %
# modulation of a 0.3-contrast texture, with a 40 % fade or a 0.3-2.0 ramp); 0.39 on the
# simulator's dark-field rendering of a relay field starting at rest (waves 4.5 % of the level,
# static spread 11 %), where the slow "fade" fitted was the waves spreading (-11 %) and dividing
# it out moved a pacemaker's period by -0.09 %.
MAX_WAVE_TO_STRUCTURE = 0.2
MAX_LAMP_SWING = 4.0  # a slow gain changing more than this factor is no lamp fade (from memory, no source)
QQ_RANGE = (0.05, 0.95)  # the quantiles the per-frame gain is fitted over (the tails: specks, holes)
RESIDUAL_SIGMA_PX = 2.0  # analysis-grid px: above the cell grain (1-2 px), far below a wavelength


def estimate(movie: _Movie, mean_b: np.ndarray, *, block: int, slow_frames: float,
             cell_mask: np.ndarray | None = None, lag_frames: int = 4, workers: int = 1) -> pb.Brightness | None:
    """Per-frame gain and offset of the binned movie against its temporal mean,
    over the dish (the dark surround would only add noise to the fit); None
    when the mean image has no light (background-subtracted data: a gain
    means nothing there).  `lag_frames`: about a quarter of the waves' period
    (`_wave_change`, on a second thread beside the fits when `workers` > 1)."""
    if not float(mean_b.max()) > 0:
        return None
    field = preprocess.dish_mask(mean_b)
    if cell_mask is not None and (field & cell_mask).sum() >= 64:  # the cell field, when one was found
        field = field & cell_mask
    idx = pb.sample_pixels(field)
    ref = mean_b.ravel()[idx]
    if not float(ref.mean()) > 0:
        return None
    # quantile against quantile: each frame's sorted sample against the mean image's, over the
    # middle QQ_RANGE of the values.  A lamp's gain and offset map values to values wherever they
    # sit, so the fit is the same; but a frame whose texture moved (stage drift, streaming cells)
    # no longer matches the mean image pixel by pixel, and a pixel-wise regression's slope then
    # falls with the match (measured: a -49 % "fade" on a drifting field with no fade at all)
    order = np.sort(ref)
    n = order.size
    q0, q1 = int(QQ_RANGE[0] * n), max(int(QQ_RANGE[1] * n), int(QQ_RANGE[0] * n) + 2)
    change = None
    if int(workers) > 1:  # numpy and scipy.ndimage: beside the fits below
        pool = ThreadPoolExecutor(max_workers=1)
        change = pool.submit(_wave_change, movie, idx, lag=lag_frames)
        pool.shutdown(wait=False)
    gains, offsets = [], []
    for t0 in range(0, movie.shape[0], block):  # block by block: memory bounded by the block
        b = movie.frames(t0, t0 + block)
        smp = np.sort(b.reshape(len(b), -1)[:, idx].astype(np.float64), axis=1)
        g, o = pb.frame_brightness(smp[:, q0:q1], order[q0:q1])
        gains.append(g)
        offsets.append(o)
    gain, offset = np.concatenate(gains), np.concatenate(offsets)
    bright = pb.brightness_correction(gain, offset, slow_frames=slow_frames)
    bright = dataclasses.replace(bright, method=bright.method.replace(
        "Huber regression of each frame on the temporal mean",
        f"Huber regression of each frame's sorted values on the temporal mean's ({100 * QQ_RANGE[0]:g}-"
        f"{100 * QQ_RANGE[1]:g} % quantiles)"))
    structure = 1.4826 * float(np.median(np.abs(ref - np.median(ref))))
    waves = _wave_change(movie, idx, lag=lag_frames) if change is None else change.result()
    slow = bright.gain[~bright.flicker] if (~bright.flicker).any() else bright.gain
    swing = float(slow.max() / slow.min()) if float(slow.min()) > 0 else np.inf
    if swing > MAX_LAMP_SWING:
        # no lamp fades to a fraction like that within a recording: the image itself changed
        # (measured: a simulated field settling from a random start "faded" by 86 %)
        # and its jumps are the image's too: nothing is corrected, no frame is called flicker
        bright = _slow_trend_left(bright, keep=np.zeros(len(bright.gain), dtype=bool), why=(
            f"not applied: the slow trend would change the brightness {swing:.1f}-fold, more than any lamp "
            "does within a recording, so the image itself changed"))
    elif waves > MAX_WAVE_TO_STRUCTURE * structure:
        # the mean image is mostly the waves' own pattern: a frame's gain on it is the waves'
        # strength, not the lamp's; only the flicker frames are corrected
        level = max(float(ref.mean()), 1e-12)
        bright = _slow_trend_left(bright, keep=bright.flicker, why=(
            f"slow trend not removed: the waves ({waves / level:.1%} of the mean level) are not small against "
            f"the static image's structure ({structure / level:.1%}), so a lamp fade cannot be told from them"))
    return bright


def _slow_trend_left(bright: pb.Brightness, *, keep: np.ndarray, why: str) -> pb.Brightness:
    """`bright` with gain 1 and offset 0 except on the frames `keep` (which stay
    flicker frames; the others are not), and `why` added to its method."""
    return dataclasses.replace(bright, gain=np.where(keep, bright.gain, 1.0), offset=np.where(keep, bright.offset, 0.0),
                               flicker=bright.flicker & keep, method=f"{bright.method}; {why}")


def _wave_change(movie: _Movie, idx: np.ndarray, *, lag: int, n_pairs: int = 48) -> float:
    """Robust spread of how the frames change over `lag` frames (a quarter of a
    typical period), divided by sqrt(2), at the sample pixels `idx`, over
    `n_pairs` frame pairs spread over the movie (the median over pairs: a
    flicker frame spoils a few), after a Gaussian of RESIDUAL_SIGMA_PX.  The
    waves' own pattern changes that fast and is broad, so it stays; moving
    texture (streaming cells, an uncorrected drift, growing mounds) hardly
    changes over a quarter period, a lamp fade by a fraction of a percent, and
    the camera noise is smoothed away (measured on a recording with every
    degradation at once: the fit's plain residual was 20 % of the level, as
    large as the static structure, and the fade was left in).  No gain enters,
    so a fit that a changing image fools cannot hide the waves from the guard."""
    import scipy.ndimage as ndi

    nt = movie.shape[0]
    lag = int(min(max(lag, 1), max(nt - 1, 1)))
    if nt <= lag:
        return 0.0

    def smoothed(i: int) -> np.ndarray:
        f = movie.frames(i, i + 1)[0].astype(np.float64)
        return ndi.gaussian_filter(f, RESIDUAL_SIGMA_PX, mode="nearest").ravel()[idx]

    starts = np.unique(np.linspace(0, nt - 1 - lag, min(nt - lag, n_pairs)).round().astype(np.int64))
    scales = []
    for i in starts:
        d = (smoothed(int(i) + lag) - smoothed(int(i))) / np.sqrt(2.0)
        scales.append(1.4826 * float(np.median(np.abs(d - np.median(d)))))
    return float(np.median(scales))


def replace_flicker(movie: _Movie, bright: pb.Brightness) -> list[int]:
    """Flicker frames of the cleaned movie -> interpolation of their neighbours."""
    if not bright.flicker.any():
        return []
    return pb.interpolate_frames(lambda i: movie.frames(i, i + 1)[0],
                                 lambda i, f: movie.write(i, f[None]), bright.flicker)


def report(bright: pb.Brightness, *, notes: list, warnings: list) -> dict:
    """summary['brightness'], plus a note for a removed fade and a warning for flicker."""
    out = bright.summary()
    fade = out["fade_percent"]
    if abs(fade) > FADE_NOTE_PERCENT:
        notes.append(
            f"the overall brightness {'fell' if fade < 0 else 'rose'} by {abs(fade):.0f} % from the first to "
            "the last frame (lamp fade); it was divided out frame by frame before measuring"
        )
    fl = out["flicker_frames"]
    if fl:
        shown = ", ".join(map(str, fl[:20])) + (" ..." if len(fl) > 20 else "")
        warnings.append(
            f"{len(fl)} flicker frame{'s' if len(fl) > 1 else ''} (whole-frame brightness jumps) "
            f"replaced by interpolating their neighbours: frame{'s' if len(fl) > 1 else ''} {shown}"
        )
    return out
