"""Are there waves?  The red-noise test (waves.measure.significance) on every
pixel of the cleaned movie, and the field's verdict.

Each pixel of the analysis grid is tested for a peak in the period band that
red noise fitted to the same time course would not give, at a 95 % level for
the band's highest bin.  The field holds waves when at least
MIN_SIGNIFICANT_FRACTION of the cell field passes: without waves about
(1 - level) of the pixels pass by chance at most, and neighbours pass together
(the smoothing, the texture's grains), so a field needs a clear margin over
that.  Where the field fails, nothing is measured: "no waves detected", with
the evidence.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from waves.analyse.clean import _Movie
from waves.measure.significance import DEFAULT_LEVEL, PeakTest, peak_test, significant_fraction

# Measured on the no-wave kinds of tests/test_detection.py (20 seeds each), the largest
# chance fraction: static texture 0.078, drifting 0.003, flicker and warm-up 0.028, red
# noise 0.018, streaming texture 0.108; wave fields of issue 12's classes pass with 0.82-1.0.
MIN_SIGNIFICANT_FRACTION = 0.2
# larger grids are tested on every n-th pixel in each direction, the map filled from them:
# neighbours within the smoothing length are alike (the grid has ~24 px per wavelength)
MAX_TESTED_PIXELS = 6_000
# periods the movie holds fewer times than this are not tested: the measurement needs them
# (waves.analyse.pipeline: 3.5 periods), and a red continuum high-passed by the cleaning has its
# hump there, where a short spectrum has too few bins to tell a hump from a peak (measured:
# 0.15-0.25 of a streaming-texture field "significant" at 17-19 min in a 53-min movie)
MIN_CYCLES = 3.5


@dataclass(frozen=True)
class Detection:
    significant: np.ndarray  # (y, x) bool on the analysis grid
    peak_ratio: np.ndarray  # (y, x) the band's peak over the red-noise background (NaN outside)
    fraction: float  # share of the cell field that passes
    detected: bool
    threshold: float
    n_bins: int
    level: float
    longest_tested_frames: float  # the longest period tested (frames); the band may reach further
    band_frames: tuple[float, float]  # the band asked, periods in frames

    def block(self) -> dict:
        """summary.json's "detection" entry."""
        inside = np.isfinite(self.peak_ratio)
        sig = self.significant & inside
        return {
            "waves_detected": bool(self.detected),
            "test": "band peak against AR(1) red noise fitted to each pixel's time course "
                    "(Torrence & Compo 1998) and against the pixel's own running-median spectrum",
            "level": self.level,
            "bins_in_band": self.n_bins,
            "peak_to_background_needed": self.threshold,
            "significant_fraction": self.fraction,
            "min_significant_fraction": MIN_SIGNIFICANT_FRACTION,
            "median_peak_to_background": _median(self.peak_ratio[inside]),
            "median_peak_to_background_significant": _median(self.peak_ratio[sig]),
            "longest_period_tested_frames": self.longest_tested_frames,
        }

    def statement(self, frame_interval_min: float) -> str:
        """The terminal's and summary.json's plain statement when no waves were detected."""
        cut = ""
        if self.longest_tested_frames < self.band_frames[1] * 0.999:
            cut = (f"; periods over {self.longest_tested_frames * frame_interval_min:.3g} min were not tested: "
                   "the movie holds "
                   f"fewer than {MIN_CYCLES:g} of them")
        return (f"no waves detected: {100 * self.fraction:.0f} % of the cell field shows a periodic signal "
                f"above red noise at the {100 * self.level:.0f} % level (at least "
                f"{100 * MIN_SIGNIFICANT_FRACTION:.0f} % needed){cut}; period, speed, wavelength, cores and "
                "centres are not reported")


def _median(v: np.ndarray) -> float | None:
    v = v[np.isfinite(v)]
    return float(np.median(v)) if v.size else None


def significance_map(movie: _Movie, band: tuple[float, float], *, level: float = DEFAULT_LEVEL,
                     rows_per_chunk: int = 16, detrend_degree: int | None = None) -> tuple[np.ndarray, np.ndarray, PeakTest | None]:
    """(significant, peak_ratio, last chunk's test) maps over the movie's grid."""
    nt, ny, nx = movie.shape
    stride = max(1, int(np.ceil(np.sqrt(ny * nx / MAX_TESTED_PIXELS))))
    sig = np.zeros((ny, nx), dtype=bool)
    ratio = np.full((ny, nx), np.nan, dtype=np.float32)
    last = None
    o = (stride - 1) // 2  # each tested pixel stands for the stride x stride block round it
    rows = list(range(o, ny, stride))
    for i in range(0, len(rows), rows_per_chunk):
        rr = rows[i : i + rows_per_chunk]
        x = np.stack([movie.rows(r, r + 1)[:, 0, o::stride] for r in rr], axis=1)
        last = peak_test(x, band, level=level, detrend_degree=detrend_degree)
        flat = ~np.isfinite(last.frequency)  # no variance (outside the cell field): not tested
        s = np.repeat(last.significant & ~flat, stride, axis=1)[:, :nx]
        q = np.repeat(np.where(flat, np.nan, last.ratio).astype(np.float32), stride, axis=1)[:, :nx]
        for j, r in enumerate(rr):
            lo, hi = r - o, min(ny, r - o + stride)
            sig[lo:hi, : s.shape[1]] = s[j]
            ratio[lo:hi, : q.shape[1]] = q[j]
    if rows and rows[-1] - o + stride < ny:  # rows past the last block: as the last block
        sig[rows[-1] - o + stride :] = sig[rows[-1] - o + stride - 1]
        ratio[rows[-1] - o + stride :] = ratio[rows[-1] - o + stride - 1]
    if s.shape[1] < nx:
        sig[:, s.shape[1] :] = sig[:, s.shape[1] - 1 : s.shape[1]]
        ratio[:, s.shape[1] :] = ratio[:, s.shape[1] - 1 : s.shape[1]]
    return sig, ratio, last


def detect(movie: _Movie, band: tuple[float, float], *, field_mask: np.ndarray | None = None,
           level: float = DEFAULT_LEVEL, detrend_degree: int | None = None) -> Detection:
    """The red-noise test on every pixel and the field's verdict (`band` in
    cycles per frame; periods the movie holds fewer than MIN_CYCLES times are
    left out of it)."""
    nt = movie.shape[0]
    tested = (max(band[0], MIN_CYCLES / nt), band[1])
    sig, ratio, last = significance_map(movie, tested, level=level, detrend_degree=detrend_degree)
    where = np.isfinite(ratio) if field_mask is None else (np.asarray(field_mask, bool) & np.isfinite(ratio))
    frac = significant_fraction(sig, where)
    thr = last.threshold if last is not None else float("nan")
    n_bins = last.n_bins if last is not None else 0
    return Detection(significant=sig & where, peak_ratio=np.where(where, ratio, np.nan).astype(np.float32),
                     fraction=frac, detected=frac >= MIN_SIGNIFICANT_FRACTION and n_bins > 0,
                     threshold=thr, n_bins=n_bins, level=level, longest_tested_frames=1.0 / tested[0],
                     band_frames=(1.0 / band[1], 1.0 / band[0]))
