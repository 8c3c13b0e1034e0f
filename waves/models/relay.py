"""Martiel-Goldbeter cAMP relay model (receptor desensitisation), well mixed and in space.

Martiel & Goldbeter 1987, Biophys J 52:807-828.  Time in minutes (model time
unit: 60 s); model length unit 100 um (`LENGTH_UNIT_UM`), so D = 24000 um^2/min
is 2.4 model units and the default grid step 0.2 units is 20 um.  Three
dimensionless variables per site, in state order:

    g    extracellular cAMP, scaled by the receptor dissociation constant (diffuses)
    rho  fraction of cAMP receptors in the active state (0..1)
    b    intracellular cAMP, scaled the same way

    d g/dt   = (kt / h) b - ke g + D lap g
    d rho/dt = -f1(g) rho + f2(g) (1 - rho)
    d b/dt   = q sigma Phi(rho, g, alpha) - (ki + kt) b

    f1 = (k1 + k2 g) / (1 + g)          f2 = (k1 L1 + k2 L2 c g) / (1 + c g)
    Y  = rho g / (1 + g)                 Phi = alpha (lambda theta + e Y^2)
                                               / (1 + alpha theta + (1 + alpha) e Y^2)

Defaults: Table 2 of the paper [transcribed, REFERENCES.md]; D = 24000 um^2/min
(0.024 mm^2/min, the value used in relay-wave models [memory]).  With them the
well-mixed cells oscillate with a period of 10.67 min (ke = 5.4 /min); at
ke = 10 /min they are excitable (a stable rest state, one spike per
supra-threshold cAMP pulse) [computed, REFERENCES.md].

The two-variable reduction (`variables=2` in the well-mixed functions) puts b
at its quasi-steady state b = q sigma Phi / (ki + kt), so that
d g/dt = q' sigma Phi - ke g with q' = q kt / (h (ki + kt)).  The spatial
kernel integrates the full three-variable model.

Cells and space (grid conventions: `waves.models.grid`).  Only g diffuses;
rho and b belong to the cells.  The occupancy (0..1, local cell density as a
fraction of the reference density) multiplies the secretion term (kt / h) b.
Where occupancy is 0 there are no cells: no synthesis (b decays to 0 and
stays there, no relay), while cAMP still diffuses and is degraded at ke.
Any parameter may vary in space (framework multipliers); the useful one is
ke: raised ke makes an excitable background, lowered ke in a disc makes a
pacemaker.  Its period is longer than the well-mixed period of that ke
(`oscillation_period`) because cAMP diffuses out of the disc, and approaches
it as the disc grows: ke = 3 /min in a ke = 10 field fires every 9.7, 8.05,
7.53, 7.31 min for radii 200, 400, 800, 1200 um, against 7.14 min well mixed
[computed here].  `broken_wave_state` starts a spiral (the framework's generic
broken wave has a refractory strip far narrower than the relay wake, which
the wave simply walks around).

Measured here [computed], Table 2 with ke = 10 /min, D = 24000 um^2/min:
planar front speed 400 um/min (399.99, 398.8, 394.1, 376.8 um/min at grid
steps 5, 10, 20, 40 um), inside the 300-600 um/min of early aggregation
fields [memory, REFERENCES.md]; a spiral turns every 7.7 min (40 um grid)
with a wavelength of about 3 mm.  Dispersion: trains paced every 30, 15, 10,
7.6 min run at 390, 384, 341, 255 um/min (25 um grid): faster trains run into
less recovered cells and are slower.

Numerics: explicit (forward) Euler, 5-point Laplacian (`waves.models.base`).
The compiled kernel `run_steps` and its numpy twin `numpy_step` follow the
model contract of `waves.models.base`; the well-mixed integrator calls the
same compiled reaction function as the kernel, in float32.

Reaction time-step limit (`reaction_dt_limit`): in each forward-Euler update
the new value is a convex combination of old values, so that rho stays in
[0, 1] and b, g stay >= 0, when

    dt (f1 + f2) <= 1,   f1 + f2 <= max(k1, k2) + max(k1 L1, k2 L2)
    dt (ki + kt) <= 1,   dt ke <= 1.

Beyond it g can turn negative and 1 + g can reach zero in f1; the run is
wrong before it overflows (measured here in the well-mixed model: periods off
by 6 % at dt = 0.2 min and blow-up at dt = 0.3 min for ke = 5.4; ke = 8 gives a
wrong period at dt = 0.2 min, i.e. dt ke = 1.6).  The framework adds the
diffusion limit dt <= dx^2 / (4 D); since both limits together still let the
checkerboard mode of g grow (von Neumann: 8 r + dt ke <= 2 is needed,
r = D dt / dx^2), the default dt is half the smaller limit.  The limit is for
stability, not accuracy: the well-mixed period at ke = 5.4 is 10.74 min at
dt = 0.01 min and 10.69 min at dt = 0.002 min against 10.67 min [computed]; keep
dt <= 0.01 min for periods to about 1 %.

Rendering: `excitation_from_g` maps g monotonically into [0, 1)
(g / (g + g_half)); cells elongate and move while cAMP is high, so the excited
bands of a dark-field movie are the high-cAMP bands.  Which way that shows up
(bright or dark) is a rendering option, never assumed.
"""


