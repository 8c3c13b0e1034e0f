"""Per-pixel measurements of a phase block in one compiled pass.

`pixel_measures` computes, for every pixel of the inner rows of a phase block
(t, y, x), what `waves.measure.period.period_from_cycles` and
`waves.measure.speed.windowed_phase_velocity` compute with numpy, for the
whole block and for a set of time windows at once: the period from whole
phase cycles, the phase velocity (speed, direction, coherence, omega) and the
mean amplitude.  Phase differences are wrapped differences of the phase,
which equal the angles of the products of neighbouring analytic-signal
samples the numpy functions use.  Rows above and below the inner rows serve
as the halo of the phase gradient.

The numpy functions are the readable twins; tests compare the two.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np

from waves.errors import WavesError
from waves.phase.charge import wrap_scalar

__all__ = ["PixelMeasures", "pixel_measures"]

TWO_PI = 2.0 * math.pi


@dataclass(frozen=True)
class PixelMeasures:
    """Arrays (n_windows + 1, rows, x): index 0 is the whole block, then the
    windows in order.  Pixels and frames; directions counterclockwise as
    displayed from +x, radians."""

    amplitude: np.ndarray  # (rows, x) mean amplitude over the block
    period_frames: np.ndarray
    speed_px_per_frame: np.ndarray
    direction_rad: np.ndarray
    coherence: np.ndarray
    omega_rad_per_frame: np.ndarray


@numba.njit(cache=True, nogil=True, inline="always")
def _cycles_period(cum, a, b):
    """period_from_cycles on the advances a .. b-1, given cum[i] = sum of the
    advances before frame i (so the levels of the window are
    (cum[a..b] - cum[a]) / 2 pi)."""
    base = cum[a]
    top = -1e300
    for i in range(a, b + 1):
        v = (cum[i] - base) / TWO_PI
        if v > top:
            top = v
    m_first = 1.0  # floor(levels[0]) + 1 with levels[0] = 0
    m_last = math.floor(top)
    if m_last - m_first < 1.0:
        return np.nan
    # first time the level m_first is reached
    i1 = -1
    for i in range(a, b + 1):
        if (cum[i] - base) / TWO_PI >= m_first:
            i1 = i
            break
    # last upward passage of m_last
    i2 = -1
    for i in range(b, a, -1):
        hi = (cum[i] - base) / TWO_PI
        lo = (cum[i - 1] - base) / TWO_PI
        if hi >= m_last and lo < m_last:
            i2 = i
            break
    if i1 <= a or i2 <= a:
        return np.nan
    lo = (cum[i1 - 1] - base) / TWO_PI
    hi = (cum[i1] - base) / TWO_PI
    t1 = (i1 - 1 - a) + ((m_first - lo) / (hi - lo) if hi > lo else 0.0)
    lo = (cum[i2 - 1] - base) / TWO_PI
    hi = (cum[i2] - base) / TWO_PI
    t2 = (i2 - 1 - a) + ((m_last - lo) / (hi - lo) if hi > lo else 0.0)
    return (t2 - t1) / (m_last - m_first)


@numba.njit(cache=True, nogil=True, parallel=True)
def _measures_kernel(phase, amp, r0, r1, w0, w1, o_amp, o_per, o_speed, o_dir, o_coh, o_omega):
    nt, ny, nx = phase.shape
    nw = w0.shape[0]
    for r in numba.prange(r0, r1):
        cum = np.empty(nt, dtype=np.float64)
        ckx = np.empty(nt + 1, dtype=np.float64)
        cky = np.empty(nt + 1, dtype=np.float64)
        cka = np.empty(nt + 1, dtype=np.float64)
        for c in range(nx):
            s_amp = 0.0
            cum[0] = 0.0
            ckx[0] = 0.0
            cky[0] = 0.0
            cka[0] = 0.0
            for t in range(nt):
                s_amp += amp[t, r, c]
                p = phase[t, r, c]
                if t + 1 < nt:
                    cum[t + 1] = cum[t] + wrap_scalar(np.float64(phase[t + 1, r, c]) - p)
                # phase gradient, central inside, one-sided at the block edges
                if r == 0:
                    gy = wrap_scalar(np.float64(phase[t, 1, c]) - p)
                elif r == ny - 1:
                    gy = wrap_scalar(p - np.float64(phase[t, ny - 2, c]))
                else:
                    gy = 0.5 * (
                        wrap_scalar(np.float64(phase[t, r + 1, c]) - p) + wrap_scalar(p - np.float64(phase[t, r - 1, c]))
                    )
                if c == 0:
                    gx = wrap_scalar(np.float64(phase[t, r, 1]) - p)
                elif c == nx - 1:
                    gx = wrap_scalar(p - np.float64(phase[t, r, nx - 2]))
                else:
                    gx = 0.5 * (
                        wrap_scalar(np.float64(phase[t, r, c + 1]) - p) + wrap_scalar(p - np.float64(phase[t, r, c - 1]))
                    )
                ckx[t + 1] = ckx[t] - gx
                cky[t + 1] = cky[t] - gy
                cka[t + 1] = cka[t] + math.sqrt(gx * gx + gy * gy)
            o_amp[r - r0, c] = s_amp / nt
            for w in range(nw + 1):
                if w == 0:
                    a = 0
                    b = nt
                else:
                    a = w0[w - 1]
                    b = w1[w - 1]
                nk = b - a
                na = b - a - 1
                kx = (ckx[b] - ckx[a]) / nk
                ky = (cky[b] - cky[a]) / nk
                ka = (cka[b] - cka[a]) / nk
                om = (cum[b - 1] - cum[a]) / na
                kl = math.sqrt(kx * kx + ky * ky)
                o_omega[w, r - r0, c] = om
                if kl > 0.0:
                    o_speed[w, r - r0, c] = om / kl
                else:
                    o_speed[w, r - r0, c] = np.nan
                o_coh[w, r - r0, c] = kl / ka if ka > 0.0 else np.nan
                o_dir[w, r - r0, c] = math.atan2(-ky, kx)
                o_per[w, r - r0, c] = _cycles_period(cum, a, b - 1)


def pixel_measures(
    phase: np.ndarray,
    amplitude: np.ndarray,
    *,
    rows: tuple[int, int],
    windows: list[tuple[int, int]],
) -> PixelMeasures:
    """Period, phase velocity and amplitude of the pixels in `rows` [r0, r1)
    of a (t, y, x) phase block, for the whole block and each window
    [start, stop) of frames."""
    p = np.ascontiguousarray(phase, dtype=np.float32)
    a = np.ascontiguousarray(amplitude, dtype=np.float32)
    if p.ndim != 3 or p.shape != a.shape:
        raise WavesError("phase and amplitude must be (t, y, x) arrays of one shape")
    nt, ny, nx = p.shape
    if nt < 3 or ny < 2 or nx < 2:
        raise WavesError("a phase block needs at least 3 frames and 2 x 2 pixels")
    r0, r1 = (int(v) for v in rows)
    if not 0 <= r0 < r1 <= ny:
        raise WavesError(f"rows {rows!r} do not fit in {ny} rows")
    w0 = np.asarray([w[0] for w in windows], dtype=np.int64)
    w1 = np.asarray([w[1] for w in windows], dtype=np.int64)
    if len(windows) and (w0.min() < 0 or w1.max() > nt or (w1 - w0).min() < 3):
        raise WavesError(f"time windows must lie in [0, {nt}) and span at least 3 frames")
    n = len(windows) + 1
    shape = (n, r1 - r0, nx)
    o_amp = np.empty((r1 - r0, nx), np.float32)
    outs = [np.empty(shape, np.float32) for _ in range(5)]
    _measures_kernel(p, a, r0, r1, w0, w1, o_amp, *outs)
    per, speed, direction, coh, omega = outs
    return PixelMeasures(
        amplitude=o_amp,
        period_frames=per,
        speed_px_per_frame=speed,
        direction_rad=direction,
        coherence=coh,
        omega_rad_per_frame=omega,
    )
