"""Front speed, direction and wavelength from a phase field.

Two independent estimates:

- phase velocity from the complex field: the local wave vector is minus the
  phase gradient, computed from products of neighbouring samples of the
  analytic signal z (angle(z[x+1] conj z[x])), so phase wrapping never bites;
  speed = omega / |k|, omega the phase advance per frame, wavelength 2 pi / |k|.
  Averaging the wave vector over time and comparing its length with the mean
  length gives a coherence in [0, 1] that is low at cores and collision lines,
  where the direction changes from wave to wave.
- activation-time local fits (Bayly et al. 1998): each wave's arrival time at
  a pixel is the upward zero crossing of its phase; a plane
  T(x, y) = a + b x + c y is fitted to the arrival times of the same wave in a
  small neighbourhood; speed = 1 / |grad T|, velocity = grad T / |grad T|^2.

Spatial smoothing of the field before the phase is taken flattens the phase
of curved fronts: to leading order a kernel of variances (v_row, v_col)
turns the phase phi into phi + (v_col phi_xx + v_row phi_yy) / 2, which for
a target ring of radius r shortens the wave vector by a fraction
sigma^2 / (2 r^2) and makes the front look faster (+2.5 % at r = 4.5 sigma).
`smoothing_speed_correction` undoes that term on the time-averaged wave
vector.

Units here are pixels and frames; directions are angles counterclockwise as
displayed from the +x (column) axis, in radians.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np
import scipy.ndimage

from waves.errors import WavesError

__all__ = [
    "phase_gradient",
    "PhaseVelocity",
    "phase_velocity",
    "windowed_phase_velocity",
    "activation_times",
    "activation_fit_speed",
    "activation_fit_speed_numpy",
    "smoothing_speed_correction",
    "kernel_saw_signal",
    "kernel_in_one_territory",
]


def _forward_angle(z: np.ndarray, axis: int) -> np.ndarray:
    a = np.take(z, np.arange(1, z.shape[axis]), axis=axis)
    b = np.take(z, np.arange(0, z.shape[axis] - 1), axis=axis)
    prod = a * np.conj(b)
    return np.arctan2(prod.imag.astype(np.float32), prod.real.astype(np.float32))


def _central(fwd: np.ndarray, axis: int) -> np.ndarray:
    """Central differences from forward ones, one-sided at both ends."""
    n = fwd.shape[axis] + 1
    out_shape = list(fwd.shape)
    out_shape[axis] = n
    out = np.empty(out_shape, dtype=np.float32)
    sl = [slice(None)] * fwd.ndim

    def put(idx, val):
        s = list(sl)
        s[axis] = idx
        out[tuple(s)] = val

    def get(idx):
        s = list(sl)
        s[axis] = idx
        return fwd[tuple(s)]

    put(slice(1, n - 1), 0.5 * (get(slice(1, None)) + get(slice(None, -1))))
    put(0, get(0))
    put(n - 1, get(n - 2))
    return out


def phase_gradient(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Phase gradient (d phase / d row, d phase / d col) in radians per pixel.

    `z` is an analytic signal of shape (..., y, x).  Valid while a wavelength
    spans more than two pixels.
    """
    z = np.asarray(z)
    if z.ndim < 2 or z.shape[-1] < 2 or z.shape[-2] < 2:
        raise WavesError("phase gradient needs frames of at least 2 x 2 pixels")
    gy = _central(_forward_angle(z, z.ndim - 2), z.ndim - 2)
    gx = _central(_forward_angle(z, z.ndim - 1), z.ndim - 1)
    return gy, gx


@dataclass(frozen=True)
class PhaseVelocity:
    """Time-averaged phase-velocity maps (pixels, frames, radians)."""

    speed_px_per_frame: np.ndarray
    direction_rad: np.ndarray  # counterclockwise as displayed, from +x
    wavelength_px: np.ndarray
    omega_rad_per_frame: np.ndarray
    coherence: np.ndarray  # |mean k| / mean |k|, in [0, 1]


