"""FitzHugh-Nagumo excitable medium.

    u_t = (u - u^3/3 - v) / eps + D lap u
    v_t = eps (u + beta - gamma v)

u is the fast, diffusing variable, v the slow recovery variable.  Defaults
eps = 0.3, beta = 0.7, gamma = 0.5 give spirals of period about 11.2 model
time units: 11.233 at h = 0.5, dt = 0.05 once settled, 11.187 at h = 0.354,
11.166 at h = 0.25, about 11.146 extrapolated (second order in h at fixed
D dt / h^2), so the default grid's period is 0.8 % long [computed; REFERENCES.md
gives 11.225 at h = 0.5, parameters from memory].  The solitary front speed at
h = 0.5 is about 5.5 % slow, and `waves simulate` warns.

Empty pixels (occupancy 0): no reaction; u diffuses through them passively
(a non-excitable gap), v stays frozen.  Fractional occupancy scales both
reaction terms.

Default scales (invented defaults, not measured): 37.5 s per model time unit,
so a spiral turns in about 7 min; 80 um per model length unit (h = 0.5 ->
40 um pixels).

Reaction time-step limit: the fast variable relaxes at rate
|f_u| = |1 - u^2| / eps; on the excited branch u reaches about 2.2, so the
rate is up to about 3.84/eps ~ 4/eps and explicit Euler stays monotone for
dt <= eps/4.
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

__all__ = ["FHNParams", "run_steps", "numpy_step", "reaction_dt_limit", "rest_state", "SPEC"]


@dataclass(frozen=True)
class FHNParams:
    """FitzHugh-Nagumo parameters (dimensionless model units)."""

    eps: float = 0.3
    beta: float = 0.7
    gamma: float = 0.5

    def __post_init__(self) -> None:
        if not self.eps > 0:
            raise WavesError(f"FitzHugh-Nagumo parameter eps must be > 0, got {self.eps}")
        if self.gamma < 0:
            raise WavesError(f"FitzHugh-Nagumo parameter gamma must be >= 0, got {self.gamma}")


@njit(cache=True, nogil=True, inline="always", fastmath=FASTMATH)
def _reaction(u, v, inv_eps, eps, beta, gamma):
    third = np.float32(1.0 / 3.0)
    return (u - third * u * u * u - v) * inv_eps, eps * (u + beta - gamma * v)


@njit(cache=True, nogil=True, parallel=True, fastmath=FASTMATH)
def run_steps(S, S2, nsteps, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic, general,
              probe_i, probe_j, trace):
    """`nsteps` explicit Euler steps of FitzHugh-Nagumo (contract: waves.models.base)."""
    ny = S.shape[1]
    nx = S.shape[2]
    one = np.float32(1.0)
    four = np.float32(4.0)
    e0 = p[0]
    inv_e0 = one / e0
    beta0 = p[1]
    gamma0 = p[2]
    Dh = D * inv_h2
    for step in range(nsteps):
        U = S[0]
        V = S[1]
        U2 = S2[0]
        V2 = S2[1]
        for i in prange(ny):
            im, ip = row_neighbours(i, ny, periodic)
            ur = U[i]
            um = U[im]
            up = U[ip]
            vr = V[i]
            uo = U2[i]
            vo = V2[i]
            if not general:
                for j in (0, nx - 1):
                    jm, jp = col_neighbours(j, nx, periodic)
                    uc = ur[j]
                    vc = vr[j]
                    lap = um[j] + up[j] + ur[jm] + ur[jp] - four * uc
                    fu, fv = _reaction(uc, vc, inv_e0, e0, beta0, gamma0)
                    uo[j] = flush(uc + dt * (fu + Dh * lap))
                    vo[j] = flush(vc + dt * fv)
                for j in range(1, nx - 1):
                    uc = ur[j]
                    vc = vr[j]
                    lap = um[j] + up[j] + ur[j - 1] + ur[j + 1] - four * uc
                    fu, fv = _reaction(uc, vc, inv_e0, e0, beta0, gamma0)
                    uo[j] = flush(uc + dt * (fu + Dh * lap))
                    vo[j] = flush(vc + dt * fv)
            else:
                for j in range(nx):
                    jm, jp = col_neighbours(j, nx, periodic)
                    uc = ur[j]
                    vc = vr[j]
                    lap = masked_laplacian(um, up, ur, dom, i, j, im, ip, jm, jp)
                    e = param_at(p, pf, fidx, 0, i, j)
                    beta = param_at(p, pf, fidx, 1, i, j)
                    gamma = param_at(p, pf, fidx, 2, i, j)
                    fu, fv = _reaction(uc, vc, one / e, e, beta, gamma)
                    oc = occ[i, j]
                    dc = dom[i, j] * dt
                    uo[j] = flush(uc + dc * (oc * fu + Dh * lap))
                    vo[j] = flush(vc + dc * (oc * fv))
        for k in range(probe_i.size):
            trace[step, k] = S2[0, probe_i[k], probe_j[k]]
        S, S2 = S2, S
    return S


def numpy_step(S, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic):
    """One explicit Euler step in plain numpy (the readable twin of `run_steps`)."""
    eps, beta, gamma = params_numpy(p, pf, fidx)
    u, v = S[0], S[1]
    lap = laplacian_numpy(u, dom, periodic, inv_h2)
    fu = (u - u * u * u / np.float32(3) - v) / eps
    fv = eps * (u + beta - gamma * v)
    step = dom * np.float32(dt)
    u_new = u + step * (occ * fu + np.float32(D) * lap)
    v_new = v + step * (occ * fv)
    return np.stack([flush_numpy(u_new), flush_numpy(v_new)])


def reaction_dt_limit(params: dict) -> tuple[float, str]:
    """dt <= eps/4 (fast variable), and dt <= 1/(eps gamma) (slow variable)."""
    eps, gamma = float(params["eps"]), float(params["gamma"])
    fast = eps / 4.0
    slow = 1.0 / (eps * gamma) if gamma > 0 else np.inf
    if fast <= slow:
        return fast, "dt <= eps/4 (fast-variable relaxation rate up to ~4/eps)"
    return slow, "dt <= 1/(eps gamma) (slow-variable relaxation rate eps gamma)"


def rest_state(params: dict) -> tuple[float, float]:
    """The resting state: the real root of u - u^3/3 - (u + beta)/gamma = 0.

    For gamma = 0 the v-nullcline is u = -beta.  Refuses parameter sets with
    several real roots (bistable medium, no unique rest state).
    """
    beta, gamma = float(params["beta"]), float(params["gamma"])
    if gamma == 0:
        u = -beta
        return u, u - u**3 / 3.0
    # -u^3/3 + (1 - 1/gamma) u - beta/gamma = 0
    roots = np.roots([-1.0 / 3.0, 0.0, 1.0 - 1.0 / gamma, -beta / gamma])
    real = roots[np.abs(roots.imag) < 1e-9].real
    if real.size != 1:
        raise WavesError(
            f"FitzHugh-Nagumo with beta = {beta}, gamma = {gamma} has {real.size} rest states; "
            "choose gamma < 1 or a larger beta for an excitable medium"
        )
    u = float(real[0])
    return u, (u + beta) / gamma


SPEC = ModelSpec(
    name="fhn",
    description="FitzHugh-Nagumo two-variable excitable medium",
    variables=("u", "v"),
    params_type=FHNParams,
    kernel=run_steps,
    numpy_step=numpy_step,
    reaction_dt_limit=reaction_dt_limit,
    rest=rest_state,
    excited=lambda q: (2.0, rest_state(q)[1]),
    refractory=lambda q: (rest_state(q)[0], 1.0),
    observable_ranges={"u": (-2.5, 2.5), "v": (-1.5, 1.5)},
    threshold=0.0,
    time_scale_s=37.5,
    length_scale_um=80.0,
    spacing=0.5,
    dt_fraction=0.8,
)
