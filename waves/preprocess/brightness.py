"""Global brightness per frame: lamp fade and flicker, estimated and removed.

Model: every frame is the reference image (the temporal mean) times a global
gain plus a global offset, plus the waves and noise,

    frame_t(x) = gain_t * reference(x) + offset_t + wave + noise.

`frame_brightness` fits gain_t and offset_t per frame by a Huber-weighted
linear regression of the frame on the reference over sampled pixels of the
cell field (iteratively reweighted least squares, scale from the MAD), so
that wave bands and bright specks, which are a minority of the pixels and
sit on either side of the line, barely pull the fit.

Only the *slow* part of the gain and offset is divided out of ordinary
frames (`brightness_correction`): the frame mean of a field with few wave
bands rises and falls with the waves themselves, and removing that in-band
part would subtract a field-wide copy of the wave from every pixel.  The
slow part is a Gaussian-weighted local linear fit in time whose width puts
its cut-off below the longest period of the band.  Flicker frames (single
whole-frame jumps) are the frames whose gain departs from that trend by
many robust standard deviations; they are flagged, and the pipeline
replaces them by linear interpolation in time of their neighbours
(`interpolate_frames`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from waves.errors import InputError
from waves.preprocess._checks import _as_real_array, _positive

__all__ = [
    "FLICKER_Z",
    "FLICKER_MIN_JUMP",
    "Brightness",
    "frame_brightness",
    "brightness_correction",
    "estimate_brightness",
    "remove_brightness",
    "interpolate_frames",
    "sample_pixels",
]

# A frame is a flicker frame when its gain departs from what its neighbours
# predict by more
# than FLICKER_Z robust standard deviations (1.4826 MAD of the residuals).  On
# noisy 8-bit synthetic movies with texture (target and spiral, 3 seeds) the
# residual's robust sd is 0.2-0.5 % of the gain (the waves' own field-wide
# brightness change, noise and 8-bit rounding) and no steady frame exceeded
# |z| = 3.6; a +-8 % flicker stood 26-47 sd out.  On a simulated relay field
# whose whole-frame brightness swings +-30 % with its waves no frame is flagged.  A Gaussian residual passes
# 8 sd with probability ~1e-15 per frame: no false flag in any movie.
FLICKER_Z = 8.0
# ... and by more than this fraction of the gain: smaller whole-frame jumps
# are below the waves' own modulation of the scattering (3-5 %) by a factor of
# several and are left in (a very clean movie has a tiny MAD; without this
# floor a 0.3 % wobble would be called flicker).
FLICKER_MIN_JUMP = 0.01
FLICKER_MAX_RUN = 3  # consecutive flagged frames from which a run is the waves, not the lamp
FLICKER_MAX_SHARE = 0.1  # ... and the share of flagged frames above which none is flicker


def _brief_only(flags: np.ndarray) -> np.ndarray:
    """`flags` without the runs of FLICKER_MAX_RUN or more consecutive True."""
    out = flags.copy()
    idx = np.flatnonzero(np.diff(np.r_[0, flags.astype(np.int8), 0]))
    for a, b in zip(idx[::2], idx[1::2], strict=True):
        if b - a >= FLICKER_MAX_RUN:
            out[a:b] = False
    return out
# The slow trend divided out: a quadratic in time of log(gain) over the whole
# movie (a lamp fades smoothly over hours: linear and exponential laws are
# followed within 0.2 %), so the field's own slow brightness changes (waves
# spreading over a field at rest) are not taken for the lamp.  Measured on a
# simulated relay field that starts at rest: a Gaussian local trend of 0.4 x
# the band's longest period followed the waves' arrival and moved a
# pacemaker's period by -0.075 %.  Movies shorter than TREND_MIN_PERIODS of
# the band's longest period use that local trend.
TREND_DEGREE = 2
TREND_MIN_PERIODS = 1.0
# A frame with less than this fraction of the median gain is blank (flagged as flicker).
BLANK_GAIN = 0.05
# Regression pixels: at most this many, spread evenly over the cell field.
MAX_SAMPLE_PIXELS = 4096
_HUBER_K = 1.345  # Huber's constant: 95 % efficiency for Gaussian residuals (Huber 1981)


@dataclass(frozen=True)
class Brightness:
    """Per-frame global brightness of a movie.

    gain_raw, offset_raw   the per-frame fit (gain mean 1 over the non-flicker
                           frames, offset in the reference's units).
    gain, offset           what is divided out / subtracted: the slow trend on
                           every frame (flicker frames get their own fit).
    flicker                (t,) bool, True for flicker frames.
    z                      (t,) robust z-score of the gain around its trend.
    method                 a short description for summary.json.
    """

    gain_raw: np.ndarray
    offset_raw: np.ndarray
    gain: np.ndarray
    offset: np.ndarray
    flicker: np.ndarray
    z: np.ndarray
    method: str

    @property
    def flicker_frames(self) -> list[int]:
        return [int(i) for i in np.flatnonzero(self.flicker)]

    @property
    def fade_percent(self) -> float:
        """Change of the slow gain from the first to the last frame, percent
        (negative: the lamp faded)."""
        return float(100.0 * (self.gain[-1] / self.gain[0] - 1.0))

    def summary(self) -> dict:
        return {
            "gain_range": [float(self.gain.min()), float(self.gain.max())],
            "offset_range": [float(self.offset.min()), float(self.offset.max())],
            "fade_percent": self.fade_percent,
            "flicker_frames": self.flicker_frames,
            "method": self.method,
        }


def sample_pixels(mask: np.ndarray, *, max_pixels: int = MAX_SAMPLE_PIXELS) -> np.ndarray:
    """Flat indices of at most `max_pixels` pixels of `mask`, evenly strided."""
    idx = np.flatnonzero(np.asarray(mask, dtype=bool).ravel())
    if idx.size == 0:
        raise InputError("the cell-field mask is empty: no pixel to estimate the frame brightness from")
    step = max(1, int(math.ceil(idx.size / max_pixels)))
    return idx[::step]


def _huber_lines(x: np.ndarray, y: np.ndarray, *, with_offset: bool, iterations: int = 5):
    """Huber M-estimates of y[t] = a[t] x + b[t] (b = 0 without offset) by IRLS,
    all rows t at once; x (n,), y (t, n)."""
    w = np.ones_like(y)
    a = np.ones(y.shape[0])
    b = np.zeros(y.shape[0])
    xr = x[None, :]
    s = None
    for it in range(iterations):
        if with_offset:
            sw, sx, sy = w.sum(1), (w * xr).sum(1), (w * y).sum(1)
            sxx, sxy = (w * xr * xr).sum(1), (w * xr * y).sum(1)
            det = sw * sxx - sx * sx
            ok = det > 0
            safe = np.where(ok, det, 1.0)
            a = np.where(ok, (sw * sxy - sx * sy) / safe, a)
            b = np.where(ok, (sxx * sy - sx * sxy) / safe, b)
        else:
            sxx = (w * xr * xr).sum(1)
            ok = sxx > 0
            a = np.where(ok, (w * xr * y).sum(1) / np.where(ok, sxx, 1.0), a)
        r = y - a[:, None] * xr - b[:, None]
        if it < 2:  # the scale from the first two fits, then held (the medians are most of the cost)
            s = 1.4826 * np.median(np.abs(r - np.median(r, axis=1, keepdims=True)), axis=1)
            s = np.where(s > 0, s, np.inf)  # an exact fit: keep unit weights
        u = np.abs(r) / (_HUBER_K * s[:, None])
        w = np.where(u <= 1.0, 1.0, 1.0 / np.maximum(u, 1e-12))
    return a, b


def frame_brightness(samples, reference_samples, *, with_offset: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Per-frame gain and offset of `samples` (t, n pixel values) against
    `reference_samples` (n,), float64: samples[t] ~ gain[t] * ref + offset[t].

    The offset is fitted only when the reference spreads enough (relative sd
    above 2 %; a uniform field cannot tell a gain from an offset), else it is 0.
    """
    s = _as_real_array(samples, "samples", (2,)).astype(np.float64)
    ref = _as_real_array(reference_samples, "reference samples", (1,)).astype(np.float64)
    if s.shape[1] != ref.size:
        raise InputError(f"samples hold {s.shape[1]} pixels but the reference {ref.size}")
    level = float(np.mean(ref))
    if not level > 0:
        raise InputError("the reference image has no light (mean not positive): no frame gain can be estimated")
    fit_offset = with_offset and float(np.std(ref)) > 0.02 * level
    x = ref / level  # scaled for conditioning; gain is unchanged, offset rescaled below
    gain, off = _huber_lines(x, s / level, with_offset=fit_offset)
    return gain, off * level


def _poly_trend(y: np.ndarray, good: np.ndarray, degree: int) -> np.ndarray:
    """Least-squares polynomial of `degree` in time through the good samples of y."""
    t = np.linspace(-1.0, 1.0, y.size)
    deg = min(degree, max(0, int(good.sum()) - 1))
    coef = np.polynomial.polynomial.polyfit(t[good], y[good], deg)
    return np.polynomial.polynomial.polyval(t, coef)


def _local_linear_1d(y: np.ndarray, weight: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian-weighted local linear regression of y(t) (weights 0 drop a
    sample), evaluated at every t: a smooth trend without the end bias of a
    plain blur, exact for a straight line."""
    n = y.size
    t = np.arange(n, dtype=np.float64)
    est = np.empty(n)
    for a in range(0, n, 256):  # rows in chunks: memory O(256 n), not O(n^2)
        d = t[None, :] - t[a : a + 256, None]
        k = np.exp(-0.5 * (d / sigma) ** 2) * weight[None, :]
        s0, s1, s2 = k.sum(1), (k * d).sum(1), (k * d * d).sum(1)
        t0, t1 = (k * y[None, :]).sum(1), (k * d * y[None, :]).sum(1)
        det = s0 * s2 - s1 * s1
        with np.errstate(invalid="ignore", divide="ignore"):
            est[a : a + 256] = np.where(det > 1e-9 * np.maximum(s0, 1e-300) ** 2, (s2 * t0 - s1 * t1) / det,
                                        t0 / s0)
    return est


def brightness_correction(gain_raw, offset_raw, *, slow_frames: float) -> Brightness:
    """Slow trend and flicker frames of a per-frame gain/offset fit.

    `slow_frames`: the longest period (frames) that must pass untouched; the
    trend is a Gaussian local linear fit of sigma 0.4 x slow_frames, whose
    response at that period is below 5 % (exp(-2 pi^2 0.4^2) = 0.04).
    """
    g = _as_real_array(gain_raw, "gain", (1,)).astype(np.float64)
    o = _as_real_array(offset_raw, "offset", (1,)).astype(np.float64)
    if g.shape != o.shape:
        raise InputError("gain and offset must have one value per frame each")
    med = float(np.median(g))
    if not med > 0:
        raise InputError("most frames have no light (gain not positive): no brightness to correct")
    blank = ~(g > BLANK_GAIN * med)  # dark frames (a shutter that did not open): flicker outright
    sigma = 0.4 * _positive(slow_frames, "slow_frames")
    n = g.size
    logg = np.log(np.maximum(g, BLANK_GAIN * med))
    good = ~blank
    z = np.zeros(n)
    # flicker is a jump of single frames: the residual from what the neighbours
    # predict (the median of the interpolation from t-1 and t+1 and the straight
    # extrapolations from t-2, t-1 and from t+1, t+2); the waves' own field-wide
    # brightness changes are smooth over a period, many frames, and predicted
    # well.  Frames flagged in a pass are replaced by interpolation for the next.
    flicker = blank.copy()
    for _ in range(3):
        y = logg.copy()
        if flicker.any() and (~flicker).any():
            y[flicker] = np.interp(np.flatnonzero(flicker), np.flatnonzero(~flicker), logg[~flicker])
        pad = np.concatenate([[2 * y[0] - y[2], 2 * y[0] - y[1]], y, [2 * y[-1] - y[-2], 2 * y[-1] - y[-3]]]) \
            if n >= 3 else np.concatenate([y[:1], y[:1], y, y[-1:], y[-1:]])
        pred = np.median(np.stack([0.5 * (pad[1:-3] + pad[3:-1]), 2 * pad[1:-3] - pad[:-4],
                                   2 * pad[3:-1] - pad[4:]]), axis=0)
        r = logg - pred
        r0 = r[~flicker] if (~flicker).any() else r
        scale = 1.4826 * float(np.median(np.abs(r0 - np.median(r0))))
        z = r / max(scale, 1e-12)
        new = ((np.abs(z) > FLICKER_Z) & (np.abs(np.expm1(r)) > FLICKER_MIN_JUMP)) | blank
        if new.sum() > n // 2:  # not flicker but a lamp that jumps all the time: leave it to the trend
            new = blank
        if (new == flicker).all():
            break
        flicker = new
    # a lamp flickers for a frame or two; runs of FLICKER_MAX_RUN frames or more, or flags on
    # more than FLICKER_MAX_SHARE of the frames, are the waves' own brightness swings (measured:
    # two coherent targets over a half-empty dish flagged 60 of 160 frames, in runs of 10)
    # (dark "blank" frames too: a gain fit near zero on many frames is the waves' additive bands)
    flicker = _brief_only(flicker)
    if flicker.mean() > FLICKER_MAX_SHARE:
        flicker = np.zeros_like(flicker)
    if (blank & ~flicker).any():
        # frames with no light of their own that are not lone flicker frames: the frame-on-mean
        # model does not hold (dark simulated fields between waves, additive bands): no correction
        one = np.ones_like(g)
        return Brightness(gain_raw=one, offset_raw=np.zeros_like(o), gain=one, offset=np.zeros_like(o),
                          flicker=np.zeros_like(flicker), z=np.zeros_like(g),
                          method="not corrected: frames without light of their own in runs or in numbers "
                                 "(the waves, not the lamp)")
    good = ~flicker
    poly = n / slow_frames >= TREND_MIN_PERIODS
    if poly:  # a long movie: the lamp's trend is a polynomial of the whole movie
        gain_slow = np.exp(_poly_trend(logg, good, TREND_DEGREE))
        offset_slow = _poly_trend(o, good, TREND_DEGREE)
    else:
        gain_slow = np.exp(_local_linear_1d(logg, good.astype(np.float64), sigma))
        offset_slow = _local_linear_1d(o, good.astype(np.float64), sigma)
    level = float(np.mean(gain_slow[good]))
    # a flicker frame is replaced by its neighbours after cleaning; one without light of its own
    # (gain <= 0, e.g. a dark frame of a field at rest) takes the slow trend, not a division by 0
    own = flicker & (g > 0)
    gain = np.where(own, g, gain_slow) / level
    offset = np.where(own, o, offset_slow)
    return Brightness(
        gain_raw=g / level, offset_raw=o, gain=gain, offset=offset, flicker=flicker, z=z,
        method=("per-frame gain and offset: Huber regression of each frame on the temporal mean over the "
                "cell field; slow trend: "
                + ("quadratic in time of log(gain) over the movie" if poly else
                   f"Gaussian local linear fit in time (sigma {sigma:.1f} frames)")
                + f"; flicker: |robust z| > {FLICKER_Z:g} against the neighbours' prediction and jump > "
                f"{100 * FLICKER_MIN_JUMP:g} %"),
    )


def estimate_brightness(frames, *, mask=None, slow_frames: float, reference=None) -> Brightness:
    """Whole-array convenience: `frame_brightness` over `mask` (default: all
    pixels) against `reference` (default: the temporal mean), then
    `brightness_correction`."""
    arr = _as_real_array(frames, "frames", (3,))
    ref = arr.mean(axis=0, dtype=np.float64) if reference is None else np.asarray(reference, dtype=np.float64)
    if ref.shape != arr.shape[1:]:
        raise InputError(f"reference must have the frames' shape {arr.shape[1:]}, got {ref.shape}")
    m = np.ones(ref.shape, dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    idx = sample_pixels(m)
    g, o = frame_brightness(arr.reshape(arr.shape[0], -1)[:, idx], ref.ravel()[idx])
    return brightness_correction(g, o, slow_frames=slow_frames)


def remove_brightness(frames, brightness: Brightness, *, first_frame: int = 0) -> np.ndarray:
    """(frames - offset_t) / gain_t, float32, for frames first_frame ...
    (the frames' own flicker frames are not interpolated here)."""
    arr = _as_real_array(frames, "frames", (3,))
    sl = slice(first_frame, first_frame + arr.shape[0])
    g = brightness.gain[sl].astype(np.float32)[:, None, None]
    o = brightness.offset[sl].astype(np.float32)[:, None, None]
    return ((arr.astype(np.float32) - o) / g).astype(np.float32, copy=False)


def interpolate_frames(read, write, bad) -> list[int]:
    """Replace every frame flagged in `bad` (t,) by linear interpolation in
    time of its nearest good neighbours (the nearest one at the ends);
    `read(i)` returns frame i, `write(i, frame)` stores it.  Returns the
    replaced indices."""
    bad = np.asarray(bad, dtype=bool)
    good = np.flatnonzero(~bad)
    if good.size == 0:
        raise InputError("every frame is flagged as flicker; nothing to interpolate from")
    done = []
    cache: dict[int, np.ndarray] = {}

    def get(i):
        if i not in cache:
            if len(cache) > 4:
                cache.clear()
            cache[i] = np.asarray(read(i), dtype=np.float32)
        return cache[i]

    for i in np.flatnonzero(bad):
        k = int(np.searchsorted(good, i))
        lo = good[k - 1] if k > 0 else None
        hi = good[k] if k < good.size else None
        if lo is None:
            frame = get(int(hi))
        elif hi is None:
            frame = get(int(lo))
        else:
            w = (i - lo) / (hi - lo)
            frame = (1.0 - w) * get(int(lo)) + w * get(int(hi))
        write(int(i), frame.astype(np.float32))
        done.append(int(i))
    return done
