"""The competing sources' phase field, evaluated frame block by frame block
(compiled, with a numpy twin): the engine under waves.synthetic."""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
from numba import njit

from waves.synthetic_sources import (
    PlanarSource,
    Source,
    SpiralSource,
    _FiringLaw,
    _law_of,
    core_position,
    moves,
    travel_delay_min,
)

_TWO_PI = 2.0 * math.pi
# elements (frames x pixels) evaluated at once; float64 temporaries of this
# size are 16 MiB each
_BLOCK_ELEMENTS = 1 << 21
@njit(cache=True, nogil=True)
def _law_phase_scalar(tau: float, t0: float, t1: float, d: float) -> float:
    """Scalar twin of `_PeriodLaw.phase` (radians, Phi(0) = 0)."""
    if t1 == t0:
        return tau * (_TWO_PI / t0)
    a = (t1 - t0) / d
    tm = min(max(tau, 0.0), d)
    out = math.log1p(tm * (a / t0)) * (_TWO_PI / a)
    out += min(tau, 0.0) * (_TWO_PI / t0)
    out += max(tau - d, 0.0) * (_TWO_PI / t1)
    return out


@njit(cache=True, nogil=True)
def _competition_kernel(
    t_min: np.ndarray,  # (nb,) frame times, min
    delay_min: np.ndarray,  # (ns, ny, nx) travel delay, min
    angular: np.ndarray,  # (na, ny, nx) q * theta_disp of the spirals, rad
    angular_index: np.ndarray,  # (ns,) row of `angular`, or -1
    phase0: np.ndarray,  # (ns,)
    t0: np.ndarray,  # (ns,) period laws
    t1: np.ndarray,
    d: np.ndarray,
    out_phase: np.ndarray,  # (nb, ny, nx) float32
    out_label: np.ndarray,  # (nb, ny, nx) int16
) -> None:
    """Compiled twin of `_Evaluator.block_numpy`: largest unwrapped phase wins
    (strictly, so ties stay with the lower index), wrapped into (-pi, pi]."""
    nb = t_min.shape[0]
    ns, ny, nx = delay_min.shape
    pi32 = np.float32(math.pi)
    for b in range(nb):
        t = t_min[b]
        for i in range(ny):
            for j in range(nx):
                best = -np.inf
                lab = 0
                for s in range(ns):
                    u = _law_phase_scalar(t - delay_min[s, i, j], t0[s], t1[s], d[s])
                    k = angular_index[s]
                    if k >= 0:
                        u += angular[k, i, j]
                    u += phase0[s]
                    if u > best:
                        best = u
                        lab = s
                best -= _TWO_PI * math.ceil((best - math.pi) / _TWO_PI)
                w = np.float32(best)
                if w <= -pi32 or w > pi32:
                    w = pi32
                out_phase[b, i, j] = w
                out_label[b, i, j] = lab