from __future__ import annotations

import functools
import math
from dataclasses import astuple, fields

import numpy as np
from numba import njit, prange

from waves.errors import SimulationError, WavesError
from waves.models.base import (
    Integrator,
    ModelSpec,
    col_neighbours,
    laplacian_numpy,
    masked_laplacian,
    param_at,
    params_numpy,
    row_neighbours,
)
from waves.models.grid import Grid
from waves.models.relay_kinetics import (
    _FASTMATH,
    PeriodResult,
    RelayParams,
    RelayRestState,
    WellMixedRun,
    _as_params,
    _coefficients,
    _reaction,
    oscillation_period,
    reaction_dt_limit,
    relay_rhs,
    rest_state,
    steady_states,
    well_mixed_run,
)

__all__ = [
    "RelayParams",
    "RelayRestState",
    "WellMixedRun",
    "PeriodResult",
    "relay_rhs",
    "steady_states",
    "rest_state",
    "well_mixed_run",
    "oscillation_period",
    "excitation_from_g",
    "broken_wave_state",
    "run_steps",
    "numpy_step",
    "reaction_dt_limit",
    "SPEC",
    "DIFFUSION_UM2_PER_MIN",
    "LENGTH_UNIT_UM",
]

DIFFUSION_UM2_PER_MIN = 24000.0  # cAMP, 0.024 mm^2/min = 4e-6 cm^2/s [memory, REFERENCES.md]
# model length unit: 100 um, so the framework's stimulus sizes (a few model units) are a few
# hundred um, the scale of a relay front (about 50 um wide) and far below its wavelength (mm)
LENGTH_UNIT_UM = 100.0
# fastmath flags of this module: FMA contraction only.  'arcp' (approximate reciprocals, in
# base.FASTMATH) made the freshly compiled and the cache-loaded kernel round differently
# (measured here), which breaks bit-for-bit regeneration of samples.