def phase_velocity(z: np.ndarray, *, valid: np.ndarray | None = None) -> PhaseVelocity:
    """Phase-velocity maps from an analytic signal z of shape (t, y, x),
    averaged over the whole movie.

    `valid` (t, y, x) bool selects the samples that count (e.g. amplitude above
    a noise floor); pixels with none get NaN.
    """
    z = np.asarray(z)
    if z.ndim != 3 or z.shape[0] < 2:
        raise WavesError("phase velocity needs an analytic signal of shape (t, y, x), t >= 2")
    return windowed_phase_velocity(z, windows=[(0, z.shape[0])], valid=valid)[0]


def windowed_phase_velocity(
    z: np.ndarray,
    *,
    windows: list[tuple[int, int]],
    valid: np.ndarray | None = None,
) -> list[PhaseVelocity]:
    """Phase-velocity maps averaged over each time window [start, stop) of z.

    The wave vector k = -grad(phase) and the advance omega are averaged over
    the same samples, so their ratio (the speed) is exact for any travelling
    wave of fixed shape, even where the phase speed is uneven within a cycle
    (narrow pulses); `wavelength_px` = 2 pi / |mean k| and `omega` carry that
    unevenness when a window is not a whole number of cycles.
    """
    z = np.asarray(z)
    if z.ndim != 3 or z.shape[0] < 2:
        raise WavesError("phase velocity needs an analytic signal of shape (t, y, x), t >= 2")
    nt = z.shape[0]
    gy, gx = phase_gradient(z)
    prod = z[1:] * np.conj(z[:-1])
    adv = np.arctan2(prod.imag.astype(np.float32), prod.real.astype(np.float32))
    del prod
    if valid is None:
        w_k = None
    else:
        w_k = np.asarray(valid, dtype=np.float32)
    out = []
    for start, stop in windows:
        start, stop = int(start), int(stop)
        if not 0 <= start < stop <= nt or stop - start < 2:
            raise WavesError(f"window [{start}, {stop}) does not fit in {nt} frames")
        sl = slice(start, stop)
        sa = slice(start, stop - 1)  # advances between frames of the window
        if w_k is None:
            wk = np.ones((stop - start,) + z.shape[1:], dtype=np.float32)
            wa = np.ones((stop - start - 1,) + z.shape[1:], dtype=np.float32)
        else:
            wk = w_k[sl]
            wa = w_k[start : stop - 1] * w_k[start + 1 : stop]
        ky = -gy[sl]
        kx = -gx[sl]
        n_k = wk.sum(axis=0)
        n_a = wa.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            kx_m = (kx * wk).sum(axis=0) / n_k
            ky_m = (ky * wk).sum(axis=0) / n_k
            k_abs_m = (np.hypot(kx, ky) * wk).sum(axis=0) / n_k
            omega = (adv[sa] * wa).sum(axis=0) / n_a
            k_len = np.hypot(kx_m, ky_m)
            speed = np.where(k_len > 0, omega / k_len, np.nan)
            wavelength = np.where(k_len > 0, 2 * np.pi / k_len, np.nan)
            coherence = np.where(k_abs_m > 0, k_len / k_abs_m, np.nan)
        # displayed direction: +x to the right, +y up on screen = -row
        direction = np.arctan2(-ky_m, kx_m)
        out.append(
            PhaseVelocity(
                speed_px_per_frame=speed.astype(np.float32),
                direction_rad=direction.astype(np.float32),
                wavelength_px=wavelength.astype(np.float32),
                omega_rad_per_frame=omega.astype(np.float32),
                coherence=coherence.astype(np.float32),
            )
        )
    return out


@numba.njit(cache=True, nogil=True, parallel=True)
def _crossings_kernel(phase, out_t, out_n):
    nt, ny, nx = phase.shape
    m = out_t.shape[2]
    for r in numba.prange(ny):
        for c in range(nx):
            k = 0
            for t in range(nt - 1):
                a = phase[t, r, c]
                b = phase[t + 1, r, c]
                if a < 0.0 and b >= 0.0 and (b - a) < math.pi:
                    if k < m:
                        out_t[r, c, k] = t + (-a) / (b - a)
                        k += 1
            out_n[r, c] = k