class _Evaluator:
    """Evaluates the competing unwrapped phases of all sources frame block by block."""

    def __init__(
        self,
        sources: tuple[Source, ...],
        shape_tyx: tuple[int, int, int],
        *,
        pixel_size_um: float,
        frame_interval_s: float,
        speed_um_per_min: float,
        origin_px: tuple[int, int] = (0, 0),
    ) -> None:
        # origin_px: grid pixel (r, c) sits at y_um = (r - origin_px[0]) * pixel_size_um
        # (a padded canvas around the field; (0, 0) is the field itself)
        nt, ny, nx = shape_tyx
        self.shape_tyx = shape_tyx
        self.dt_min = frame_interval_s / 60.0
        last = (nt - 1) * self.dt_min
        self.laws = [_law_of(s, last) for s in sources]
        self.sources = sources
        y = ((np.arange(ny, dtype=np.float64) - origin_px[0]) * pixel_size_um)[:, None]
        x = ((np.arange(nx, dtype=np.float64) - origin_px[1]) * pixel_size_um)[None, :]
        self.y, self.x, self.speed = y, x, speed_um_per_min
        # moving cores and firing-time laws have no compiled path: numpy only
        self.numpy_only = any(moves(s) or isinstance(law, _FiringLaw)
                              for s, law in zip(sources, self.laws, strict=True))
        # static per-source parts: travel delay (min) and, for spirals, the angular term (rad)
        ns = len(sources)
        n_spirals = sum(isinstance(s, SpiralSource) for s in sources)
        self.delay_min = np.empty((ns, ny, nx), dtype=np.float64)
        self.angular = np.empty((n_spirals, ny, nx), dtype=np.float64)
        self.angular_index = np.full(ns, -1, dtype=np.int64)
        k = 0
        for i, s in enumerate(sources):
            if isinstance(s, PlanarSource):
                a = math.radians(s.direction_deg)
                dist = x * math.cos(a) - y * math.sin(a)
            else:
                dy, dx = y - s.y_um, x - s.x_um
                dist = np.hypot(dx, dy)
                if isinstance(s, SpiralSource):
                    self.angular[k] = s.charge * np.arctan2(-dy, dx)
                    self.angular_index[i] = k
                    k += 1
            self.delay_min[i] = travel_delay_min(s, dist, speed_um_per_min)
        self.phase0 = np.array([s.phase0 for s in sources], dtype=np.float64)
        self.t0 = np.array([law.t0 for law in self.laws], dtype=np.float64)
        self.t1 = np.array([law.t1 for law in self.laws], dtype=np.float64)
        self.d = np.array([law.d for law in self.laws], dtype=np.float64)
        self.frames_per_block = max(1, _BLOCK_ELEMENTS // (ny * nx))

    def _times(self, start: int, stop: int) -> np.ndarray:
        return np.arange(start, stop, dtype=np.float64) * self.dt_min

    def block(self, start: int, stop: int) -> tuple[np.ndarray, np.ndarray]:
        """Wrapped phase (float32, (-pi, pi]) and winner labels (int16) of
        frames start..stop-1 (compiled kernel; the numpy twin when a core
        moves or a source has jittered firing times)."""
        if self.numpy_only:
            return self.block_numpy(start, stop)
        shape = (stop - start,) + self.shape_tyx[1:]
        phase = np.empty(shape, dtype=np.float32)
        label = np.empty(shape, dtype=np.int16)
        _competition_kernel(
            self._times(start, stop), self.delay_min, self.angular, self.angular_index,
            self.phase0, self.t0, self.t1, self.d, phase, label,
        )
        return phase, label

    def block_numpy(self, start: int, stop: int) -> tuple[np.ndarray, np.ndarray]:
        """Readable numpy twin of `block`."""
        t = self._times(start, stop)[:, None, None]
        label = np.zeros((stop - start,) + self.shape_tyx[1:], dtype=np.int16)
        best = self._unwrapped(0, t)
        for i in range(1, len(self.sources)):
            u = self._unwrapped(i, t)
            label[u > best] = i  # strict: exact ties stay with the lower index
            np.maximum(best, u, out=best)
        # wrap into (-pi, pi]
        best -= _TWO_PI * np.ceil((best - math.pi) / _TWO_PI)
        phase = best.astype(np.float32)
        pi32 = np.float32(math.pi)
        phase[(phase <= -pi32) | (phase > pi32)] = pi32
        return phase, label

    def _unwrapped(self, i: int, t: np.ndarray) -> np.ndarray:
        """Unwrapped phase (float64) of source i at frame times t (t, 1, 1)."""
        src = self.sources[i]
        if moves(src):
            # the spiral about where the core is at each frame time (exact path)
            xc, yc = core_position(src, t)
            dy, dx = self.y[None] - yc, self.x[None] - xc
            return (self.laws[i].phase(t - np.hypot(dx, dy) / self.speed)
                    + src.charge * np.arctan2(-dy, dx) + src.phase0)
        u = self.laws[i].phase(t - self.delay_min[i][None])
        k = self.angular_index[i]
        if k >= 0:
            u += self.angular[k][None]
        u += self.sources[i].phase0
        return u

    def blocks(self) -> Iterator[tuple[int, np.ndarray, np.ndarray]]:
        nt = self.shape_tyx[0]
        for start in range(0, nt, self.frames_per_block):
            stop = min(nt, start + self.frames_per_block)
            phase, label = self.block(start, stop)
            yield start, phase, label