@njit(cache=True, nogil=True, parallel=True, fastmath=_FASTMATH)
def run_steps(S, S2, nsteps, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic, general,
              probe_i, probe_j, trace):
    """`nsteps` explicit Euler steps of the relay model (contract: waves.models.base).

    S[0] = g (diffuses), S[1] = rho, S[2] = b.
    """
    ny = S.shape[1]
    nx = S.shape[2]
    one = np.float32(1.0)
    four = np.float32(4.0)
    Dh = D * inv_h2
    k1, k2, f2a, f2b, c, n0, n1, d0, d1, qs, kb, ks = _coefficients(
        p[0], p[1], p[2], p[3], p[4], p[5], p[6], p[7], p[8], p[9], p[10], p[11], p[13], p[14]
    )
    ke0 = p[12]
    uniform_rates = True  # no parameter but ke is a field
    for k in range(fidx.size):
        if k != 12 and fidx[k] >= 0:
            uniform_rates = False
    for step in range(nsteps):
        G = S[0]
        R = S[1]
        B = S[2]
        G2 = S2[0]
        R2 = S2[1]
        B2 = S2[2]
        for i in prange(ny):
            im, ip = row_neighbours(i, ny, periodic)
            gr = G[i]
            gm = G[im]
            gp = G[ip]
            rr = R[i]
            br = B[i]
            go = G2[i]
            ro = R2[i]
            bo = B2[i]
            if not general:
                for j in (0, nx - 1):
                    jm, jp = col_neighbours(j, nx, periodic)
                    gc = gr[j]
                    rc = rr[j]
                    bc = br[j]
                    lap = gm[j] + gp[j] + gr[jm] + gr[jp] - four * gc
                    dg, drho, db = _reaction(gc, rc, bc, ke0, one, k1, k2, f2a, f2b, c,
                                             n0, n1, d0, d1, qs, kb, ks)
                    go[j] = gc + dt * (dg + Dh * lap)
                    ro[j] = rc + dt * drho
                    bo[j] = bc + dt * db
                for j in range(1, nx - 1):
                    gc = gr[j]
                    rc = rr[j]
                    bc = br[j]
                    lap = gm[j] + gp[j] + gr[j - 1] + gr[j + 1] - four * gc
                    dg, drho, db = _reaction(gc, rc, bc, ke0, one, k1, k2, f2a, f2b, c,
                                             n0, n1, d0, d1, qs, kb, ks)
                    go[j] = gc + dt * (dg + Dh * lap)
                    ro[j] = rc + dt * drho
                    bo[j] = bc + dt * db
            elif uniform_rates:
                # only ke varies in space: the other coefficients are the scalars above
                for j in range(nx):
                    jm, jp = col_neighbours(j, nx, periodic)
                    gc = gr[j]
                    rc = rr[j]
                    bc = br[j]
                    lap = masked_laplacian(gm, gp, gr, dom, i, j, im, ip, jm, jp)
                    ke = param_at(p, pf, fidx, 12, i, j)
                    dg, drho, db = _reaction(gc, rc, bc, ke, occ[i, j], k1, k2, f2a, f2b, c,
                                             n0, n1, d0, d1, qs, kb, ks)
                    dc = dom[i, j] * dt
                    go[j] = gc + dc * (dg + Dh * lap)
                    ro[j] = rc + dc * drho
                    bo[j] = bc + dc * db
            else:
                for j in range(nx):
                    jm, jp = col_neighbours(j, nx, periodic)
                    gc = gr[j]
                    rc = rr[j]
                    bc = br[j]
                    lap = masked_laplacian(gm, gp, gr, dom, i, j, im, ip, jm, jp)
                    ck1, ck2, cf2a, cf2b, cc, cn0, cn1, cd0, cd1, cqs, ckb, cks = _coefficients(
                        param_at(p, pf, fidx, 0, i, j),
                        param_at(p, pf, fidx, 1, i, j),
                        param_at(p, pf, fidx, 2, i, j),
                        param_at(p, pf, fidx, 3, i, j),
                        param_at(p, pf, fidx, 4, i, j),
                        param_at(p, pf, fidx, 5, i, j),
                        param_at(p, pf, fidx, 6, i, j),
                        param_at(p, pf, fidx, 7, i, j),
                        param_at(p, pf, fidx, 8, i, j),
                        param_at(p, pf, fidx, 9, i, j),
                        param_at(p, pf, fidx, 10, i, j),
                        param_at(p, pf, fidx, 11, i, j),
                        param_at(p, pf, fidx, 13, i, j),
                        param_at(p, pf, fidx, 14, i, j),
                    )
                    ke = param_at(p, pf, fidx, 12, i, j)
                    dg, drho, db = _reaction(gc, rc, bc, ke, occ[i, j], ck1, ck2, cf2a, cf2b,
                                             cc, cn0, cn1, cd0, cd1, cqs, ckb, cks)
                    dc = dom[i, j] * dt
                    go[j] = gc + dc * (dg + Dh * lap)
                    ro[j] = rc + dc * drho
                    bo[j] = bc + dc * db
        for k in range(probe_i.size):
            trace[step, k] = S2[0, probe_i[k], probe_j[k]]
        S, S2 = S2, S
    return S


