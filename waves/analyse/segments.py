"""Valid stretches of the time axis: which frames a measurement may use.

The pipeline works on a uniform frame grid (waves.preprocess.timebase) whose
gaps and excluded frames are filled by interpolation so the band-pass sees a
continuous signal, but nothing is measured there.  In the frames of the
phase movie (the grid after trimming the filter edges), this module:

* splits the time windows of the period time course so none overlaps an
  invalid frame (`valid_windows`);
* gives the valid stretches that replace the whole movie in the per-pixel
  measures, and combines their results (`combine_stretches`);
* drops arrivals inside invalid frames and the intervals that straddle them
  (`drop_invalid_arrivals`, `intervals_outside`).
"""

from __future__ import annotations

import numpy as np

from waves.preprocess.timebase import GAP_MIN_FRAMES, runs

__all__ = ["measure_stretches", "settle_margins", "arrivals_by_stretch", "stretches", "valid_windows", "combine_stretches", "drop_invalid_arrivals", "intervals_outside"]

MIN_STRETCH_FRAMES = 3  # the compiled per-pixel measures need at least 3 frames


def settle_margins(valid: np.ndarray, *, period_frames: float, min_run: int) -> np.ndarray:
    """`valid` with every invalid run of at least `min_run` frames widened on
    each side by min(run length, one period) frames.

    Why: the FFT band-pass (lower edge about half the dominant frequency)
    spreads the missing wave of an interpolated run over about a period on
    either side.  Measured on a 4-min target with a 15-frame gap (16 frames a
    period, seeds 0-2): front speed -1.2 / -3.3 / -3.2 % without a margin,
    -0.04 / -0.04 / -0.4 % with one period; with 8-frame gaps a margin of 8
    frames keeps it within 0.8 %."""
    out = np.array(valid, dtype=bool)
    n = out.size
    per = max(1, int(round(period_frames)))
    for a, b in runs(~np.asarray(valid, dtype=bool)):
        if b - a >= min_run:
            m = min(b - a, per)
            out[max(0, a - m) : min(n, b + m)] = False
    return out


def stretches(valid: np.ndarray, *, min_frames: int = MIN_STRETCH_FRAMES) -> list[tuple[int, int]]:
    """[start, stop) of the runs of valid frames at least `min_frames` long."""
    return [(a, b) for a, b in runs(valid) if b - a >= min_frames]


def measure_stretches(valid: np.ndarray) -> list[tuple[int, int]]:
    """The stretches over which whole cycles are counted: runs of invalid
    frames shorter than GAP_MIN_FRAMES (single excluded frames, filled by
    interpolation, which keeps the phase continuous) do not split them;
    longer runs (and their settling margins) do."""
    bridged = np.array(valid, dtype=bool)
    for a, b in runs(~bridged):
        if b - a < GAP_MIN_FRAMES:
            bridged[a:b] = True
    return stretches(bridged)


def valid_windows(valid: np.ndarray, *, win: int, step: int) -> list[tuple[int, int]]:
    """Windows of `win` frames every `step` frames inside each valid stretch
    (each stretch's windows start at its first frame).  When no stretch holds
    a whole window, the longest stretch is one window (None of them if it is
    shorter than 4 frames)."""
    out = []
    for a, b in stretches(valid):
        out += [(s, s + win) for s in range(a, b - win + 1, step)]
    if not out:
        st = stretches(valid, min_frames=4)
        if st:
            a, b = max(st, key=lambda r: r[1] - r[0])
            out = [(a, b)]
    return out


def _circular_mean(angles: np.ndarray, weights: np.ndarray) -> np.ndarray:
    c = np.nansum(weights * np.cos(angles), axis=0)
    s = np.nansum(weights * np.sin(angles), axis=0)
    return np.arctan2(s, c)


