"""Martiel-Goldbeter relay kinetics of one cell population: parameters, the compiled
reaction (shared with the spatial kernel in `waves.models.relay`), the numpy right-hand
side, steady states, well-mixed runs and the oscillation period.  The model, its units
and its numerics are described in `waves.models.relay`."""

from __future__ import annotations

import math
from dataclasses import astuple, dataclass, fields

import numpy as np
from numba import njit

from waves.errors import SimulationError, StabilityError, WavesError

# fastmath flags of the relay model: FMA contraction only.  'arcp' (approximate reciprocals, in
# base.FASTMATH) made the freshly compiled and the cache-loaded kernel round differently
# (measured here), which breaks bit-for-bit regeneration of samples.
_FASTMATH = {"contract"}


# --------------------------------------------------------------------------- parameters


@dataclass(frozen=True)
class RelayParams:
    """Martiel-Goldbeter parameters: rates in 1/min, the rest dimensionless.

    Field order is the order of the kernel's parameter vector.  Defaults:
    Table 2 of Martiel & Goldbeter 1987 [transcribed, REFERENCES.md].
    `lam` is the paper's lambda.
    """

    k1_per_min: float = 0.036
    k2_per_min: float = 0.666
    L1: float = 10.0
    L2: float = 0.005
    c: float = 10.0
    lam: float = 0.01
    theta: float = 0.01
    e: float = 1.0
    q: float = 4000.0
    sigma_per_min: float = 0.6
    ki_per_min: float = 1.7
    kt_per_min: float = 0.9
    ke_per_min: float = 5.4
    h: float = 5.0
    alpha: float = 3.0

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            try:
                v = float(value)
            except (TypeError, ValueError):
                raise WavesError(
                    f"relay parameter {f.name} must be a number, got {value!r}"
                ) from None
            if not (math.isfinite(v) and v > 0):
                raise WavesError(
                    f"relay parameter {f.name} must be a positive finite number, got {value!r}; "
                    f"the published value is {f.default!r}"
                )
            object.__setattr__(self, f.name, v)

    @property
    def q_reduced(self) -> float:
        """q' = q kt / (h (ki + kt)) of the two-variable reduction."""
        return self.q * self.kt_per_min / (self.h * (self.ki_per_min + self.kt_per_min))

    def vector(self) -> np.ndarray:
        """float32 parameter vector in field order (the kernel's `p`)."""
        return np.array(astuple(self), np.float32)


def _as_params(params) -> RelayParams:
    if isinstance(params, RelayParams):
        return params
    if isinstance(params, dict):
        return RelayParams(**params)
    raise WavesError(f"relay parameters must be RelayParams or a dict, got {type(params).__name__}")


# --------------------------------------------------------------------------- compiled reaction


@njit(cache=True, nogil=True, inline="always", fastmath=_FASTMATH)
def _coefficients(k1, k2, L1, L2, c, lam, theta, e, q, sigma, ki, kt, h, alpha):
    """Combinations of the parameters used by `_reaction` (all float32)."""
    one = np.float32(1.0)
    return (
        k1,
        k2,
        k1 * L1,  # f2 numerator, constant term
        k2 * L2 * c,  # f2 numerator, g term
        c,
        alpha * lam * theta,  # Phi numerator, constant term
        alpha * e,  # Phi numerator, Y^2 term
        one + alpha * theta,  # Phi denominator, constant term
        (one + alpha) * e,  # Phi denominator, Y^2 term
        q * sigma,
        ki + kt,
        kt / h,
    )


@njit(cache=True, nogil=True, inline="always", fastmath=_FASTMATH)
def _synthesis(g, rho, n0, n1, d0, d1, qs):
    """q sigma Phi(rho, g): cAMP synthesis rate inside a cell."""
    one = np.float32(1.0)
    y = rho * g / (one + g)
    y2 = y * y
    return qs * (n0 + n1 * y2) / (d0 + d1 * y2)


@njit(cache=True, nogil=True, inline="always", fastmath=_FASTMATH)
def _reaction(g, rho, b, ke, occ, k1, k2, f2a, f2b, c, n0, n1, d0, d1, qs, kb, ks):
    """(d g/dt without diffusion, d rho/dt, d b/dt) at one site, per minute."""
    one = np.float32(1.0)
    f1 = (k1 + k2 * g) / (one + g)
    f2 = (f2a + f2b * g) / (one + c * g)
    drho = f2 - (f1 + f2) * rho
    if occ > np.float32(0.0):
        synth = _synthesis(g, rho, n0, n1, d0, d1, qs)
    else:
        synth = np.float32(0.0)
    db = synth - kb * b
    dg = occ * ks * b - ke * g
    return dg, drho, db