def numpy_step(S, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic):
    """One explicit Euler step in plain numpy (the readable twin of `run_steps`)."""
    k1, k2, L1, L2, c, lam, theta, e, q, sigma, ki, kt, ke, h, alpha = params_numpy(p, pf, fidx)
    one = np.float32(1.0)
    g, rho, b = S[0], S[1], S[2]
    lap = laplacian_numpy(g, dom, periodic, inv_h2)
    f1 = (k1 + k2 * g) / (one + g)
    f2 = (k1 * L1 + k2 * L2 * c * g) / (one + c * g)
    y = rho * g / (one + g)
    phi = alpha * (lam * theta + e * y * y) / (one + alpha * theta + (one + alpha) * e * y * y)
    synth = np.where(occ > 0, q * sigma * phi, np.float32(0.0))
    step = dom * np.float32(dt)
    g_new = g + step * (occ * (kt / h) * b - ke * g + np.float32(D) * lap)
    rho_new = rho + step * (-f1 * rho + f2 * (one - rho))
    b_new = b + step * (synth - (ki + kt) * b)
    return np.stack([g_new, rho_new, b_new]).astype(np.float32)




# --------------------------------------------------------------------------- states, rendering


@functools.lru_cache(maxsize=64)
def _characteristic_states(values: tuple) -> tuple[tuple, tuple, tuple]:
    """(rest, excited, refractory) states (g, rho, b) for parameter values in field order.

    rest: the low-cAMP steady state.  excited: the state at the peak of g of
    the spike that a g pulse of +1 evokes from rest.  refractory: the first
    state after that peak with g back within 0.03 of rest (receptors still
    desensitised, rho about 0.33 at ke = 10 /min, so it neither fires nor
    leaks enough cAMP to excite resting neighbours).
    """
    p = RelayParams(*values)
    r = rest_state(p)
    run = well_mixed_run(p, t_end_min=30.0, dt_min=0.002, sample_every_min=0.002,
                         initial=(r.g + 1.0, r.rho, r.b))
    k = int(np.argmax(run.g))
    back = np.nonzero(run.g[k:] <= r.g + 0.03)[0]
    m = k + (int(back[0]) if back.size else int(np.argmin(run.rho[k:])))
    rest = (r.g, r.rho, r.b)
    excited = (float(run.g[k]), float(run.rho[k]), float(run.b[k]))
    refractory = (float(run.g[m]), float(run.rho[m]), float(run.b[m]))
    return rest, excited, refractory


def _state_of(kind: int):
    def state(params: dict) -> tuple[float, float, float]:
        p = _as_params(params)
        return _characteristic_states(astuple(p))[kind]

    return state


def excitation_from_g(g, *, g_half: float = 1.0) -> np.ndarray:
    """Map extracellular cAMP g to excitation in [0, 1) for rendering: g / (g + g_half).

    Monotone increasing; rest (g ~ 0.01) maps to about 0.01, a relay spike
    (g ~ 5-8) to about 0.85-0.9.  Negative g (never produced by a stable run)
    is clipped to 0.  float32 out.
    """
    if not (math.isfinite(g_half) and g_half > 0):
        raise WavesError(f"g_half must be a positive number, got {g_half!r}")
    g = np.maximum(np.asarray(g, dtype=np.float32), np.float32(0.0))
    return (g / (g + np.float32(g_half))).astype(np.float32)


def _initial_state(params, shape_yx, *, spacing, kind, rotation, center_yx, rng, dt, diffusion):
    """SPEC hook: the relay's own broken wave for kind 'spiral' (its wake is
    far wider than the framework's generic refractory strip); None otherwise,
    so the generic initial conditions apply."""
    if kind != "spiral":
        return None
    return broken_wave_state(
        RelayParams(**params), shape_yx, spacing=spacing, core_yx=center_yx, rotation=rotation,
        dt=dt, diffusion=diffusion,
    )


