"""Stage drift on every run: a coarse estimate before the first look, the
decision to correct it, and the map of analysis-grid pixels every frame covers.

The estimate works on the raw frames (binned to at most ~256 px a side),
high-passed so that the static cell texture dominates and broad wave bands
drop out, against a temporal-median reference in which moving bands wash out.
Each frame is matched to the reference by plain cross-correlation of
Hann-windowed texture images (FFT) with a three-point Gaussian fit of the
peak on each axis for the sub-pixel part (common practice, no source).
Shifts are in recorded pixels, relative to frame 0, with the sign convention
of `waves.preprocess.estimate_drift`: frame i's content sits at
(r + dy, c + dx) of frame 0's (r, c).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
import scipy.ndimage as ndi

from waves import preprocess

# Correct when the drift exceeds this fraction of an analysis-grid pixel.  The
# phase gradient (speed, direction) and the charge loops compare neighbouring
# pixels; a quarter-pixel shift already moves a front by a quarter of that
# stencil between frames, i.e. it appears as a false phase step of ~0.25 *
# 2 pi * pixel / wavelength, which at 24 px per wavelength is ~4 degrees, the
# size of the smoothing-bias corrections we still trust (common practice, no source).
DRIFT_CORRECT_FRACTION = 0.25
# A jump: a frame-to-frame step larger than this (recorded px) and than
# JUMP_MAD_FACTOR robust sds of all steps (smooth drift and estimate noise).
JUMP_MIN_PX = 0.5
JUMP_MAD_FACTOR = 8.0
# Frames whose texture matches the reference below this normalised correlation
# do not carry enough static texture to be registered (plain noise and moving
# bands score ~0-0.2, a textured field ~0.6-0.95; measured on synthetic recordings).
MIN_MATCH = 0.3
# ... and the temporal median of the high-passed frames (as recorded) must keep
# this fraction of their power: static texture keeps much of it even under a few
# px of drift (0.24-0.99 on synthetic recordings of texture contrast 0.03-0.3,
# drift up to 4.4 px), moving bands wash out of the median (0.02 for a plane wave)
MIN_STATIC = 0.1
# ... and a stage moves smoothly: the median frame-to-frame step of the estimate
# stays below this (recorded px).  An estimate locked onto moving bands steps by
# the front's advance per frame (3.3 px for 100 um/min, 20 s, 10 um pixels).
MAX_MEDIAN_STEP_PX = 0.3
# A stage moves the field as one piece: a quadrant's shift may differ from the
# whole frame's by this much (estimation px) or this fraction of the shift.
RIGID_TOLERANCE_PX = 1.0
RIGID_FRACTION = 0.25
TEXTURE_SIGMA_PX = 3.0  # high-pass scale on the estimation grid: well above the grain, well below a wavelength
REFERENCE_FRAMES = 31
# Frames matched to the reference: about this many spread over the movie, plus
# every frame between two of them whose step departs from the neighbouring
# steps by more than REFINE_STEP_PX (recorded px; half the smallest jump looked for).  A stage drifts by a few px over hours; between samples
# a few minutes apart linear interpolation is exact to well below 0.05 px.
SAMPLED_FRAMES = 120
REFINE_STEP_PX = 0.5 * JUMP_MIN_PX
ESTIMATE_MAX_SIDE_PX = 256


@dataclass(frozen=True)
class DriftEstimate:
    shifts_px: np.ndarray  # (t, 2) [dy, dx] recorded px, relative to frame 0
    match: np.ndarray  # (t,) normalised correlation of each frame with the reference
    reliable: bool
    static_fraction: float  # power of the frames' temporal median / their mean power (high-passed, as recorded)
    jumps: tuple[tuple[int, float], ...]  # (first frame after the jump, size in recorded px)
    estimate_bin: int

    @property
    def max_shift_px(self) -> float:
        return float(np.abs(self.shifts_px).max()) if self.shifts_px.size else 0.0


def _texture(frame: np.ndarray) -> np.ndarray:
    img = np.asarray(frame, dtype=np.float32)
    return img - ndi.gaussian_filter(img, TEXTURE_SIGMA_PX, truncate=3.0)


# recorded types whose values float32 holds exactly: binned as read (the kernel sums in float64)
_EXACT_IN_FLOAT32 = (np.uint8, np.int8, np.uint16, np.int16, np.float32)


def _frames(data, idx, eb: int) -> np.ndarray:
    raw = data[np.asarray(idx)]
    if eb > 1 and raw.dtype in _EXACT_IN_FLOAT32:
        raw = np.asarray(raw)
        raw.flags.writeable = False  # the binning pass's compiled variant (memory-mapped frames)
        return preprocess.bin_frames(raw, eb)
    raw = np.asarray(raw, dtype=np.float32)
    return preprocess.bin_frames(raw, eb) if eb > 1 else raw


def _median_frames(frames: np.ndarray) -> np.ndarray:
    """np.median(frames, axis=0) of a (t, y, x) stack, computed with each
    pixel's values side by side in memory (the same values, several times faster)."""
    n = frames.shape[0]
    by_pixel = np.ascontiguousarray(frames.reshape(n, -1).T)
    return np.median(by_pixel, axis=1, overwrite_input=True).reshape(frames.shape[1:])


