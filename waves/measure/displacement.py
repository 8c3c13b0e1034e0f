"""Front speed from each front's displacement along its normal.

A wave's arrival times T(x) (waves.measure.speed.activation_times) put its
front at T = t; between t and t + dt the front moves along its normal by
dt / |grad T|.  The local plane fits (waves.measure.speed.activation_fit_speed)
read |grad T| over a 5 x 5 neighbourhood; here the same front is followed
downstream along that normal for DISPLACEMENT_REACH_PX, the arrival time read
(bilinear, the same wave at each corner) every pixel of the way, and the
speed is the distance over the time the front took, a least-squares slope of
time against distance.  Over that longer baseline the arrival times' jitter
biases the speed less than over a fit radius (a noisy gradient is steeper
on average: |g + noise| > |g|).  A walk whose second half does not move on
like its first (slopes within HALVES_RATIO: a collision line ahead, where the
other wave came first, turns it back or slows it) gives no estimate; it ends where no arrival of the same wave is found or at the
frame's edge (common practice, no source).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from waves.errors import WavesError

DISPLACEMENT_REACH_PX = 6  # how far each front is followed (grid px), one sample per pixel
MIN_REACH_PX = 3  # shorter walks give no estimate
HALVES_RATIO = 2.0  # largest ratio of the walk's two halves' slopes

__all__ = ["front_displacement_speed", "front_displacement_speed_numpy", "DISPLACEMENT_REACH_PX", "MIN_REACH_PX"]


@numba.njit(cache=True, nogil=True)
def _nearest(times, counts, r, c, t):  # pragma: no cover - compiled
    """The arrival of pixel (r, c) closest to t (its arrivals are sorted), or NaN."""
    n = counts[r, c]
    if n == 0:
        return math.nan
    lo, hi = 0, n
    while lo < hi:  # first arrival >= t
        mid = (lo + hi) // 2
        if times[r, c, mid] < t:
            lo = mid + 1
        else:
            hi = mid
    best = math.nan
    d = 1e30
    for j in (lo - 1, lo):
        if 0 <= j < n:
            dj = abs(times[r, c, j] - t)
            if dj < d:
                d = dj
                best = times[r, c, j]
    return best


@numba.njit(cache=True, nogil=True, parallel=True)
def _walk_kernel(times, counts, direction, reach, min_reach, max_dt, out):  # pragma: no cover - compiled
    ny, nx, m = times.shape
    for r in numba.prange(ny):
        samples = np.empty(reach + 1, dtype=np.float64)
        for c in range(nx):
            for k in range(counts[r, c]):
                theta = direction[r, c, k]
                if not math.isfinite(theta):
                    continue
                t0 = times[r, c, k]
                ur = -math.sin(theta)  # displayed angle: +y up = -row
                uc = math.cos(theta)
                prev = t0
                samples[0] = t0
                n = 1
                ss = 0.0
                st = t0
                sss = 0.0
                sst = 0.0
                for j in range(1, reach + 1):
                    qr = min(max(r + j * ur, 0.0), ny - 1.0) if abs(ur) < 1e-6 else r + j * ur
                    qc = min(max(c + j * uc, 0.0), nx - 1.0) if abs(uc) < 1e-6 else c + j * uc
                    if qr < 0.0 or qc < 0.0 or qr > ny - 1 or qc > nx - 1:
                        break
                    r0 = min(int(qr), ny - 2) if ny > 1 else 0
                    c0 = min(int(qc), nx - 2) if nx > 1 else 0
                    fr = qr - r0
                    fc = qc - c0
                    t00 = _nearest(times, counts, r0, c0, prev)
                    t01 = _nearest(times, counts, r0, c0 + 1, prev)
                    t10 = _nearest(times, counts, r0 + 1, c0, prev)
                    t11 = _nearest(times, counts, r0 + 1, c0 + 1, prev)
                    if not (abs(t00 - prev) <= max_dt and abs(t01 - prev) <= max_dt
                            and abs(t10 - prev) <= max_dt and abs(t11 - prev) <= max_dt):
                        break
                    tq = ((1 - fr) * ((1 - fc) * t00 + fc * t01) + fr * ((1 - fc) * t10 + fc * t11))
                    samples[j] = tq
                    prev = tq
                    s = float(j)
                    n += 1
                    ss += s
                    st += tq
                    sss += s * s
                    sst += s * tq
                last = n - 1
                if last < min_reach:
                    continue
                # the front must move on alike along the whole walk: a collision line ahead turns
                # the second half back or slows it (each half's mean slope within HALVES_RATIO)
                mid = last // 2
                a1 = (samples[mid] - t0) / mid
                a2 = (samples[last] - samples[mid]) / (last - mid)
                if not (a1 > 0.0 and a2 > 0.0 and a2 <= HALVES_RATIO * a1 and a1 <= HALVES_RATIO * a2):
                    continue
                den = n * sss - ss * ss
                slope = (n * sst - ss * st) / den  # frames per pixel along the normal
                if slope > 0.0:
                    out[r, c, k] = 1.0 / slope


def front_displacement_speed(times: np.ndarray, counts: np.ndarray, direction: np.ndarray, *,
                             max_dt_frames: float, reach_px: int = DISPLACEMENT_REACH_PX,
                             min_reach_px: int = MIN_REACH_PX) -> np.ndarray:
    """Speed (y, x, m) in pixels per frame of every wave k at every pixel:
    its front followed downstream along `direction` (y, x, m, radians,
    counterclockwise as displayed: +x right, +y up; e.g. the plane fits'
    directions) for up to `reach_px` pixels, one bilinear arrival time per
    pixel (each corner's arrival closest to the previous sample's, no more
    than `max_dt_frames` away), and the inverse of the least-squares slope
    of time against distance.  NaN where the walk is shorter than
    `min_reach_px` (it leaves the frame or loses the wave), where its two
    halves' slopes differ more than HALVES_RATIO times or are not positive
    (a collision line ahead) or where there is no direction."""
    t = np.ascontiguousarray(times, dtype=np.float32)
    n = np.ascontiguousarray(counts, dtype=np.int32)
    d = np.ascontiguousarray(direction, dtype=np.float32)
    if t.ndim != 3 or d.shape != t.shape or n.shape != t.shape[:2]:
        raise WavesError("front displacement needs arrival times and directions of one (y, x, m) shape and "
                         "(y, x) counts")
    if int(min_reach_px) < 1 or int(reach_px) < int(min_reach_px):
        raise WavesError("the walk's reach must be at least its minimum, and that at least one pixel")
    out = np.full(t.shape, np.nan, dtype=np.float32)
    _walk_kernel(t, n, d, int(reach_px), int(min_reach_px), float(max_dt_frames), out)
    return out


def front_displacement_speed_numpy(times, counts, direction, *, max_dt_frames: float,
                                   reach_px: int = DISPLACEMENT_REACH_PX,
                                   min_reach_px: int = MIN_REACH_PX) -> np.ndarray:
    """Readable twin of `front_displacement_speed` (numpy least squares)."""
    ny, nx, _ = times.shape
    out = np.full(times.shape, np.nan, dtype=np.float32)

    def nearest(r, c, t):
        cand = times[r, c, : counts[r, c]]
        return cand[np.argmin(np.abs(cand - t))] if len(cand) else np.nan

    for r in range(ny):
        for c in range(nx):
            for k in range(counts[r, c]):
                theta = direction[r, c, k]
                if not np.isfinite(theta):
                    continue
                ur, uc = -np.sin(theta), np.cos(theta)
                pts = [(0.0, float(times[r, c, k]))]
                for j in range(1, reach_px + 1):
                    qr, qc = r + j * ur, c + j * uc
                    qr = min(max(qr, 0.0), ny - 1.0) if abs(ur) < 1e-6 else qr  # along a frame edge
                    qc = min(max(qc, 0.0), nx - 1.0) if abs(uc) < 1e-6 else qc
                    if not (0 <= qr <= ny - 1 and 0 <= qc <= nx - 1):
                        break
                    r0, c0 = min(int(qr), ny - 2), min(int(qc), nx - 2)
                    fr, fc = qr - r0, qc - c0
                    prev = pts[-1][1]
                    corners = [nearest(r0 + a, c0 + b, prev) for a in (0, 1) for b in (0, 1)]
                    if not all(abs(v - prev) <= max_dt_frames for v in corners):
                        break
                    t00, t01, t10, t11 = corners
                    tq = (1 - fr) * ((1 - fc) * t00 + fc * t01) + fr * ((1 - fc) * t10 + fc * t11)
                    pts.append((float(j), tq))
                last = len(pts) - 1
                if last < min_reach_px:
                    continue
                s, t = np.array(pts).T
                mid = last // 2
                a1, a2 = (t[mid] - t[0]) / mid, (t[last] - t[mid]) / (last - mid)
                if not (a1 > 0 and a2 > 0 and 1 / HALVES_RATIO <= a2 / a1 <= HALVES_RATIO):
                    continue
                slope = np.polyfit(s, t, 1)[0]
                if slope > 0:
                    out[r, c, k] = 1.0 / slope
    return out
