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


def singularity_offsets(phase: np.ndarray, amplitude: np.ndarray | None, t: np.ndarray, r: np.ndarray,
                        c: np.ndarray, *, iterations: int = 8) -> np.ndarray:
    """(n, 2) float32 (row, col) position of the phase singularity inside each
    plaquette (t, r, c) (top-left corner (r, c); offsets in [0, 1]): the zero of
    the bilinear interpolant of z = amplitude * exp(i phase) over its four
    corners (unit amplitude without `amplitude`), by Newton steps from the
    plaquette's centre; where Newton leaves the square the centre (0.5, 0.5)
    stays (common practice, no source)."""
    t, r, c = (np.asarray(v, dtype=np.int64) for v in (t, r, c))
    n = t.size
    out = np.full((n, 2), 0.5, dtype=np.float64)
    if n == 0:
        return out.astype(np.float32)

    def corner(dr, dc):
        z = np.exp(1j * phase[t, r + dr, c + dc].astype(np.float64))
        return z * amplitude[t, r + dr, c + dc] if amplitude is not None else z

    z00, z01, z10, z11 = corner(0, 0), corner(0, 1), corner(1, 0), corner(1, 1)
    y = np.full(n, 0.5)
    x = np.full(n, 0.5)
    for _ in range(iterations):
        f = (1 - y) * (1 - x) * z00 + (1 - y) * x * z01 + y * (1 - x) * z10 + y * x * z11
        fy = -(1 - x) * z00 - x * z01 + (1 - x) * z10 + x * z11
        fx = -(1 - y) * z00 + (1 - y) * z01 - y * z10 + y * z11
        # solve [Re fy, Re fx; Im fy, Im fx] [dy, dx] = -[Re f, Im f]
        a, b, cc, d = fy.real, fx.real, fy.imag, fx.imag
        det = a * d - b * cc
        ok = np.abs(det) > 1e-12
        det = np.where(ok, det, 1.0)
        dy = np.where(ok, -(d * f.real - b * f.imag) / det, 0.0)
        dx = np.where(ok, -(-cc * f.real + a * f.imag) / det, 0.0)
        y, x = y + dy, x + dx
    inside = (y >= 0) & (y <= 1) & (x >= 0) & (x <= 1) & np.isfinite(y) & np.isfinite(x)
    out[inside, 0] = y[inside]
    out[inside, 1] = x[inside]
    return out.astype(np.float32)

