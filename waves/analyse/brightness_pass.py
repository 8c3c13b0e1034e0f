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


def estimate(movie: _Movie, mean_b: np.ndarray, *, block: int, slow_frames: float,
             cell_mask: np.ndarray | None = None) -> pb.Brightness | None:
    """Per-frame gain and offset of the binned movie against its temporal mean,
    over the dish (the dark surround would only add noise to the fit); None
    when the mean image has no light (background-subtracted data: a gain
    means nothing there)."""
    if not float(mean_b.max()) > 0:
        return None
    field = preprocess.dish_mask(mean_b)
    if cell_mask is not None and (field & cell_mask).sum() >= 64:  # the cell field, when one was found
        field = field & cell_mask
    idx = pb.sample_pixels(field)
    ref = mean_b.ravel()[idx]
    if not float(ref.mean()) > 0:
        return None
    gains, offsets, scales = [], [], []
    for t0 in range(0, movie.shape[0], block):  # block by block: memory bounded by the block
        b = movie.frames(t0, t0 + block)
        smp = b.reshape(len(b), -1)[:, idx].astype(np.float64)
        g, o = pb.frame_brightness(smp, ref)
        r = smp - g[:, None] * ref[None, :] - o[:, None]  # the waves and the noise
        scales.append(1.4826 * np.median(np.abs(r - np.median(r, axis=1, keepdims=True)), axis=1))
        gains.append(g)
        offsets.append(o)
    gain, offset = np.concatenate(gains), np.concatenate(offsets)
    bright = pb.brightness_correction(gain, offset, slow_frames=slow_frames)
    structure = 1.4826 * float(np.median(np.abs(ref - np.median(ref))))
    waves = float(np.median(np.concatenate(scales)))
    if waves > MAX_WAVE_TO_STRUCTURE * structure:
        # the mean image is mostly the waves' own pattern: a frame's gain on it is the waves'
        # strength, not the lamp's; only the flicker frames are corrected
        bright = dataclasses.replace(
            bright, gain=np.where(bright.flicker, bright.gain, 1.0), offset=np.where(bright.flicker, bright.offset, 0.0),
            method=bright.method + f"; slow trend not removed: the waves ({waves / max(float(ref.mean()), 1e-12):.1%} "
            "of the mean level) are not small against the static image's structure "
            f"({structure / max(float(ref.mean()), 1e-12):.1%}), so a lamp fade cannot be told from them")
    return bright


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
