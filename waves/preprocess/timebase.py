"""The time axis: recorded frames with true times -> a uniform grid of frames.

A camera that drops frames, or pauses, leaves a movie whose frame i is not at
i x interval.  `build_timebase` puts every recorded frame on the nearest slot
of a uniform grid at the nominal interval (the median recorded step, or the
calibration's interval when it agrees), and says for every grid frame which
recorded frames make it: itself, or, for a missing slot, its two good
neighbours with linear weights in true time (so a band-pass sees a continuous
signal).  Frames other steps declare bad (`excluded`) are replaced the same
way.  `valid` marks the grid frames a measurement may use: False inside a gap
(a run of at least GAP_MIN_FRAMES missing frames) and on excluded frames.

`GridResampler` applies a timebase block by block to frames arriving in
order (the binning pass reads the movie once, in blocks), keeping only the
last good frame of earlier blocks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from waves.errors import InputError

__all__ = ["describe_times", "grid_from_record", "GAP_MIN_FRAMES", "Timebase", "build_timebase", "GridResampler", "resample", "runs"]

# A run of this many consecutive missing frames is a gap (invalid for
# measurements); shorter runs are interpolated and kept.  One or two missing
# frames span at most 2 intervals, 10-40 s at the usual 5-20 s intervals, far
# shorter than a wave period (>= 2 min, >= 6 frames): linear interpolation
# over them follows the wave closely.  From three on, at the fastest periods
# the hole reaches half a period and an interpolated frame no longer carries
# the wave.
GAP_MIN_FRAMES = 3
# the calibration's interval is used when it is this close to the median step
INTERVAL_AGREEMENT = 0.05


@dataclass(frozen=True)
class Timebase:
    """A uniform grid of `n_grid` frames `interval_s` apart, from frame 0.

    slot          (n_recorded,) grid index of every recorded frame.
    source        (n_grid, 2) recorded-frame indices (a, b) each grid frame is
                  made from: grid = (1 - weight) * frame[a] + weight * frame[b]
                  (a == b, weight 0 for a frame taken as it is).
    weight        (n_grid,) float.
    recorded      (n_grid,) bool: a recorded frame sits on the slot.
    excluded      (n_grid,) bool: its recorded frame was declared bad.
    valid         (n_grid,) bool: usable for measurements.
    """

    interval_s: float
    n_grid: int
    slot: np.ndarray
    source: np.ndarray
    weight: np.ndarray
    recorded: np.ndarray
    excluded: np.ndarray
    valid: np.ndarray

    @property
    def n_recorded(self) -> int:
        return int(self.slot.size)

    @property
    def dropped(self) -> np.ndarray:
        """Grid indices with no recorded frame."""
        return np.flatnonzero(~self.recorded)

    @property
    def interpolated(self) -> np.ndarray:
        """Grid indices whose content is interpolated (dropped or excluded)."""
        return np.flatnonzero(~self.recorded | self.excluded)

    @property
    def gaps(self) -> list[tuple[int, int]]:
        """[start, stop) grid runs of at least GAP_MIN_FRAMES dropped frames."""
        return [r for r in runs(~self.recorded) if r[1] - r[0] >= GAP_MIN_FRAMES]

    @property
    def is_identity(self) -> bool:
        """Every grid frame is a recorded, good frame: resampling changes nothing."""
        return self.n_grid == self.n_recorded and not self.excluded.any()


def runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """[start, stop) of every run of True in a 1-D bool array."""
    m = np.asarray(mask, dtype=bool).astype(np.int8)
    d = np.diff(np.concatenate([[0], m, [0]]))
    return list(zip(np.flatnonzero(d == 1).tolist(), np.flatnonzero(d == -1).tolist(), strict=True))


def _check_times(times_s) -> np.ndarray:
    try:
        t = np.asarray(times_s, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise InputError("frame times must be numbers (seconds), one per frame") from None
    if t.size < 2:
        raise InputError(f"frame times need at least 2 frames, got {t.size}")
    if not np.all(np.isfinite(t)):
        bad = np.flatnonzero(~np.isfinite(t))
        raise InputError(f"frame times of frames {bad[:5].tolist()} are not finite; give a time in seconds for each")
    steps = np.diff(t)
    bad = np.flatnonzero(steps <= 0)
    if bad.size:
        k = int(bad[0])
        what = "repeats" if steps[k] == 0 else "goes back from"
        raise InputError(
            f"frame times must increase: frame {k + 1} at {t[k + 1]:g} s {what} frame {k} at {t[k]:g} s"
            + (f" ({bad.size} such steps)" if bad.size > 1 else "")
            + "; check the times file or the file's per-plane times"
        )
    return t


def _slots(rel: np.ndarray, step0: float) -> tuple[np.ndarray, float]:
    """Grid slot of every frame and the fitted interval: frames in order, each
    on the nearest slot of the interval fitted so far (least squares through
    frame 0), so a small error of the first guess does not pile up along a
    long movie.  InputError when two frames fall on one slot."""
    slot = np.zeros(rel.size, dtype=np.int64)
    sxy = sxx = 0.0
    step = step0
    for i in range(1, rel.size):
        k = int(np.rint(rel[i] / step))
        if k <= slot[i - 1]:
            raise InputError(
                f"frames {i - 1} and {i} (at {rel[i - 1]:g} s and {rel[i]:g} s) fall on one slot of the "
                f"{step:g} s frame grid: the times are too irregular for one frame interval"
            )
        slot[i] = k
        sxy += rel[i] * k
        sxx += float(k) * k
        step = sxy / sxx
    return slot, float(step)


def build_timebase(times_s, *, nominal_interval_s: float | None = None, excluded=None) -> Timebase:
    """The uniform grid of recorded frames at times `times_s` (s, increasing).

    nominal_interval_s  the calibration's interval: used when within
                        INTERVAL_AGREEMENT of the median recorded step.
    excluded            (n_recorded,) bool, True for frames to leave out
                        (replaced by interpolation, invalid for measurements).
    """
    t = _check_times(times_s)
    n = t.size
    rel = t - t[0]
    median = float(np.median(np.diff(t)))
    slot, fitted = _slots(rel, median)
    # the interval: the calibration's when it agrees and puts every frame on the
    # same slot, else the median step if it does, else the fitted step
    step = fitted
    for cand in (nominal_interval_s, median):
        if cand is not None and cand > 0 and abs(cand - fitted) <= INTERVAL_AGREEMENT * fitted:
            if np.array_equal(np.rint(rel / cand).astype(np.int64), slot):
                step = float(cand)
                break
    n_grid = int(slot[-1]) + 1
    if excluded is None:
        bad = np.zeros(n, dtype=bool)
    else:
        bad = np.asarray(excluded, dtype=bool).reshape(-1)
        if bad.size != n:
            raise InputError(f"valid_frames holds {bad.size} values for {n} frames")
    if bad.all():
        raise InputError("every frame is marked bad; there is nothing to analyse")
    recorded = np.zeros(n_grid, dtype=bool)
    recorded[slot] = True
    excl = np.zeros(n_grid, dtype=bool)
    excl[slot[bad]] = True
    good_idx = np.flatnonzero(~bad)  # recorded frames used as sources
    good_t = rel[good_idx]
    grid_t = np.arange(n_grid) * step
    # the good frame at or before / after each grid time (by slot, so jitter keeps order)
    good_slot = slot[good_idx]
    g = np.arange(n_grid)
    right = np.searchsorted(good_slot, g, side="left")  # first good slot >= g
    left = right - 1
    on = (right < good_slot.size) & (good_slot[np.minimum(right, good_slot.size - 1)] == g)
    left = np.where(on, right, left)
    left_c = np.clip(left, 0, good_slot.size - 1)
    right_c = np.clip(right, 0, good_slot.size - 1)
    a = good_idx[left_c]
    b = good_idx[right_c]
    ta, tb = good_t[left_c], good_t[right_c]
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(tb > ta, (grid_t - ta) / (tb - ta), 0.0)
    w = np.clip(w, 0.0, 1.0)
    w[on] = 0.0
    b = np.where(on, a, b)
    # before the first / after the last good frame: the nearest good frame
    head, tail = left < 0, right >= good_slot.size
    a = np.where(head, b, a)
    b = np.where(tail, a, b)
    w[head | tail] = 0.0
    missing = ~recorded | excl
    valid = ~excl
    for r0, r1 in runs(missing):
        if r1 - r0 >= GAP_MIN_FRAMES:
            valid[r0:r1] = False
    return Timebase(
        interval_s=step, n_grid=n_grid, slot=slot, source=np.stack([a, b], axis=1), weight=w,
        recorded=recorded, excluded=excl, valid=valid,
    )


class GridResampler:
    """Resample frames arriving in order, block by block, onto a timebase.

    `push(t0, block)` takes recorded frames t0 .. t0 + len(block) - 1 and
    returns (g0, frames): the grid frames g0 .. that are now complete (maybe
    none).  Only the last good frame of earlier blocks is kept.
    """

    def __init__(self, tb: Timebase):
        self.tb = tb
        self._next = 0  # next grid frame to emit
        self._carry_idx = -1
        self._carry: np.ndarray | None = None
        self._good = np.ones(tb.n_recorded, dtype=bool)
        self._good[np.flatnonzero(tb.excluded[tb.slot])] = False

    def push(self, t0: int, block: np.ndarray) -> tuple[int, np.ndarray]:
        tb = self.tb
        t1 = t0 + len(block)
        g0 = self._next
        src = tb.source
        g1 = g0
        while g1 < tb.n_grid and src[g1, 1] < t1:
            g1 += 1
        out = np.empty((g1 - g0,) + block.shape[1:], dtype=np.float32)

        def frame(k: int) -> np.ndarray:
            if t0 <= k < t1:
                return block[k - t0]
            if k == self._carry_idx:
                return self._carry
            raise RuntimeError(f"recorded frame {k} is not at hand (block {t0}-{t1})")  # pragma: no cover

        for j, g in enumerate(range(g0, g1)):
            a, b = int(src[g, 0]), int(src[g, 1])
            w = float(tb.weight[g])
            if a == b or w == 0.0:
                out[j] = frame(a)
            elif w == 1.0:
                out[j] = frame(b)
            else:
                out[j] = (1.0 - w) * frame(a) + w * frame(b)
        good = np.flatnonzero(self._good[t0:t1])
        if good.size:
            k = int(good[-1])
            self._carry_idx = t0 + k
            self._carry = np.array(block[k], dtype=np.float32)
        self._next = g1
        return g0, out

    @property
    def done(self) -> bool:
        return self._next == self.tb.n_grid


def resample(frames: np.ndarray, tb: Timebase) -> np.ndarray:
    """The whole (t, ...) movie on the grid (for small movies and tests)."""
    r = GridResampler(tb)
    _, out = r.push(0, np.asarray(frames, dtype=np.float32))
    return out


def describe_times(times_s, interval_s: float, origin: str) -> str:
    """One line about a stack's frame times: the grid, dropped frames, gaps."""
    tb = build_timebase(times_s, nominal_interval_s=interval_s)
    text = f"{origin}; {tb.n_recorded} recorded frames on a grid of {tb.n_grid} x {tb.interval_s:g} s"
    n_drop = int(tb.dropped.size)
    if not n_drop:
        return text + "; no dropped frames"
    gaps = tb.gaps
    dt_min = tb.interval_s / 60.0
    text += f"; {n_drop} dropped frame{'s' if n_drop > 1 else ''}, {len(gaps)} gap{'s' if len(gaps) != 1 else ''}"
    if gaps:
        text += " (" + ", ".join(f"{b - a} frames at {a * dt_min:.1f}-{b * dt_min:.1f} min" for a, b in gaps) + ")"
    return text


def grid_from_record(record: dict) -> Timebase | None:
    """The timebase of an analysis from its summary's `recording` block (grid
    interval, dropped and excluded grid frames), or None when the grid is the
    recording itself.  Recorded frames sit on their slots' exact times, so
    weights follow the grid (pictures re-made from a results folder)."""
    if not record:
        return None
    n_grid = int(record.get("n_grid_frames", 0))
    dropped = np.asarray(record.get("dropped_frames") or [], dtype=np.int64)
    excluded_grid = np.asarray(record.get("excluded_frames") or [], dtype=np.int64)
    if n_grid <= 0 or (dropped.size == 0 and excluded_grid.size == 0):
        return None
    slots = np.setdiff1d(np.arange(n_grid), dropped)
    step = float(record["frame_interval_s"])
    excluded = np.isin(slots, excluded_grid)
    return build_timebase(slots * step, nominal_interval_s=step, excluded=excluded)