def activation_times(phase: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Arrival times (frames, sub-frame interpolated) of every wave at every
    pixel: upward zero crossings of the phase.

    Returns (times, counts): times (y, x, m) padded with NaN, counts (y, x).
    """
    p = np.ascontiguousarray(phase, dtype=np.float32)
    if p.ndim != 3:
        raise WavesError("activation times need a phase array of shape (t, y, x)")
    m = p.shape[0] // 2 + 1
    times = np.full((p.shape[1], p.shape[2], m), np.nan, dtype=np.float32)
    counts = np.zeros((p.shape[1], p.shape[2]), dtype=np.int32)
    _crossings_kernel(p, times, counts)
    mmax = max(int(counts.max()), 1)
    return times[:, :, :mmax].copy(), counts


# a plane fit refuses to straddle a kink (a collision line: the arrival-time surface is the
# lower of two planes there, a concave roof): on a full neighbourhood the quadric's smaller
# Hessian eigenvalue lam, times the fit radius over the slope |grad T|, must not fall below
# -KINK_RATIO while lam lies beyond what noise gives.  A kink of 20 degrees between the fronts
# through the centre gives -0.30 and biases the plane's speed +1.5 %, 30 degrees -0.46 and
# +3.5 % (exact sums for radius 2; common practice, no source); a target front 3 px from its
# centre gives +0.14.  Noise: with no curvature, -lam exceeds KINK_NULL * s / sqrt(q2) (s the
# quadric's residual sd over 19 degrees of freedom, q2 the design's sum of (x^2 - mean)^2) in
# 0.1 % of fits (Monte Carlo of the three Gaussian coefficients and the chi-square of s,
# radius 2, 2e6 draws: 0.96 = 8.0 / sqrt(70))
KINK_RATIO = 0.25
KINK_NULL = 8.0


def _grid_moments(radius: int) -> tuple[float, float, float, float]:
    """For the full (2r+1)^2 grid of offsets -r..r: mean of x^2, sum of (x^2 - mean)^2, sum of x^2
    and sum of x^2 y^2 (the orthogonal design of the quadric's terms)."""
    d = np.arange(-radius, radius + 1, dtype=np.float64)
    side = d.size
    m2 = float(np.mean(d * d))
    return m2, float(side * np.sum((d * d - m2) ** 2)), float(side * np.sum(d * d)), float(np.sum(d * d) ** 2)


@numba.njit(cache=True)
def _kink(n, radius, st, stt, sxt, syt, sx2t, sy2t, sxyt, m2, q2, s2, s22):  # pragma: no cover - compiled
    """True when the arrival times of a full neighbourhood (n points, offsets
    -radius..radius; sums of t, t^2, x t, y t, x^2 t, y^2 t, x y t with t the
    time after the centre's) bend down like a roof: the quadric's smaller
    Hessian eigenvalue lam, with lam * radius / |grad T| < -KINK_RATIO and
    lam beyond its noise (KINK_NULL).  The quadric's terms are
    orthogonal on the full grid (`_grid_moments`), so each coefficient is one
    projection."""
    gx = sxt / s2
    gy = syt / s2
    a = (sx2t - m2 * st) / q2  # T ~ t0 + gx x + gy y + a (x^2 - m2) + b x y + c (y^2 - m2)
    c = (sy2t - m2 * st) / q2
    b = sxyt / s22
    d = math.sqrt((a - c) * (a - c) + b * b)
    lam = (a + c) - d  # the smaller eigenvalue of [[2a, b], [b, 2c]]
    g = math.sqrt(gx * gx + gy * gy)
    if g <= 0.0 or lam * radius >= -KINK_RATIO * g:
        return False
    fit = st * st / n + (gx * gx + gy * gy) * s2 + (a * a + c * c) * q2 + b * b * s22
    res = max(stt - fit, 0.0) / max(n - 6.0, 1.0)
    return lam < -KINK_NULL * math.sqrt(res / q2)


@numba.njit(cache=True, nogil=True, parallel=True)
def _fit_kernel(times, counts, radius, max_dt, min_points, out_speed, out_dir, moments, refuse_kinks):
    ny, nx, m = times.shape
    side = 2 * radius + 1
    m2, q2, s2, s22 = moments[0], moments[1], moments[2], moments[3]
    for r in numba.prange(ny):
        # per neighbour, how many of its arrivals lie before the current wave's: the waves of a
        # pixel come in time order, so these only grow (what a binary search would find afresh)
        ahead = np.empty(side * side, dtype=np.int64)
        for c in range(nx):
            ahead[:] = 0
            for k in range(counts[r, c]):
                t0 = times[r, c, k]
                # normal equations of T = a + b dx + c dy (dx along col, dy along row)
                s1 = 0.0
                sx = 0.0
                sy = 0.0
                sxx = 0.0
                syy = 0.0
                sxy = 0.0
                st = 0.0
                sxt = 0.0
                syt = 0.0
                stt = 0.0
                sx2t = 0.0
                sy2t = 0.0
                sxyt = 0.0
                npts = 0
                for dr in range(-radius, radius + 1):
                    rr = r + dr
                    if rr < 0 or rr >= ny:
                        continue
                    for dc in range(-radius, radius + 1):
                        cc = c + dc
                        if cc < 0 or cc >= nx:
                            continue
                        # arrivals are sorted: the first one not before t0 and the one before it
                        n_rc = counts[rr, cc]
                        best = 1e30
                        tb = 0.0
                        if n_rc > 0:
                            q = (dr + radius) * side + dc + radius
                            lo = ahead[q]
                            while lo < n_rc and times[rr, cc, lo] < t0:
                                lo += 1
                            ahead[q] = lo
                            for j in (lo - 1, lo):
                                if 0 <= j < n_rc:
                                    d = abs(times[rr, cc, j] - t0)
                                    if d < best:
                                        best = d
                                        tb = times[rr, cc, j]
                        if best <= max_dt:
                            x = float(dc)
                            y = float(dr)
                            tt = tb - t0
                            s1 += 1.0
                            sx += x
                            sy += y
                            sxx += x * x
                            syy += y * y
                            sxy += x * y
                            st += tt
                            sxt += x * tt
                            syt += y * tt
                            stt += tt * tt
                            sx2t += x * x * tt
                            sy2t += y * y * tt
                            sxyt += x * y * tt
                            npts += 1
                if npts < min_points:
                    continue
                if refuse_kinks and npts == side * side and _kink(
                        float(npts), float(radius), st, stt, sxt, syt, sx2t, sy2t, sxyt, m2, q2, s2, s22):
                    continue
                # solve the 3x3 symmetric system by Cramer's rule
                a11, a12, a13 = s1, sx, sy
                a22, a23, a33 = sxx, sxy, syy
                det = (
                    a11 * (a22 * a33 - a23 * a23)
                    - a12 * (a12 * a33 - a23 * a13)
                    + a13 * (a12 * a23 - a22 * a13)
                )
                if abs(det) < 1e-9:
                    continue
                gx = (
                    a11 * (sxt * a33 - a23 * syt)
                    - st * (a12 * a33 - a23 * a13)
                    + a13 * (a12 * syt - sxt * a13)
                ) / det
                gy = (
                    a11 * (a22 * syt - sxt * a23)
                    - a12 * (a12 * syt - sxt * a13)
                    + st * (a12 * a23 - a22 * a13)
                ) / det
                g2 = gx * gx + gy * gy
                if g2 <= 0.0:
                    continue
                out_speed[r, c, k] = 1.0 / math.sqrt(g2)
                # velocity = grad T / |grad T|^2; displayed angle (+y up = -row)
                out_dir[r, c, k] = math.atan2(-gy, gx)


def activation_fit_speed(
    times: np.ndarray,
    counts: np.ndarray,
    *,
    radius_px: int = 2,
    max_dt_frames: float,
    min_points: int = 6,
    refuse_kinks: bool = True,
) -> tuple[np.ndarray, np.ndarray]:
    """Local plane fits to arrival times (Bayly et al. 1998).

    For every wave k at every pixel, the arrival times of the same wave at the
    pixels within `radius_px` (the neighbour's arrival closest in time, no
    more than `max_dt_frames` away, e.g. a third of a period) are fitted by a
    plane.  With `refuse_kinks` a fit over a full neighbourhood whose times
    bend down like a roof (two fronts meeting on a collision line) is not
    made (KINK_RATIO).  Returns (speed, direction) of shape (y, x, m) in
    pixels per frame and radians (counterclockwise as displayed), NaN where
    no fit was made.
    """
    t = np.ascontiguousarray(times, dtype=np.float64)
    n = np.ascontiguousarray(counts, dtype=np.int32)
    speed = np.full(t.shape, np.nan, dtype=np.float32)
    direction = np.full(t.shape, np.nan, dtype=np.float32)
    moments = np.array(_grid_moments(int(radius_px)), dtype=np.float64)
    _fit_kernel(t, n, int(radius_px), float(max_dt_frames), int(min_points), speed, direction, moments,
                bool(refuse_kinks))
    return speed, direction


def _kink_numpy(rows: np.ndarray, radius: int) -> bool:
    """Readable twin of `_kink`: (n, 3) rows of (x, y, t) of a full neighbourhood,
    numpy least squares of the quadric and its Hessian's eigenvalues."""
    x, y, t = rows.T
    design = np.stack([np.ones_like(x), x, y, x * x, x * y, y * y], axis=1)
    coef, *_ = np.linalg.lstsq(design, t, rcond=None)
    _, gx, gy, a, b, c = coef
    lam = float(np.linalg.eigvalsh(np.array([[2 * a, b], [b, 2 * c]]))[0])
    g = float(np.hypot(gx, gy))
    if g <= 0 or lam * radius >= -KINK_RATIO * g:
        return False
    res = float(np.sum((t - design @ coef) ** 2)) / max(len(t) - 6, 1)
    q2 = float(np.sum((x * x - np.mean(x * x)) ** 2))
    return lam < -KINK_NULL * np.sqrt(res / q2)


def activation_fit_speed_numpy(
    times: np.ndarray,
    counts: np.ndarray,
    *,
    radius_px: int = 2,
    max_dt_frames: float,
    min_points: int = 6,
    refuse_kinks: bool = True,
) -> tuple[np.ndarray, np.ndarray]:
    """Readable twin of `activation_fit_speed` (numpy least squares)."""
    ny, nx, m = times.shape
    speed = np.full(times.shape, np.nan, dtype=np.float32)
    direction = np.full(times.shape, np.nan, dtype=np.float32)
    side = 2 * radius_px + 1
    for r in range(ny):
        for c in range(nx):
            for k in range(counts[r, c]):
                t0 = times[r, c, k]
                rows = []
                for dr in range(-radius_px, radius_px + 1):
                    for dc in range(-radius_px, radius_px + 1):
                        rr, cc = r + dr, c + dc
                        if not (0 <= rr < ny and 0 <= cc < nx) or counts[rr, cc] == 0:
                            continue
                        cand = times[rr, cc, : counts[rr, cc]]
                        j = np.argmin(np.abs(cand - t0))
                        if abs(cand[j] - t0) <= max_dt_frames:
                            rows.append((1.0, dc, dr, cand[j] - t0))
                if len(rows) < min_points:
                    continue
                a = np.array(rows, dtype=np.float64)
                if refuse_kinks and len(rows) == side * side and _kink_numpy(a[:, 1:], radius_px):
                    continue
                coef, *_ = np.linalg.lstsq(a[:, :3], a[:, 3], rcond=None)
                gx, gy = coef[1], coef[2]
                g2 = gx * gx + gy * gy
                if g2 <= 0:
                    continue
                speed[r, c, k] = 1.0 / np.sqrt(g2)
                direction[r, c, k] = np.arctan2(-gy, gx)
    return speed, direction


def smoothing_speed_correction(
    kx: np.ndarray,
    ky: np.ndarray,
    *,
    var_row: np.ndarray,
    var_col: np.ndarray,
    smooth_px: float = 0.0,
) -> np.ndarray:
    """Factor by which to divide phase speeds measured on a smoothed field.

    `kx`, `ky` (y, x) are the time-averaged wave vector (minus the phase
    gradient along columns and rows, radians per pixel) of a field smoothed
    by a kernel whose variances along rows and columns (pixels squared) are
    `var_row` (one per row) and `var_col` (one per column).  The smoothed
    phase is, to leading order in the variances, phi + psi with
    psi = (v_col phi_xx + v_row phi_yy) / 2 = -(v_col d kx/dx + v_row d ky/dy) / 2,
    so the true wave vector is k + grad psi.  Returns |k + grad psi| / |k|
    (speed_true = speed_measured / factor); NaN where k or its neighbours
    are NaN.  Exact to leading order; for a target ring the remaining error
    is of order (sigma / r)^4.
    """
    kx = np.asarray(kx, dtype=np.float64)
    ky = np.asarray(ky, dtype=np.float64)
    if kx.ndim != 2 or kx.shape != ky.shape or min(kx.shape) < 3:
        raise WavesError("the wave vector maps must be two (y, x) arrays of one shape, at least 3 x 3")
    vr = np.asarray(var_row, dtype=np.float64).reshape(-1, 1)
    vc = np.asarray(var_col, dtype=np.float64).reshape(1, -1)
    if vr.shape[0] != kx.shape[0] or vc.shape[1] != kx.shape[1]:
        raise WavesError("var_row needs one value per row and var_col one per column")
    psi = -0.5 * (vc * np.gradient(kx, axis=1) + vr * np.gradient(ky, axis=0))
    if smooth_px > 0:
        # psi of a real front varies on the scale of its radius of curvature; the
        # second derivatives of a measured k carry its pixel noise, amplified
        ok = np.isfinite(psi)
        w = scipy.ndimage.gaussian_filter(ok.astype(np.float64), smooth_px, mode="constant")
        num = scipy.ndimage.gaussian_filter(np.where(ok, psi, 0.0), smooth_px, mode="constant")
        with np.errstate(invalid="ignore", divide="ignore"):
            psi = np.where(ok, num / w, np.nan)
    cy, cx = np.gradient(psi)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.hypot(kx + cx, ky + cy) / np.hypot(kx, ky)


def kernel_saw_signal(amplitude: np.ndarray, *, sigma_px: float) -> np.ndarray:
    """Pixels whose smoothing kernel (sigma `sigma_px`) met no patch without
    signal: within 3 sigma (a square) the amplitude stays above half the
    pixel's own.  Next to an obstacle or a dead patch the kernel averages the
    wave with nothing, which bends the fronts (measured +2 to +11 % on speeds
    up to 2.7 sigma from a dead disk); speeds there are not to be trusted.
    All True without smoothing (sigma <= 0.3 px)."""
    amp = np.nan_to_num(np.asarray(amplitude, dtype=np.float64), nan=0.0)
    if sigma_px <= 0.3:
        return np.ones(amp.shape, dtype=bool)
    size = 2 * int(math.ceil(3.0 * sigma_px)) + 1
    low = scipy.ndimage.minimum_filter(amp, size=size, mode="nearest")
    return low >= 0.5 * amp


def kernel_in_one_territory(labels: np.ndarray, *, sigma_px: float) -> np.ndarray:
    """Pixels whose smoothing kernel (3 sigma, a square) lies in one
    territory of a label map (labels > 0; 0, unassigned, is ignored).  On a
    territory boundary the fronts of two sources meet at an angle and the
    smoothing averages them: the phase gradient shrinks and the speed comes
    out high (measured +40 to +100 % on the collision line of two targets,
    +4 to +6 % within 2 sigma of it).  All True without smoothing."""
    lab = np.asarray(labels, dtype=np.int64)
    if sigma_px <= 0.3:
        return np.ones(lab.shape, dtype=bool)
    size = 2 * int(math.ceil(3.0 * sigma_px)) + 1
    none = int(lab.max(initial=0)) + 1  # stands for "no label" in the minimum (a huge sentinel overflows)
    hi = scipy.ndimage.maximum_filter(lab, size=size, mode="nearest")
    lo = scipy.ndimage.minimum_filter(np.where(lab > 0, lab, none), size=size, mode="nearest")
    return (hi == 0) | (lo == hi)
