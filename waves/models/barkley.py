"""Barkley model of an excitable medium (Barkley 1991, Physica D 49:61-70).

    u_t = u (1 - u) (u - (v + b) / a) / eps + D lap u
    v_t = u - v

u is the fast, diffusing excitation variable (0 at rest, 1 excited), v the
slow recovery variable.  Defaults a = 0.75, b = 0.02, eps = 0.02 give rigidly
rotating spirals of period 3.165 model time units at h = 0.25, dt = 0.01 once
settled (REFERENCES.md [computed by two independent solvers]; the spiral needs
tens of turns to settle).  The period converges at second order in h (fixed
D dt / h^2): 3.153 at h = 0.177, 3.148 at h = 0.125, about 3.143 extrapolated,
so the default grid's period is 0.7 % long [computed].  The front (about 0.2
units wide) is under-resolved at h = 0.25: its solitary speed is about 7 %
slow (4.21 against about 4.52 converged), and `waves simulate` warns.

Empty pixels (occupancy 0): no reaction at all; u diffuses through them
passively (a non-excitable gap that loads passing fronts), v stays frozen.
Fractional occupancy scales both reaction terms.

Default scales (invented defaults, not measured): 130 s per model time unit,
so a spiral turns in about 7 min; 200 um per model length unit, so the spiral
wavelength (about 12 model units) is about 2.4 mm; h = 0.25 -> 50 um pixels.

Reaction time-step limit: with u_th = (v + b)/a, the fast variable relaxes
at rate |f_u| = u_th/eps at u = 0 and (1 - u_th)/eps at u = 1; v stays below
about 1 (it follows u <= 1), so the rate is at most max(1, (1 + b)/a)/eps.
Explicit Euler keeps that relaxation monotone for dt * rate <= 1, hence
dt <= eps / max(1, (1 + b)/a)  (= eps / 1.36 for the defaults).
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

__all__ = ["BarkleyParams", "run_steps", "numpy_step", "reaction_dt_limit", "SPEC"]


@dataclass(frozen=True)
class BarkleyParams:
    """Barkley parameters (dimensionless model units)."""

    a: float = 0.75
    b: float = 0.02
    eps: float = 0.02

    def __post_init__(self) -> None:
        if not self.a > 0:
            raise WavesError(f"Barkley parameter a must be > 0, got {self.a}")
        if not self.eps > 0:
            raise WavesError(f"Barkley parameter eps must be > 0, got {self.eps}")


# A value decaying at rate 1/eps per model time unit needs thousands of steps to
# fall from TINY (1e-30) to the subnormal range (below 1.2e-38), so flushing
# every 32 steps keeps the state free of subnormals.
FLUSH_EVERY = 32


@njit(cache=True, nogil=True, inline="always", fastmath=FASTMATH)
def _reaction(u, v, inv_a, b, inv_eps):
    one = np.float32(1.0)
    return u * (one - u) * (u - (v + b) * inv_a) * inv_eps, u - v


@njit(cache=True, nogil=True, parallel=True, fastmath=FASTMATH)
def run_steps(S, S2, nsteps, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic, general,
              probe_i, probe_j, trace):
    """`nsteps` explicit Euler steps of the Barkley model (contract: waves.models.base)."""
    ny = S.shape[1]
    nx = S.shape[2]
    one = np.float32(1.0)
    four = np.float32(4.0)
    a0 = p[0]
    b0 = p[1]
    inv_a0 = one / a0
    inv_e0 = one / p[2]
    Dh = D * inv_h2
    ba0 = b0 * inv_a0
    dt_e0 = dt * inv_e0
    dtDh = dt * Dh
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
                    fu, fv = _reaction(uc, vc, inv_a0, b0, inv_e0)
                    uo[j] = flush(uc + dt * (fu + Dh * lap))
                    vo[j] = flush(vc + dt * fv)
                # the interior: the same formula with the constants folded; values
                # decaying towards rest are flushed to 0 every FLUSH_EVERY steps
                # (below), long before they could become subnormal
                for j in range(1, nx - 1):
                    uc = ur[j]
                    vc = vr[j]
                    lap = um[j] + up[j] + ur[j - 1] + ur[j + 1] - four * uc
                    react = uc * (one - uc) * (uc - vc * inv_a0 - ba0)
                    uo[j] = uc + dt_e0 * react + dtDh * lap
                    vo[j] = vc + dt * (uc - vc)
                if step % FLUSH_EVERY == FLUSH_EVERY - 1 or step == nsteps - 1:
                    for j in range(1, nx - 1):
                        uo[j] = flush(uo[j])
                        vo[j] = flush(vo[j])
            else:
                for j in range(nx):
                    jm, jp = col_neighbours(j, nx, periodic)
                    uc = ur[j]
                    vc = vr[j]
                    lap = masked_laplacian(um, up, ur, dom, i, j, im, ip, jm, jp)
                    a = param_at(p, pf, fidx, 0, i, j)
                    b = param_at(p, pf, fidx, 1, i, j)
                    e = param_at(p, pf, fidx, 2, i, j)
                    fu, fv = _reaction(uc, vc, one / a, b, one / e)
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
    a, b, eps = params_numpy(p, pf, fidx)
    u, v = S[0], S[1]
    lap = laplacian_numpy(u, dom, periodic, inv_h2)
    fu = u * (np.float32(1) - u) * (u - (v + b) / a) / eps
    fv = u - v
    step = dom * np.float32(dt)
    u_new = u + step * (occ * fu + np.float32(D) * lap)
    v_new = v + step * (occ * fv)
    return np.stack([flush_numpy(u_new), flush_numpy(v_new)])


def reaction_dt_limit(params: dict) -> tuple[float, str]:
    """dt <= eps / max(1, (1 + b)/a): the fast-variable relaxation rate bound
    (module docstring)."""
    a, b, eps = float(params["a"]), float(params["b"]), float(params["eps"])
    return (
        eps / max(1.0, (1.0 + b) / a),
        "dt <= eps / max(1, (1 + b)/a) (fast-variable relaxation rate up to max(1, u_th)/eps)",
    )


SPEC = ModelSpec(
    name="barkley",
    description="Barkley two-variable excitable medium (spirals, target waves)",
    variables=("u", "v"),
    params_type=BarkleyParams,
    kernel=run_steps,
    numpy_step=numpy_step,
    reaction_dt_limit=reaction_dt_limit,
    rest=lambda q: (0.0, 0.0),
    excited=lambda q: (1.0, 0.0),
    refractory=lambda q: (0.0, q["a"] + q["b"]),
    observable_ranges={"u": (0.0, 1.0), "v": (0.0, 1.0)},
    threshold=0.5,
    time_scale_s=130.0,
    length_scale_um=200.0,
    spacing=0.25,
    dt_fraction=0.8,
)
