"""Topological charge of a phase field on 2x2 plaquettes.

For each plaquette with top-left pixel (r, c) the wrapped phase differences are
summed around the loop (r, c) -> (r+1, c) -> (r+1, c+1) -> (r, c+1) -> (r, c),
which is counterclockwise as displayed (row 0 at the top).  The sum is 2 pi
times an integer, the charge (Iyer & Gray 2001; Bray et al. 2001).  A
plaquette touching a NaN pixel (masked, or an undefined phase) gets charge 0.

`plaquette_charge` is the compiled kernel; `plaquette_charge_numpy` its
readable twin.  Both take (y, x) or (t, y, x) phase arrays and return int8
arrays one smaller in each spatial axis.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from waves.errors import WavesError

__all__ = ["plaquette_charge", "plaquette_charge_numpy", "singularity_offsets", "wrap", "wrap_scalar"]

TWO_PI = 2.0 * math.pi


def wrap(d: np.ndarray) -> np.ndarray:
    """Wrap phase differences into [-pi, pi)."""
    return (np.asarray(d) + np.pi) % TWO_PI - np.pi


def _as_stack(phase: np.ndarray) -> tuple[np.ndarray, bool]:
    p = np.asarray(phase)
    if p.ndim == 2:
        return p[None], True
    if p.ndim == 3:
        return p, False
    raise WavesError(f"phase must be a (y, x) or (t, y, x) array, got {p.ndim} dimensions")


def plaquette_charge_numpy(phase: np.ndarray) -> np.ndarray:
    """Readable numpy twin of `plaquette_charge`."""
    p, squeeze = _as_stack(phase)
    p = p.astype(np.float64)
    a = p[:, :-1, :-1]  # (r, c)
    b = p[:, 1:, :-1]  # (r+1, c)
    c = p[:, 1:, 1:]  # (r+1, c+1)
    d = p[:, :-1, 1:]  # (r, c+1)
    total = wrap(b - a) + wrap(c - b) + wrap(d - c) + wrap(a - d)
    with np.errstate(invalid="ignore"):
        q = np.rint(total / TWO_PI)
    q = np.where(np.isfinite(q), q, 0).astype(np.int8)
    return q[0] if squeeze else q


@numba.njit(cache=True, nogil=True, inline="always")
def wrap_scalar(d):
    """Wrap one angle difference into [-pi, pi) (compiled, inlined)."""
    if d >= math.pi:
        d -= TWO_PI
        while d >= math.pi:
            d -= TWO_PI
    elif d < -math.pi:
        d += TWO_PI
        while d < -math.pi:
            d += TWO_PI
    return d


@numba.njit(cache=True, nogil=True, parallel=True)
def _charge_kernel(p, out):
    nt, ny, nx = p.shape
    for t in numba.prange(nt):
        for r in range(ny - 1):
            for c in range(nx - 1):
                a = np.float64(p[t, r, c])
                b = np.float64(p[t, r + 1, c])
                cc = np.float64(p[t, r + 1, c + 1])
                d = np.float64(p[t, r, c + 1])
                s = wrap_scalar(b - a) + wrap_scalar(cc - b) + wrap_scalar(d - cc) + wrap_scalar(a - d)
                if s != s:  # NaN somewhere on the loop
                    out[t, r, c] = 0
                elif s > math.pi:
                    out[t, r, c] = 1 if s < 3.0 * math.pi else 2
                elif s < -math.pi:
                    out[t, r, c] = -1 if s > -3.0 * math.pi else -2
                else:
                    out[t, r, c] = 0


def plaquette_charge(phase: np.ndarray) -> np.ndarray:
    """Topological charge (int8) of every 2x2 plaquette, counterclockwise as displayed."""
    p, squeeze = _as_stack(phase)
    if p.shape[1] < 2 or p.shape[2] < 2:
        raise WavesError("phase frames must be at least 2 x 2 pixels to count charges")
    if p.dtype not in (np.float32, np.float64):
        p = p.astype(np.float32)
    p = np.ascontiguousarray(p)
    out = np.empty((p.shape[0], p.shape[1] - 1, p.shape[2] - 1), dtype=np.int8)
    _charge_kernel(p, out)
    return out[0] if squeeze else out


SMOOTH_REACH = 2  # pixels each side of the extra smoothing in singularity_offsets
_OFFSET_CHUNK = 16384  # plaquettes per block there


def _keys_weights(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cubic-convolution weights (Keys 1981, IEEE Trans. Acoust. Speech Signal
    Process. 29:1153, a = -1/2) of the samples at
    offsets -1, 0, 1, 2 for positions u in [0, 1], and their derivatives in u;
    (n, 4) each.  The interpolant passes through the samples and is exact for
    quadratics."""
    u2, u3 = u * u, u * u * u
    w = np.stack([(-u3 + 2 * u2 - u) / 2, (3 * u3 - 5 * u2 + 2) / 2, (-3 * u3 + 4 * u2 + u) / 2, (u3 - u2) / 2], axis=1)
    dw = np.stack([(-3 * u2 + 4 * u - 1) / 2, (9 * u2 - 10 * u) / 2, (-9 * u2 + 8 * u + 1) / 2, (3 * u2 - 2 * u) / 2],
                  axis=1)
    return w, dw