def combine_stretches(period, speed, direction, coherence, omega, lengths) -> tuple:
    """Whole-movie measures from those of the valid stretches (axis 0):
    the period of all whole cycles together (sum of lengths / sum of
    length / period, i.e. cycles weighted), length-weighted speed, omega and
    coherence, and the length-weighted circular mean direction.  Where no
    stretch holds two whole cycles, the period is 2 pi / omega (the mean
    phase advance) if the stretches together span two periods; NaN where no
    stretch measured the pixel."""
    L = np.asarray(lengths, dtype=np.float64).reshape((-1,) + (1,) * (np.ndim(period) - 1))
    with np.errstate(invalid="ignore", divide="ignore"):
        ok = np.isfinite(period)
        cycles = np.where(ok, L / period, 0.0)
        per = np.where(cycles.sum(0) > 0, np.where(ok, L, 0.0).sum(0) / cycles.sum(0), np.nan)

        def wmean(x):
            good = np.isfinite(x)
            wsum = np.where(good, L, 0.0).sum(0)
            return np.where(wsum > 0, np.where(good, L * x, 0.0).sum(0) / wsum, np.nan)

        sp, coh, om = wmean(speed), wmean(coherence), wmean(omega)
        from_advance = 2.0 * np.pi / np.abs(om)
        total = np.where(np.isfinite(omega), L, 0.0).sum(0)
        per = np.where(np.isfinite(per) | ~(total >= 2.0 * from_advance), per, from_advance)
        dgood = np.isfinite(direction)
        d = _circular_mean(np.where(dgood, direction, 0.0), np.where(dgood, L, 0.0))
        d = np.where(dgood.any(0), d, np.nan)
    f = np.float32
    return per.astype(f), sp.astype(f), d.astype(f), coh.astype(f), om.astype(f)


def drop_invalid_arrivals(times: np.ndarray, counts: np.ndarray, valid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Arrival times (y, x, m; frames, NaN-padded, sorted) without the waves
    that arrive inside invalid frames: removed, the rest kept sorted and
    packed to the front, counts updated."""
    nt = valid.size
    t = np.array(times, dtype=np.float32)
    with np.errstate(invalid="ignore"):
        idx = np.clip(np.nan_to_num(t, nan=0.0), 0, nt - 1)
        # a crossing between frames k and k+1 needs both to be valid
        lo = np.floor(idx).astype(np.int64)
        hi = np.minimum(lo + 1, nt - 1)
        bad = np.isfinite(t) & (~valid[lo] | ~valid[hi])
    t[bad] = np.nan
    t = np.sort(t, axis=2)  # NaN last
    new_counts = np.isfinite(t).sum(axis=2).astype(counts.dtype)
    m = max(int(new_counts.max()) if new_counts.size else 0, 1)
    return np.ascontiguousarray(t[:, :, :m]), new_counts


def intervals_outside(times: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Intervals between successive arrivals (y, x, m - 1), NaN where an
    invalid frame lies between the two (a wave may be lost there)."""
    t = np.asarray(times, dtype=np.float64)
    d = np.diff(t, axis=2)
    if valid.all():
        return d
    cum = np.concatenate([[0], np.cumsum(~valid)])  # invalid frames before each frame index
    nt = valid.size
    with np.errstate(invalid="ignore"):
        a = np.clip(np.floor(np.nan_to_num(t[:, :, :-1], nan=0.0)), 0, nt).astype(np.int64)
        b = np.clip(np.ceil(np.nan_to_num(t[:, :, 1:], nan=0.0)) + 1, 0, nt).astype(np.int64)
    straddle = cum[b] - cum[a] > 0
    return np.where(straddle, np.nan, d)


def arrivals_by_stretch(times: np.ndarray, valid: np.ndarray | None) -> list[np.ndarray]:
    """The arrival times (y, x, m) once per valid stretch, NaN outside it (so
    intervals counted on each never span an invalid run); all of them when
    `valid` is None or all True."""
    if valid is None or np.all(valid):
        return [times]
    out = []
    for a, b in stretches(valid, min_frames=1):
        with np.errstate(invalid="ignore"):
            inside = (times >= a) & (times <= b - 1)
        out.append(np.where(inside, times, np.nan))
    return out