def reaction_dt_limit(params: dict) -> tuple[float, str]:
    """Positivity limit of the Euler reaction step (module docstring)."""
    q = params
    rho_rate = max(q["k1_per_min"], q["k2_per_min"]) + max(
        q["k1_per_min"] * q["L1"], q["k2_per_min"] * q["L2"]
    )
    rates = {
        "1/(max f1 + max f2)": rho_rate,
        "1/(ki + kt)": q["ki_per_min"] + q["kt_per_min"],
        "1/ke": q["ke_per_min"],
    }
    name = max(rates, key=rates.get)
    return 1.0 / rates[name], f"dt <= {name} (explicit Euler keeps rho in [0, 1] and b, g >= 0)"


# --------------------------------------------------------------------------- numpy rhs


def relay_rhs(g, rho, b, params: RelayParams, *, variables: int = 3, occupancy=1.0):
    """Numpy right-hand side (d g/dt, d rho/dt, d b/dt) in 1/min, without diffusion.

    float64, scalars or arrays.  `variables=2`: the two-variable reduction;
    b is ignored, d b/dt is returned as 0 and d g/dt = occupancy q' sigma Phi - ke g.
    """
    p = _as_params(params)
    _check_variables(variables)
    g = np.asarray(g, dtype=np.float64)
    rho = np.asarray(rho, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    occ = np.asarray(occupancy, dtype=np.float64)
    f1 = (p.k1_per_min + p.k2_per_min * g) / (1.0 + g)
    f2 = (p.k1_per_min * p.L1 + p.k2_per_min * p.L2 * p.c * g) / (1.0 + p.c * g)
    drho = -f1 * rho + f2 * (1.0 - rho)
    y = rho * g / (1.0 + g)
    ey2 = p.e * y * y
    phi = p.alpha * (p.lam * p.theta + ey2) / (1.0 + p.alpha * p.theta + (1.0 + p.alpha) * ey2)
    synth = np.where(occ > 0, p.q * p.sigma_per_min * phi, 0.0)
    kikt = p.ki_per_min + p.kt_per_min
    if variables == 2:
        db = np.zeros_like(synth)
        dg = occ * (p.kt_per_min / p.h) * synth / kikt - p.ke_per_min * g
    else:
        db = synth - kikt * b
        dg = occ * (p.kt_per_min / p.h) * b - p.ke_per_min * g
    return dg, drho, db


def _check_variables(variables) -> None:
    if isinstance(variables, bool) or variables not in (2, 3):
        raise WavesError(
            f"variables must be 3 (full relay model) or 2 (b at quasi-steady state), "
            f"got {variables!r}"
        )


# --------------------------------------------------------------------------- steady states


@dataclass(frozen=True)
class RelayRestState:
    """A homogeneous steady state (g, rho, b) and whether it is linearly stable."""

    g: float
    rho: float
    b: float
    stable: bool


def steady_states(params: RelayParams, *, variables: int = 3) -> tuple[RelayRestState, ...]:
    """All homogeneous steady states of the well-mixed model, lowest g first.

    At steady state rho = f2 / (f1 + f2) and g solves ke g = q' sigma Phi(rho(g), g);
    roots are bracketed on a log-spaced grid of g and refined by bisection.
    Stability is read from the eigenvalues of a central-difference Jacobian of
    `relay_rhs` (of (g, rho) alone for `variables=2`).
    """
    p = _as_params(params)
    _check_variables(variables)

    def rho_of(g):
        f1 = (p.k1_per_min + p.k2_per_min * g) / (1.0 + g)
        f2 = (p.k1_per_min * p.L1 + p.k2_per_min * p.L2 * p.c * g) / (1.0 + p.c * g)
        return f2 / (f1 + f2)

    def synth(g, rho):
        y = rho * g / (1.0 + g)
        ey2 = p.e * y * y
        phi = p.alpha * (p.lam * p.theta + ey2) / (1.0 + p.alpha * p.theta + (1.0 + p.alpha) * ey2)
        return p.q * p.sigma_per_min * phi

    def residual(g):
        # (kt / h) b* - ke g with b* = q sigma Phi / (ki + kt), i.e. q' sigma Phi - ke g
        b_star = synth(g, rho_of(g)) / (p.ki_per_min + p.kt_per_min)
        return (p.kt_per_min / p.h) * b_star - p.ke_per_min * g

    # residual(0) > 0 (basal synthesis); residual(g) < 0 beyond g = q' sigma / ke
    g_hi = p.q_reduced * p.sigma_per_min / p.ke_per_min * 1.01 + 1.0
    grid = np.concatenate([[0.0], np.geomspace(1e-9, g_hi, 4000)])
    res = residual(grid)
    brackets = np.nonzero(np.sign(res[:-1]) != np.sign(res[1:]))[0]
    states = []
    for i in brackets:
        lo, hi = grid[i], grid[i + 1]
        for _ in range(100):
            mid = 0.5 * (lo + hi)
            if (residual(mid) > 0) == (res[i] > 0):
                lo = mid
            else:
                hi = mid
        g = 0.5 * (lo + hi)
        rho = rho_of(g)
        b = synth(g, rho) / (p.ki_per_min + p.kt_per_min)
        x0 = np.array([g, rho, b])
        jac = np.empty((3, 3))
        for j in range(3):
            step = 1e-7 * max(1.0, abs(x0[j]))
            xp = x0.copy()
            xm = x0.copy()
            xp[j] += step
            xm[j] -= step
            fp = np.array(relay_rhs(*xp, p))
            fm = np.array(relay_rhs(*xm, p))
            jac[:, j] = (fp - fm) / (2 * step)
        if variables == 2:
            # eliminate b = b*(g, rho): d b*/dx = jac[2, x] / (ki + kt) for x in (g, rho)
            dbd = jac[2, :2] / (p.ki_per_min + p.kt_per_min)
            jac = np.array([jac[0, :2] + jac[0, 2] * dbd, jac[1, :2] + jac[1, 2] * dbd])
        eig = np.linalg.eigvals(jac)
        states.append(RelayRestState(float(g), float(rho), float(b), bool(np.all(eig.real < 0))))
    return tuple(states)


def rest_state(params: RelayParams) -> RelayRestState:
    """The low-cAMP steady state (lowest g of `steady_states`).

    Stable (the rest state of an excitable medium) at ke = 10 /min; unstable
    where the cells oscillate (ke = 5.4 /min), see `.stable`.
    """
    return steady_states(params)[0]


# --------------------------------------------------------------------------- well mixed


@njit(cache=True, nogil=True, fastmath=_FASTMATH)
def _well_mixed_steps(x, nsteps, every, dt, p, reduced, out):
    """Forward Euler on one site with the kernel's reaction function, float32.

    x = [g, rho, b] (float32) is updated in place; out[0] gets the initial
    state and out[k] the state after k * every steps.  In the reduced model b
    is set to its quasi-steady value before each step.
    """
    k1, k2, f2a, f2b, c, n0, n1, d0, d1, qs, kb, ks = _coefficients(
        p[0], p[1], p[2], p[3], p[4], p[5], p[6], p[7], p[8], p[9], p[10], p[11], p[13], p[14]
    )
    ke = p[12]
    one = np.float32(1.0)
    zero = np.float32(0.0)
    g = x[0]
    rho = x[1]
    b = x[2]
    if reduced:
        b = _synthesis(g, rho, n0, n1, d0, d1, qs) / kb
    out[0, 0] = g
    out[0, 1] = rho
    out[0, 2] = b
    k = 1
    for step in range(1, nsteps + 1):
        if reduced:
            b = _synthesis(g, rho, n0, n1, d0, d1, qs) / kb
        dg, drho, db = _reaction(g, rho, b, ke, one, k1, k2, f2a, f2b, c, n0, n1, d0, d1,
                                 qs, kb, ks)
        g = g + dt * (dg + zero)
        rho = rho + dt * drho
        if not reduced:
            b = b + dt * db
        if step % every == 0:
            if reduced:
                b = _synthesis(g, rho, n0, n1, d0, d1, qs) / kb
            out[k, 0] = g
            out[k, 1] = rho
            out[k, 2] = b
            k += 1
    x[0] = g
    x[1] = rho
    x[2] = b


@dataclass(frozen=True)
class WellMixedRun:
    """Samples of a well-mixed run: t_min (minutes) and g, rho, b (dimensionless)."""

    t_min: np.ndarray
    g: np.ndarray
    rho: np.ndarray
    b: np.ndarray


def well_mixed_run(
    params: RelayParams,
    *,
    t_end_min: float,
    dt_min: float = 0.002,
    sample_every_min: float = 0.01,
    initial: tuple[float, float, float] = (0.01, 0.8, 0.1),
    variables: int = 3,
) -> WellMixedRun:
    """Integrate the well-mixed model with the simulator's Euler reaction step (float32).

    `initial` is (g, rho, b); with `variables=2` b is replaced by its
    quasi-steady value.  Samples every `sample_every_min`, rounded to whole steps.
    """
    p = _as_params(params)
    _check_variables(variables)
    dt = float(dt_min)
    limit, why = reaction_dt_limit({f.name: getattr(p, f.name) for f in fields(p)})
    if not (math.isfinite(dt) and dt > 0):
        raise StabilityError(f"time step dt_min must be a positive number of minutes, got {dt_min!r}")
    if dt > limit:
        raise StabilityError(
            f"time step {dt:g} min is above the reaction limit of the relay model: {why} = "
            f"{limit:.4g} min; use dt_min <= {limit:.4g} (about 0.002-0.01 for accurate periods)"
        )
    if not (math.isfinite(t_end_min) and t_end_min > 0):
        raise WavesError(f"t_end_min must be a positive number of minutes, got {t_end_min!r}")
    every = max(1, int(round(float(sample_every_min) / dt)))
    nsteps = int(round(float(t_end_min) / dt))
    nsteps -= nsteps % every
    if nsteps < every:
        raise WavesError(
            f"t_end_min = {t_end_min} is shorter than one sample interval ({every * dt:g} min); "
            "give a longer run"
        )
    try:
        x = np.array(initial, dtype=np.float32).reshape(3)
    except (TypeError, ValueError):
        raise WavesError(f"initial must be three numbers (g, rho, b), got {initial!r}") from None
    out = np.empty((nsteps // every + 1, 3), np.float32)
    _well_mixed_steps(x, nsteps, every, np.float32(dt), p.vector(), variables == 2, out)
    if not np.all(np.isfinite(out)):
        raise SimulationError(
            f"well-mixed relay run went non-finite with dt_min = {dt:g}; use a smaller dt_min"
        )
    t = np.arange(out.shape[0]) * (every * dt)
    return WellMixedRun(t_min=t, g=out[:, 0].copy(), rho=out[:, 1].copy(), b=out[:, 2].copy())


@dataclass(frozen=True)
class PeriodResult:
    """Autonomous oscillation of the well-mixed model.

    period_min is None when the cells do not oscillate (excitable or steady);
    g_min / g_max are the extremes of g over the measuring window and
    n_cycles the number of whole cycles timed.
    """

    period_min: float | None
    oscillating: bool
    n_cycles: int
    g_min: float
    g_max: float


def oscillation_period(
    params: RelayParams,
    *,
    variables: int = 3,
    dt_min: float = 0.002,
    t_transient_min: float = 300.0,
    t_measure_min: float = 300.0,
) -> PeriodResult:
    """Period (min) of the well-mixed relay oscillation, from upward crossings of g.

    Runs `well_mixed_run`, drops the transient and times upward crossings of
    the mid level of g (linear interpolation between samples).  Oscillating
    means: g swings by more than 1e-3, at least 3 cycles occur, and the swing in
    the last third of the window is at least half the swing over the window
    (sustained, not damped).
    """
    run = well_mixed_run(
        params,
        t_end_min=t_transient_min + t_measure_min,
        dt_min=dt_min,
        sample_every_min=max(dt_min, 0.01),
        variables=variables,
    )
    keep = run.t_min >= t_transient_min
    t = run.t_min[keep]
    g = run.g[keep].astype(np.float64)
    g_min, g_max = float(g.min()), float(g.max())
    swing = g_max - g_min
    last = g[int(len(g) * 2 / 3):]
    late_swing = float(last.max() - last.min())
    level = 0.5 * (g_min + g_max)
    i = np.nonzero((g[:-1] < level) & (g[1:] >= level))[0]
    crossings = t[i] + (level - g[i]) / (g[i + 1] - g[i]) * (t[i + 1] - t[i])
    n_cycles = max(0, len(crossings) - 1)
    if swing > 1e-3 and n_cycles >= 3 and late_swing >= 0.5 * swing:
        period = float((crossings[-1] - crossings[0]) / n_cycles)
        return PeriodResult(period, True, n_cycles, g_min, g_max)
    return PeriodResult(None, False, n_cycles, g_min, g_max)