def singularity_offsets(phase: np.ndarray, amplitude: np.ndarray | None, t: np.ndarray, r: np.ndarray,
                        c: np.ndarray, *, extra_sigma_px: float = 0.0, iterations: int = 8) -> np.ndarray:
    """(n, 2) float32 (row, col) position of the phase singularity inside each
    plaquette (t, r, c) (top-left corner (r, c)), as offsets from that corner
    in [0, 1] (up to half a step past the sides where the plaquette has a ring
    of pixels round it).

    The singularity is the zero of z = amplitude * exp(i phase) (unit amplitude
    without `amplitude`), found by Newton steps from the plaquette's centre on
    the bicubic cubic-convolution interpolant (Keys 1981) of the 4 x 4 pixels
    round the plaquette, or on the bilinear interpolant of its four corners at
    the frame's edge; where Newton leaves the square the centre (0.5, 0.5)
    stays (common practice, no source).  `extra_sigma_px` first smooths those
    values by a Gaussian of that sd (cut at SMOOTH_REACH pixels): a field
    smoothed by less than about two grid steps is not smooth enough on the
    grid for any local interpolant (its zero comes out up to 0.04 steps off),
    and a smoothing that treats all directions alike keeps the zero of a field
    that turns about its singularity where it was."""
    t, r, c = (np.asarray(v, dtype=np.int64).ravel() for v in (t, r, c))
    if t.size > _OFFSET_CHUNK:  # bounded memory: the patches are (n, 8, 8) complex
        return np.concatenate([
            singularity_offsets(phase, amplitude, t[i : i + _OFFSET_CHUNK], r[i : i + _OFFSET_CHUNK],
                                c[i : i + _OFFSET_CHUNK], extra_sigma_px=extra_sigma_px, iterations=iterations)
            for i in range(0, t.size, _OFFSET_CHUNK)])
    n = t.size
    out = np.full((n, 2), 0.5, dtype=np.float64)
    if n == 0:
        return out.astype(np.float32)
    ny, nx = phase.shape[-2:]
    ring = (r >= 1) & (r + 2 < ny) & (c >= 1) & (c + 2 < nx)
    lo = np.where(ring, -1, 0)  # the patch's first row/column offset; the bilinear case uses offsets 0, 1
    reach = SMOOTH_REACH if extra_sigma_px > 0 else 0
    size = 4 + 2 * reach
    patch = np.zeros((n, size, size), dtype=np.complex128)
    for i in range(size):
        rr = np.clip(r + lo + i - reach, 0, ny - 1)
        for j in range(size):
            cc = np.clip(c + lo + j - reach, 0, nx - 1)
            z = np.exp(1j * phase[t, rr, cc].astype(np.float64))
            patch[:, i, j] = z * amplitude[t, rr, cc] if amplitude is not None else z
    if reach:  # separable, 'valid': back to 4 x 4
        k = np.exp(-0.5 * (np.arange(-reach, reach + 1) / float(extra_sigma_px)) ** 2)
        k /= k.sum()
        patch = sum(k[a] * patch[:, a : a + 4, :] for a in range(2 * reach + 1))
        patch = sum(k[a] * patch[:, :, a : a + 4] for a in range(2 * reach + 1))

    def weights(u):
        w, dw = _keys_weights(u)
        if not ring.all():  # bilinear: weights 1 - u, u on the first two samples
            lin = np.stack([1 - u, u, 0 * u, 0 * u], axis=1)
            dlin = np.stack([-1 + 0 * u, 1 + 0 * u, 0 * u, 0 * u], axis=1)
            w = np.where(ring[:, None], w, lin)
            dw = np.where(ring[:, None], dw, dlin)
        return w, dw

    y = np.full(n, 0.5)
    x = np.full(n, 0.5)
    for _ in range(iterations):
        wy, dwy = weights(y)
        wx, dwx = weights(x)
        f = np.einsum("ni,nij,nj->n", wy, patch, wx)
        fx = np.einsum("ni,nij,nj->n", wy, patch, dwx)
        fy = np.einsum("ni,nij,nj->n", dwy, patch, wx)
        # solve [Re fy, Re fx; Im fy, Im fx] [dy, dx] = -[Re f, Im f]
        a, b, cc_, d = fy.real, fx.real, fy.imag, fx.imag
        det = a * d - b * cc_
        ok = np.abs(det) > 1e-12
        det = np.where(ok, det, 1.0)
        dy = np.where(ok, -(d * f.real - b * f.imag) / det, 0.0)
        dx = np.where(ok, -(-cc_ * f.real + a * f.imag) / det, 0.0)
        y, x = y + dy, x + dx
    # a zero up to half a step past the plaquette's side is still inside the 4 x 4 patch
    lim0, lim1 = np.where(ring, -0.5, 0.0), np.where(ring, 1.5, 1.0)
    inside = (y >= lim0) & (y <= lim1) & (x >= lim0) & (x <= lim1) & np.isfinite(y) & np.isfinite(x)
    out[inside, 0] = y[inside]
    out[inside, 1] = x[inside]
    return out.astype(np.float32)

