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

import numpy as np

from waves import preprocess
from waves.analyse.clean import _Movie
from waves.preprocess import brightness as pb

FADE_NOTE_PERCENT = 10.0  # a slow brightness change above this is named in the notes


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
    gains, offsets = [], []
    for t0 in range(0, movie.shape[0], block):  # block by block: memory bounded by the block
        b = movie.frames(t0, t0 + block)
        g, o = pb.frame_brightness(b.reshape(len(b), -1)[:, idx], ref)
        gains.append(g)
        offsets.append(o)
    gain, offset = np.concatenate(gains), np.concatenate(offsets)
    return pb.brightness_correction(gain, offset, slow_frames=slow_frames)


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
