"""Is a spectral peak a wave?  A test against red noise fitted to the same series.

A time course without waves is rarely white: slowly changing cell texture,
a lamp drifting, cells streaming make it *red*, its power rising toward low
frequencies, and the highest bin of a red spectrum in a period band sits in
the band's slowest bins, far above the band's median.  The null model here is
the one of Torrence & Compo (1998, Bull. Am. Meteor. Soc. 79:61-78, sec. 4):
a first-order autoregressive process (AR(1), "red noise") whose lag-1
coefficient comes from the series itself, alpha = (alpha_1 + sqrt(alpha_2)) / 2
from the lag-1 and lag-2 autocorrelations (their sec. 4a).  Their eq. 16 gives
the AR(1) spectrum; here its *windowed* expectation is computed exactly,

    E[I_k] = var(x) * sum_h alpha^|h| c_w(h) cos(2 pi k h / N),

c_w the autocorrelation of the taper, so that the Hann window's leakage of a
steep red spectrum into the low bins is in the background, not in the peak.
Against that background a periodogram bin is distributed as chi^2_2 / 2
(their eq. 17, two degrees of freedom): P(ratio > c) = exp(-c).  The dominant
peak is the maximum over the band's bins, so the level is held for that
maximum (Sidak over the band's bins, common practice): c = -ln(1 - level^(1/K)).

A second, non-parametric check guards against backgrounds that are not AR(1)
(a red continuum high-passed by cleaning has a broad hump): the peak must also
stand above the running median of the pixel's own spectrum across
[f / LOCAL_SPAN, f * LOCAL_SPAN] without the bin's own main lobe (waves make
a peak a few bins wide; a hump is as wide as the span); where a short series
leaves fewer than MIN_LOCAL_BINS bins there, only the AR(1) test speaks.  Both
thresholds are taken at the same level.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft
import scipy.ndimage

DEFAULT_LEVEL = 0.95  # per pixel, for the band's maximum
LOCAL_SPAN = 1.69  # the running median's reach, a ratio of frequencies (1.3^2)
MAX_ALPHA = 0.999
OWN_LOBE = 2  # bins either side that a Hann-windowed peak's main lobe covers (common practice, no source)
MIN_LOCAL_BINS = 4  # fewer bins beside the peak: the running median has no say


@dataclass(frozen=True)
class PeakTest:
    """Per-series outcome (arrays over the series' trailing axes)."""

    significant: np.ndarray  # bool: the band's peak beats both backgrounds at `level`
    ratio: np.ndarray  # power / AR(1) background at the band's best bin (the one that beats both best)
    local_ratio: np.ndarray  # power / running median at that bin
    frequency: np.ndarray  # cycles per frame of that bin (NaN where no power)
    alpha: np.ndarray  # fitted AR(1) coefficient
    threshold: float  # the AR(1) ratio a bin needs (chi^2_2/2 at the Sidak level)
    local_threshold: float  # the running-median ratio a bin needs
    n_bins: int  # bins in the band (the family the level holds for)
    level: float


def band_threshold(n_bins: int, level: float = DEFAULT_LEVEL) -> float:
    """Power over its expectation that the largest of `n_bins` independent
    chi^2_2/2 bins exceeds with probability 1 - level."""
    n = max(int(n_bins), 1)
    return float(-np.log1p(-(level ** (1.0 / n))))


def ar1_alpha(x: np.ndarray) -> np.ndarray:
    """Lag-1 coefficient of an AR(1) fitted to each column of x (time on axis
    0, mean removed here): (alpha_1 + sqrt(alpha_2)) / 2 (Torrence & Compo
    1998, sec. 4a), clipped to [0, MAX_ALPHA]."""
    x = np.asarray(x, dtype=np.float64)
    x = x - x.mean(axis=0)
    c0 = np.einsum("t...,t...->...", x, x)
    c1 = np.einsum("t...,t...->...", x[:-1], x[1:])
    c2 = np.einsum("t...,t...->...", x[:-2], x[2:])
    with np.errstate(invalid="ignore", divide="ignore"):
        a1 = c1 / c0
        a2 = np.clip(c2 / c0, 0.0, None)
    a = 0.5 * (np.clip(a1, 0.0, None) + np.sqrt(a2))
    return np.clip(np.nan_to_num(a, nan=0.0), 0.0, MAX_ALPHA)


def ar1_expected_power(alpha: np.ndarray, variance: np.ndarray, window: np.ndarray) -> np.ndarray:
    """(bins, ...) expected |rfft(window * x)|^2 of AR(1) series of the given
    lag-1 coefficients and variances: var * sum_h alpha^|h| c_w(h) e^{-i w h}."""
    w = np.asarray(window, dtype=np.float64)
    n = w.size
    cw = np.correlate(w, w, mode="full")[n - 1 :]  # c_w(h), h = 0..n-1
    a = np.asarray(alpha, dtype=np.float64)
    h = np.arange(n, dtype=np.float64).reshape((n,) + (1,) * a.ndim)
    g = np.power(a[None, ...], h) * cw.reshape(h.shape)  # alpha^0 = 1, also for alpha = 0
    spec = 2.0 * scipy.fft.rfft(g, axis=0).real - g[0]
    return np.maximum(spec, 1e-300) * np.asarray(variance, dtype=np.float64)[None, ...]


def running_median(power: np.ndarray, freqs: np.ndarray, at: np.ndarray, *, span: float = LOCAL_SPAN,
                   anchors: int = 16) -> np.ndarray:
    """(len(at), ...) the median of `power` (bins on axis 0) over the bins within
    [f / span, f * span] of each bin index in `at`; taken at up to `anchors`
    log-spaced bins among them and interpolated in log power between (the
    median moves slowly across a span this wide)."""
    at = np.asarray(at)
    if at.size == 0:
        return np.empty((0,) + power.shape[1:])
    pick = np.unique(np.rint(np.geomspace(max(at[0], 1), at[-1], min(anchors, at.size))).astype(int))
    pick = pick[np.isin(pick, at)] if np.isin(pick, at).any() else at[:1]
    med = np.empty((pick.size,) + power.shape[1:], dtype=np.float64)
    for i, k in enumerate(pick):
        f = freqs[k]
        sel = (freqs >= f / span) & (freqs <= f * span) & (freqs > 0)
        sel[max(k - OWN_LOBE, 0) : k + OWN_LOBE + 1] = False  # not the bin's own main lobe
        if sel.sum() < MIN_LOCAL_BINS:  # too short a series to tell a peak from a hump: no say
            med[i] = 0.0
            continue
        med[i] = np.median(power[sel], axis=0)
    if pick.size == 1:
        return np.broadcast_to(med[0], (at.size,) + power.shape[1:]).copy()
    logm = np.log(np.maximum(med, 1e-300))  # no say (0) stays ~0 between anchors too
    lf, lp = np.log(freqs[at]), np.log(freqs[pick])
    j = np.clip(np.searchsorted(lp, lf) - 1, 0, pick.size - 2)
    w = ((lf - lp[j]) / (lp[j + 1] - lp[j])).clip(0.0, 1.0).reshape((-1,) + (1,) * (power.ndim - 1))
    return np.exp((1.0 - w) * logm[j] + w * logm[j + 1])


def peak_test(x: np.ndarray, band: tuple[float, float], *, level: float = DEFAULT_LEVEL,
              detrend_degree: int | None = None) -> PeakTest:
    """Test each column of `x` (time on axis 0; any trailing shape) for a
    spectral peak in `band` (cycles per frame) that red noise fitted to the
    same column would not give.  Columns without variance are not significant.
    `detrend_degree`: each column's least-squares polynomial in time removed
    first (as the measurement does, waves.phase.analytic)."""
    x = np.asarray(x, dtype=np.float64)
    nt = x.shape[0]
    if detrend_degree is not None:  # the measurement's own detrend
        from waves.phase.analytic import _detrend_poly

        x = _detrend_poly(x.copy(), int(detrend_degree))
    x = x - x.mean(axis=0)
    win = np.hanning(nt)
    spec = np.abs(scipy.fft.rfft(x * win.reshape((nt,) + (1,) * (x.ndim - 1)), axis=0)) ** 2
    freqs = np.fft.rfftfreq(nt)
    inband = (freqs >= band[0]) & (freqs <= band[1]) & (freqs > 0) & (freqs < 0.5)
    n_bins = int(inband.sum())
    thr = band_threshold(n_bins, level)
    # the running median of Exp(1) bins is ln 2: the same tail level on that scale
    thr_local = thr / np.log(2.0)
    alpha = ar1_alpha(x)
    var = x.var(axis=0)
    shape = x.shape[1:]
    if n_bins == 0:
        nan = np.full(shape, np.nan)
        return PeakTest(np.zeros(shape, bool), nan, nan, nan, alpha, thr, thr_local, 0, level)
    expected = ar1_expected_power(alpha, var, win)
    idx = np.flatnonzero(inband)
    with np.errstate(all="ignore"):
        ratio = spec[idx] / expected[idx]
        med = running_median(spec, freqs, idx)
        local = np.where(med > 0, spec[idx] / np.where(med > 0, med, 1.0), np.inf)  # 0: no say
    # the bin that beats both backgrounds by the widest margin (the weaker of its two margins)
    margin = np.minimum(ratio / thr, local / thr_local)
    margin = np.where(np.isfinite(margin), margin, -np.inf)
    best = np.argmax(margin, axis=0)
    take = np.expand_dims(best, 0)
    r = np.take_along_axis(ratio, take, 0)[0]
    lr = np.take_along_axis(local, take, 0)[0]
    sig = (np.take_along_axis(margin, take, 0)[0] > 1.0) & (var > 0)
    f = np.where(var > 0, freqs[idx][best], np.nan)
    return PeakTest(sig, r, lr, f, alpha, thr, thr_local, n_bins, level)


def significant_fraction(sig: np.ndarray, where: np.ndarray | None = None) -> float:
    """Share of `sig` (bool map) inside `where` (bool map, or everywhere)."""
    sig = np.asarray(sig, dtype=bool)
    if where is None:
        return float(sig.mean()) if sig.size else 0.0
    where = np.asarray(where, dtype=bool)
    return float(sig[where].mean()) if where.any() else 0.0


def fill_holes_smaller_than(sig: np.ndarray, max_px: int) -> np.ndarray:
    """`sig` with enclosed non-significant holes of at most `max_px` pixels filled
    (a spiral core's low-amplitude centre sits inside its significant wave)."""
    holes = ~sig
    lab, n = scipy.ndimage.label(holes)
    if n == 0:
        return sig.copy()
    sizes = np.bincount(lab.ravel())
    edge = np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))
    small = sizes <= max_px
    small[0] = False
    small[edge] = False
    return sig | small[lab]