def _vertex(cm: float, c0: float, cp: float) -> float:
    """Sub-sample offset of a peak from three samples: Gaussian (log-parabola)
    fit where all three are positive, else a parabola."""
    if cm > 0 and c0 > 0 and cp > 0:
        lm, l0, lp = np.log(cm), np.log(c0), np.log(cp)
        den = lm - 2.0 * l0 + lp
        if den < 0:
            return float(np.clip(0.5 * (lm - lp) / den, -0.5, 0.5))
    den = cm - 2.0 * c0 + cp
    return float(np.clip(0.5 * (cm - cp) / den, -0.5, 0.5)) if den < 0 else 0.0


class _Matcher:
    """Cross-correlation with a fixed reference.  A frame's high-pass is done
    in the Fourier domain on the windowed frame (the transfer function of
    `_texture`'s Gaussian high-pass), so a frame costs one forward and one
    inverse real FFT."""

    def __init__(self, reference_tex: np.ndarray, max_shift: int):
        ny, nx = reference_tex.shape
        self.win = np.outer(np.hanning(ny), np.hanning(nx)).astype(np.float32)
        ref = reference_tex * self.win
        self.ref_norm = float(np.sqrt(np.sum(ref.astype(np.float64) ** 2)))
        self.ref_conj = np.conj(sfft.rfft2(ref))
        fy = np.fft.fftfreq(ny)[:, None]
        fx = np.fft.rfftfreq(nx)[None, :]
        self.highpass = (1.0 - np.exp(-2.0 * (np.pi * TEXTURE_SIGMA_PX) ** 2 * (fy**2 + fx**2))).astype(np.float32)
        # rfft2 holds the columns 1 .. (nx - 1) // 2 once for two (Parseval)
        self.weight = np.full(self.highpass.shape[1], 2.0)
        self.weight[0] = 1.0
        if nx % 2 == 0:
            self.weight[-1] = 1.0
        self.shape = (ny, nx)
        self.max_shift = max_shift
        m = max_shift
        self.rows = np.arange(-m, m + 1) % ny
        self.cols = np.arange(-m, m + 1) % nx

    def __call__(self, frame: np.ndarray, *, highpass: bool = True) -> tuple[np.ndarray, float]:
        ny, nx = self.shape
        spec = sfft.rfft2(frame * self.win)
        if highpass:
            spec *= self.highpass
        cc = sfft.irfft2(self.ref_conj * spec, s=self.shape)
        m = self.max_shift
        sub = cc[np.ix_(self.rows, self.cols)]  # only shifts within +-max_shift
        i, j = np.unravel_index(int(np.argmax(sub)), sub.shape)
        i0, j0 = int(self.rows[i]), int(self.cols[j])
        c0 = cc[i0, j0]
        dy = _vertex(cc[(i0 - 1) % ny, j0], c0, cc[(i0 + 1) % ny, j0])
        dx = _vertex(cc[i0, (j0 - 1) % nx], c0, cc[i0, (j0 + 1) % nx])
        f_norm = float(np.sqrt(np.sum((np.abs(spec) ** 2).astype(np.float64) * self.weight) / (ny * nx)))
        norm = self.ref_norm * f_norm
        match = float(c0 / norm) if norm > 0 else 0.0
        return np.array([i - m + dy, j - m + dx]), match


def _sample_stride(nt: int) -> int:
    """Frames between drift estimates: about SAMPLED_FRAMES estimates over the
    movie (a stage drifts slowly; jumps are found and filled in afterwards)."""
    return max(1, int(round(nt / SAMPLED_FRAMES)))


