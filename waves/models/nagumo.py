"""Bistable (Nagumo) medium: one diffusing variable, no recovery.

    u_t = u (1 - u) (u - a) + D lap u,   0 < a < 1/2

Used as a numerical check: a front u = 1 / (1 + exp((x - c t)/sqrt(2 D)))
travels at c = sqrt(D/2) (1 - 2a) (McKean 1970; REFERENCES.md).  It is a
registered model like the others, but makes no waves that recover.

Empty pixels (occupancy 0): no reaction; u diffuses.

Default scales: 60 s per model time unit, 10 um per model length unit
(arbitrary; this is a test medium).

Reaction time-step limit: f_u = -3u^2 + 2(1 + a)u - a stays within
[-1, 1] on 0 <= u <= 1 for 0 < a < 1/2, so dt <= 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit, prange

from waves.errors import WavesError
from waves.models.base import (
    FASTMATH,
    ModelSpec,
    col_neighbours,
    flush,
    flush_numpy,
    laplacian_numpy,
    masked_laplacian,
    param_at,
    params_numpy,
    row_neighbours,
)

__all__ = ["NagumoParams", "run_steps", "numpy_step", "reaction_dt_limit", "front_speed", "SPEC"]


@dataclass(frozen=True)
class NagumoParams:
    """Bistable threshold a (0 < a < 1/2 for a front invading the u = 0 state)."""

    a: float = 0.25

    def __post_init__(self) -> None:
        if not 0.0 < self.a < 1.0:
            raise WavesError(f"Nagumo threshold a must lie in (0, 1), got {self.a}")


def front_speed(a: float, diffusion: float = 1.0) -> float:
    """Exact speed of the bistable front, c = sqrt(D/2) (1 - 2a) (McKean 1970)."""
    return float(np.sqrt(diffusion / 2.0) * (1.0 - 2.0 * a))


@njit(cache=True, nogil=True, inline="always", fastmath=FASTMATH)
def _reaction(u, a):
    one = np.float32(1.0)
    return u * (one - u) * (u - a)


@njit(cache=True, nogil=True, parallel=True, fastmath=FASTMATH)
def run_steps(S, S2, nsteps, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic, general,
              probe_i, probe_j, trace):
    """`nsteps` explicit Euler steps of the Nagumo medium (contract: waves.models.base)."""
    ny = S.shape[1]
    nx = S.shape[2]
    four = np.float32(4.0)
    a0 = p[0]
    Dh = D * inv_h2
    for step in range(nsteps):
        U = S[0]
        U2 = S2[0]
        for i in prange(ny):
            im, ip = row_neighbours(i, ny, periodic)
            ur = U[i]
            um = U[im]
            up = U[ip]
            uo = U2[i]
            if not general:
                for j in (0, nx - 1):
                    jm, jp = col_neighbours(j, nx, periodic)
                    uc = ur[j]
                    lap = um[j] + up[j] + ur[jm] + ur[jp] - four * uc
                    uo[j] = flush(uc + dt * (_reaction(uc, a0) + Dh * lap))
                for j in range(1, nx - 1):
                    uc = ur[j]
                    lap = um[j] + up[j] + ur[j - 1] + ur[j + 1] - four * uc
                    uo[j] = flush(uc + dt * (_reaction(uc, a0) + Dh * lap))
            else:
                for j in range(nx):
                    jm, jp = col_neighbours(j, nx, periodic)
                    uc = ur[j]
                    lap = masked_laplacian(um, up, ur, dom, i, j, im, ip, jm, jp)
                    a = param_at(p, pf, fidx, 0, i, j)
                    uo[j] = flush(uc + dom[i, j] * dt * (occ[i, j] * _reaction(uc, a) + Dh * lap))
        for k in range(probe_i.size):
            trace[step, k] = S2[0, probe_i[k], probe_j[k]]
        S, S2 = S2, S
    return S


def numpy_step(S, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic):
    """One explicit Euler step in plain numpy (the readable twin of `run_steps`)."""
    (a,) = params_numpy(p, pf, fidx)
    u = S[0]
    lap = laplacian_numpy(u, dom, periodic, inv_h2)
    f = u * (np.float32(1) - u) * (u - a)
    u_new = u + dom * np.float32(dt) * (occ * f + np.float32(D) * lap)
    return flush_numpy(u_new)[None]


def reaction_dt_limit(params: dict) -> tuple[float, str]:
    """dt <= 1: |f_u| <= 1 on 0 <= u <= 1 (module docstring)."""
    return 1.0, "dt <= 1 (|f_u| <= 1 on 0 <= u <= 1)"


SPEC = ModelSpec(
    name="nagumo",
    description="bistable Nagumo medium (travelling fronts; a numerical check)",
    variables=("u",),
    params_type=NagumoParams,
    kernel=run_steps,
    numpy_step=numpy_step,
    reaction_dt_limit=reaction_dt_limit,
    rest=lambda q: (0.0,),
    excited=lambda q: (1.0,),
    refractory=lambda q: (0.0,),
    observable_ranges={"u": (0.0, 1.0)},
    threshold=0.5,
    time_scale_s=60.0,
    length_scale_um=10.0,
    spacing=0.25,
    dt_fraction=0.8,
)