SPEC = ModelSpec(
    name="relay",
    description="Martiel-Goldbeter cAMP relay (receptor desensitisation) in a cell field",
    variables=("g", "rho", "b"),
    params_type=RelayParams,
    kernel=run_steps,
    numpy_step=numpy_step,
    reaction_dt_limit=reaction_dt_limit,
    rest=_state_of(0),
    excited=_state_of(1),
    refractory=_state_of(2),
    observable_ranges={"g": (0.0, 10.0), "rho": (0.0, 1.0), "b": (0.0, 400.0)},
    threshold=1.0,
    time_scale_s=60.0,
    length_scale_um=LENGTH_UNIT_UM,
    spacing=20.0 / LENGTH_UNIT_UM,
    dt_fraction=0.5,
    diffusion=DIFFUSION_UM2_PER_MIN / LENGTH_UNIT_UM**2,
    initial_state=_initial_state,
)


def broken_wave_state(
    params: RelayParams,
    shape_yx: tuple[int, int],
    *,
    spacing: float,
    core_yx: tuple[float, float] | None = None,
    rotation: str = "counterclockwise",
    dt: float | None = None,
    diffusion: float | None = None,
) -> np.ndarray:
    """float32 state (3, rows, cols) of a relay wave broken at `core_yx` (pixels).

    A 1-D row at rest is stimulated at one end and run (same kernel, same dt)
    until its front reaches the core column; that row, with its whole
    refractory wake, fills the rows above the core, the rows below stay at
    rest.  The free end of the front curls into a spiral turning as `rotation`
    says on the displayed image (front moving left above the core:
    counterclockwise; its mirror image: clockwise; same convention as
    `waves.models.stimulus`).  The framework's generic broken wave uses a
    refractory strip a few model units wide, far narrower than the relay wake
    (mm), which a relay wave simply walks around.

    spacing and diffusion in model length units (default: SPEC's D);
    dt defaults to SPEC.dt_fraction times the stability limit.
    """
    p = _as_params(params)
    values = {f.name: getattr(p, f.name) for f in fields(p)}
    ny, nx = (int(n) for n in shape_yx)
    if nx < 8 or ny < 2:
        raise WavesError(f"grid {ny} x {nx} is too small for a broken wave; use at least 2 x 8")
    if rotation not in ("counterclockwise", "clockwise"):
        raise WavesError(f"rotation must be 'counterclockwise' or 'clockwise', got {rotation!r}")
    D = SPEC.diffusion if diffusion is None else float(diffusion)
    if dt is None:
        dt = SPEC.dt_fraction * min(spacing * spacing / (2.0 * D) if D > 0 else math.inf,
                                    reaction_dt_limit(values)[0])
    cy, cx = ((ny - 1) / 2.0, (nx - 1) / 2.0) if core_yx is None else core_yx
    c0 = int(np.clip(round(cx), 1, nx - 2))
    r = rest_state(p)
    line = np.empty((3, 1, nx), np.float32)
    line[0], line[1], line[2] = r.g, r.rho, r.b
    # stimulate the right end; the front travels left (counterclockwise case)
    ex = _characteristic_states(astuple(p))[1]
    width = max(2, nx // 40)
    for k in range(3):
        line[k, 0, nx - width:] = ex[k]
    it = Integrator(SPEC, Grid((1, nx), spacing), values, line, dt=dt, diffusion=D,
                    probes_yx=np.array([[0, c0]]))
    chunk = max(1, int(round(0.05 / dt)))
    # give up if the front is slower than 50 um/min (a relay front runs at about 400 um/min)
    max_steps = int(nx * spacing * LENGTH_UNIT_UM / 50.0 / dt) + 10 * chunk
    done = 0
    while done < max_steps:
        trace = it.advance(chunk)
        done += chunk
        if np.any(trace[:, 0] >= SPEC.threshold):
            break
    else:
        raise SimulationError(
            "the relay front did not propagate along the row (is the medium excitable at "
            f"ke = {p.ke_per_min:g} /min?); raise ke or check the parameters"
        )
    row = it.state[:, 0, :].copy()
    if rotation == "clockwise":
        row = row[:, ::-1]
        c0 = nx - 1 - c0
    state = np.empty((3, ny, nx), np.float32)
    state[0], state[1], state[2] = r.g, r.rho, r.b
    above = np.arange(ny) < cy
    state[:, above, :] = row[:, None, :]
    return state