def estimate_coarse_drift(data, *, block: int = 32, stride: int | None = None) -> DriftEstimate:
    """Drift of every frame of a (t, y, x) recording.

    Every `stride`-th frame (default `_sample_stride`) is matched to the
    reference, read in frame blocks; where two neighbouring estimates differ
    by more than a smooth drift does (`_uneven_steps`), every frame between them is matched too, so that a jump
    is found at its frame; the other frames take linear interpolation of
    their neighbours' shifts and match scores."""
    nt, ny, nx = (int(v) for v in data.shape)
    eb = max(1, min(ny, nx) // ESTIMATE_MAX_SIDE_PX)
    idx = np.unique(np.linspace(0, nt - 1, min(nt, REFERENCE_FRAMES)).round().astype(int))
    sample = np.stack([_texture(f) for f in _frames(data, idx, eb)])
    if not np.isfinite(sample).all():
        return DriftEstimate(np.zeros((nt, 2)), np.zeros(nt), False, 0.0, (), eb)
    max_shift = max(2, min(sample.shape[1:]) // 4)
    # the sample frames are put on the first one's position before the median,
    # so a large drift does not blur the reference
    first = _Matcher(sample[0], max_shift)
    back = np.stack([ndi.shift(s, -first(s, highpass=False)[0], order=1, mode="nearest") for s in sample])
    power = float(np.mean(np.sum(sample.astype(np.float64) ** 2, axis=(1, 2))))
    static = float(np.sum(_median_frames(sample).astype(np.float64) ** 2)) / power if power > 0 else 0.0
    reference = _median_frames(back)
    match = _Matcher(reference, max_shift)
    shifts = np.full((nt, 2), np.nan)
    score = np.full(nt, np.nan)

    def measure(frames_idx) -> bool:
        frames_idx = np.asarray(frames_idx, dtype=np.int64)
        for k0 in range(0, len(frames_idx), block):
            chunk = frames_idx[k0 : k0 + block]
            frames = _frames(data, chunk, eb)
            if not np.isfinite(frames).all():
                return False
            for i, f in zip(chunk, frames, strict=True):
                shifts[i], score[i] = match(f)
        return True

    step_n = _sample_stride(nt) if stride is None else max(1, int(stride))
    sampled = np.unique(np.r_[np.arange(0, nt, step_n), nt - 1])
    if not measure(sampled):
        return DriftEstimate(np.zeros((nt, 2)), np.zeros(nt), False, static, (), eb)
    if len(sampled) < nt:
        rough = _uneven_steps(np.diff(shifts[sampled], axis=0) * eb)
        inner = [np.arange(sampled[i] + 1, sampled[i + 1]) for i in rough]
        if inner and not measure(np.concatenate(inner)):
            return DriftEstimate(np.zeros((nt, 2)), np.zeros(nt), False, static, (), eb)
        done = np.flatnonzero(np.isfinite(score))
        t = np.arange(nt, dtype=np.float64)
        shifts = np.stack([np.interp(t, done, shifts[done, k]) for k in range(2)], axis=1)
        score = np.interp(t, done, score[done])
    rigid = _rigid(data, reference, idx[[len(idx) // 2, -1]], eb, match)
    shifts = (shifts - shifts[0]) * eb
    step = float(np.median(np.hypot(*np.diff(shifts, axis=0).T))) if nt > 1 else 0.0
    reliable = bool(np.median(score) >= MIN_MATCH and static >= MIN_STATIC and step <= MAX_MEDIAN_STEP_PX
                    and rigid)
    return DriftEstimate(shifts, score, reliable, static, _jumps(shifts) if reliable else (), eb)


def _uneven_steps(steps: np.ndarray) -> np.ndarray:
    """Indices of the steps ((n, 2) recorded px between neighbouring sampled
    frames) that differ from the median of the two steps on each side by more
    than REFINE_STEP_PX: a smooth drift changes its steps slowly, a jump puts
    all of itself into one."""
    out = []
    for i in range(len(steps)):
        near = np.concatenate([steps[max(0, i - 2) : i], steps[i + 1 : i + 3]])
        ref = np.median(near, axis=0) if len(near) else np.zeros(2)
        if float(np.hypot(*(steps[i] - ref))) > REFINE_STEP_PX:
            out.append(i)
    return np.asarray(out, dtype=np.int64)


def _rigid(data, reference: np.ndarray, frames, eb: int, whole: _Matcher) -> bool:
    """Whether the field moves as one piece: each quadrant of `frames` shifts
    as the whole frame does, within max(RIGID_TOLERANCE_PX, RIGID_FRACTION of
    the shift) on the estimation grid.  A stage moves the whole field; cells
    streaming toward a centre move its quadrants different ways, and the
    whole-frame match then follows the texture's net flow (measured: 25 px of
    "drift" from cells streaming at 5 um/min toward a centre in the field)."""
    ny, nx = reference.shape
    if min(ny, nx) < 32:
        return True
    halves = [(slice(0, ny // 2), slice(0, nx // 2)), (slice(0, ny // 2), slice(nx // 2, nx)),
              (slice(ny // 2, ny), slice(0, nx // 2)), (slice(ny // 2, ny), slice(nx // 2, nx))]
    quads = [_Matcher(reference[q], max(2, min(ny, nx) // 8)) for q in halves]
    for f in _frames(data, np.asarray(frames), eb):
        g, _ = whole(f)
        for q, m in zip(halves, quads, strict=True):
            d = float(np.hypot(*(m(f[q])[0] - g)))
            if d > max(RIGID_TOLERANCE_PX, RIGID_FRACTION * float(np.hypot(*g))):
                return False
    return True


def _jumps(shifts: np.ndarray) -> tuple[tuple[int, float], ...]:
    if len(shifts) < 3:
        return ()
    step = np.hypot(*np.diff(shifts, axis=0).T)
    mad = float(np.median(np.abs(step - np.median(step)))) * 1.4826
    thr = max(JUMP_MIN_PX, float(np.median(step)) + JUMP_MAD_FACTOR * mad)
    return tuple((int(i + 1), float(step[i])) for i in np.flatnonzero(step > thr))


def register_mode(register) -> str:
    """AnalysisOptions.register as 'auto', 'on' or 'off' (None/True/False too)."""
    if register is None or register == "auto":
        return "auto"
    if register is True or register == "on":
        return "on"
    if register is False or register == "off":
        return "off"
    raise ValueError(register)


def decide(est: DriftEstimate, *, factor: int, mode: str) -> tuple[bool, str]:
    """Whether to correct the drift on the analysis grid of bin `factor`, and why."""
    limit = DRIFT_CORRECT_FRACTION * factor
    size = f"largest shift {est.max_shift_px:.2f} px of the recording"
    if mode == "off":
        return False, f"not corrected: switched off (--no-register); {size}"
    if mode == "on":
        return True, f"corrected: switched on (--register); {size}"
    if not est.reliable:
        return False, ("not corrected: too little static texture to measure drift, or a field that does not move as one piece "
                       f"(median match {float(np.median(est.match)):.2f}, minimum {MIN_MATCH}; static "
                       f"fraction {est.static_fraction:.2f}, minimum {MIN_STATIC}; or the estimate moved "
                       f"like the waves, more than {MAX_MEDIAN_STEP_PX} px per frame)")
    if est.max_shift_px > limit:
        return True, f"corrected: {size} exceeds {DRIFT_CORRECT_FRACTION:g} of an analysis-grid pixel"
    return False, f"not corrected: {size} is within {DRIFT_CORRECT_FRACTION:g} of an analysis-grid pixel"


def correction_shifts(est: DriftEstimate, *, factor: int) -> np.ndarray:
    """The shifts on the analysis grid (bin `factor`) for preprocess.apply_drift."""
    return est.shifts_px / float(factor)


def covered_map(shifts_b: np.ndarray | None, shape_b: tuple[int, int], *, margin_px: int = 0) -> np.ndarray:
    """(y, x) bool on the analysis grid: pixels that hold data in every frame
    once `apply_drift(frames, shifts_b)` has put the frames back (linear
    interpolation reads rows floor(r + dy) and floor(r + dy) + 1), less
    `margin_px` more on each side that lost a strip: the spatial smoothing and
    the phase stencils reach that far into the strip's edge-replicated values."""
    ny, nx = shape_b
    cov = np.ones((ny, nx), dtype=bool)
    if shifts_b is None or not len(shifts_b):
        return cov

    def lost(v: float) -> int:
        return int(np.ceil(v - 1e-6)) + margin_px if v > 1e-6 else 0

    dy, dx = shifts_b[:, 0], shifts_b[:, 1]
    r0, r1 = lost(-dy.min()), ny - lost(dy.max())
    c0, c1 = lost(-dx.min()), nx - lost(dx.max())
    cov[:] = False
    cov[r0 : max(r1, r0), c0 : max(c1, c0)] = True
    return cov


def drift_summary(est: DriftEstimate, *, corrected: bool, reason: str, covered: np.ndarray) -> dict:
    """summary['drift']."""
    return {
        "estimated": bool(est.reliable),
        "max_shift_px": est.max_shift_px if est.reliable else None,
        "jumps": [{"frame": f, "shift_px": s} for f, s in est.jumps],
        "corrected": bool(corrected),
        "reason": reason,
        "uncovered_fraction": float(1.0 - covered.mean()),
        "estimate_bin": est.estimate_bin,
        "match_median": float(np.median(est.match)) if est.match.size else None,
        "static_texture_fraction": est.static_fraction,
        "method": "cross-correlation of high-passed frames with a temporal-median reference",
    }


def drift_table(est: DriftEstimate, *, frame_interval_min: float, corrected: bool) -> dict:
    """tables['drift']: per-frame drift in recorded pixels (NaN when it could
    not be measured and was not applied)."""
    nt = len(est.shifts_px)
    shifts = est.shifts_px if (est.reliable or corrected) else np.full((nt, 2), np.nan)
    return {
        "frame": np.arange(nt, dtype=np.int64),
        "t_min": np.arange(nt, dtype=np.float64) * frame_interval_min,
        "dy_px": shifts[:, 0].astype(np.float64),
        "dx_px": shifts[:, 1].astype(np.float64),
    }


def drift_notes(est: DriftEstimate, *, corrected: bool, mode: str, factor: int) -> tuple[list[str], list[str]]:
    """(warnings, notes) in plain words."""
    warnings, notes = [], []
    big = est.reliable and est.max_shift_px > DRIFT_CORRECT_FRACTION * factor
    jumps = "" if not est.jumps else (
        "; sudden jumps at frame " + ", ".join(f"{f} ({s:.1f} px)" for f, s in est.jumps))
    if corrected:
        notes.append(f"the stage drifted by up to {est.max_shift_px:.1f} px{jumps}; frames were shifted "
                     "back and the border strip the shift left without data is not measured")
        if not est.reliable:
            warnings.append("drift correction was forced, but the field has too little static texture "
                            "to measure the drift; the correction may be wrong")
    elif big and mode == "off":
        warnings.append(f"the stage drifted by up to {est.max_shift_px:.1f} px{jumps} and drift correction "
                        "is switched off: positions, speeds and cores may be wrong")
    return warnings, notes


def look_lag_frames(period_band_min: tuple[float, float], frame_interval_min: float, n_frames: int) -> int:
    """Lag of the first look's difference frames: a quarter of the period band's
    geometric centre (a difference over a quarter period keeps ~1.4x the wave
    amplitude; from half to twice that period it keeps more than 0.7x)."""
    guess = float(np.sqrt(period_band_min[0] * period_band_min[1]))
    lag = int(round(0.25 * guess / frame_interval_min))
    return int(min(max(lag, 1), max(1, n_frames // 4)))


@dataclass(frozen=True)
class DriftPlan:
    estimate: DriftEstimate
    mode: str
    look_shifts_px: np.ndarray | None  # for the first look (recorded px), None: frames as recorded


def plan(data, register) -> DriftPlan:
    """Estimate the drift (every run) and what the first look does with it."""
    mode = register_mode(register)
    est = estimate_coarse_drift(data)
    use = mode == "on" or (mode == "auto" and est.reliable and est.max_shift_px > DRIFT_CORRECT_FRACTION)
    return DriftPlan(est, mode, est.shifts_px if use else None)


@dataclass(frozen=True)
class DriftOnGrid:
    shifts_b: np.ndarray | None  # analysis-grid shifts for apply_drift; None: not corrected
    covered: np.ndarray  # (y, x) bool on the analysis grid
    summary: dict
    table: dict
    warnings: list
    notes: list


def on_grid(p: DriftPlan, *, factor: int, shape_b: tuple[int, int], frame_interval_min: float,
            sigma_px: float) -> DriftOnGrid:
    """The decision on the analysis grid of bin `factor` (smoothing `sigma_px`
    analysis-grid px), its covered map and reports."""
    corrected, reason = decide(p.estimate, factor=factor, mode=p.mode)
    shifts_b = correction_shifts(p.estimate, factor=factor) if corrected else None
    # smoothing length plus the 2 x 2 charge loop / one-pixel gradient stencil
    covered = covered_map(shifts_b, shape_b, margin_px=int(np.ceil(sigma_px)) + 1)
    warnings, notes = drift_notes(p.estimate, corrected=corrected, mode=p.mode, factor=factor)
    return DriftOnGrid(
        shifts_b, covered, drift_summary(p.estimate, corrected=corrected, reason=reason, covered=covered),
        drift_table(p.estimate, frame_interval_min=frame_interval_min, corrected=corrected), warnings, notes,
    )
