"""Shared integrator for reaction-diffusion models, and the contract a model meets.

Scheme: explicit Euler in time, 5-point Laplacian in space, float32 state,
only the first state variable diffuses (coefficient D in model units, default
1).  Grids, boundaries, cell occupancy and obstacles: see `waves.models.grid`.

THE MODEL CONTRACT (copy `waves/models/barkley.py`; register the module's name
in `waves.models._MODULES`).  A model module defines, at module level:

1. A frozen dataclass of parameters, every field a float with its default,
   in model units (e.g. ``BarkleyParams(a=0.75, b=0.02, eps=0.02)``).  Field
   order = index order in the parameter vector ``p``.

2. A compiled kernel, ``@njit(cache=True, nogil=True, parallel=True,
   fastmath=FASTMATH)``::

       run_steps(S, S2, nsteps, dt, inv_h2, D, p, pf, fidx, occ, dom,
                 periodic, general, probe_i, probe_j, trace) -> S_final

   S, S2     float32 (nvar, ny, nx): current state and scratch buffer; the
             kernel ping-pongs between them and returns the one holding the
             state after `nsteps` steps.  Variable 0 is the diffusing one.
   dt, inv_h2, D   float32 scalars: time step, 1/h^2, diffusion coefficient.
   p         float32 (nparam,): uniform parameter values (dataclass order).
   pf, fidx  float32 (nfield, ny, nx) and int64 (nparam,): parameter k is the
             field pf[fidx[k]] when fidx[k] >= 0, else the scalar p[k]
             (read it with `param_at`).  Only used when `general` is True.
   occ, dom  float32 (ny, nx): cell occupancy in [0, 1] (scales the reaction,
             meaning stated by the model) and domain (1 medium, 0 obstacle:
             frozen, no flux across its edges).  Only used when `general`.
   periodic  bool: periodic boundaries, else no-flux.
   general   bool: False -> fast path (uniform parameters, no masks, no
             obstacles; must not read pf/occ/dom, which may be 1x1 dummies);
             True -> the general path using pf, fidx, occ and dom.
   probe_i, probe_j, trace   int64 (nprobe,), int64 (nprobe,), float32
             (nsteps, nprobe): after step k write S[0, probe_i, probe_j] into
             trace[k] (ground truth from threshold crossings).
   The time loop is inside the kernel; rows are split over threads with
   `prange`; use float32 constants (``np.float32(1.0)``) so nothing is
   promoted to float64, and ``u*u*u``, never ``u**3``.  The fast path handles
   the two edge columns separately so the interior loop has no branches.
   Use `row_neighbours`, `col_neighbours`, `param_at` from this module, and
   store every new value through `flush` (no subnormal numbers; the twin
   uses `flush_numpy`).

3. A numpy twin of one step, readable and vectorised (tests compare it with
   the kernel)::

       numpy_step(S, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic) -> S_new

   always the general formula; use `laplacian_numpy` and `params_numpy`.

4. ``reaction_dt_limit(params: dict) -> (float, str)``: the largest explicit
   step the reaction alone tolerates, with a sentence deriving it.  The
   diffusion limit dt <= h^2 / (2 d D) (d = 2, or 1 on a single row) is added
   by the framework.

5. ``SPEC = ModelSpec(...)``: name, variables, parameter dataclass, kernel,
   twin, limit, rest/excited/refractory states (for initial conditions and
   stimuli), fixed observable ranges per variable (uint16 scaling and
   rendering), the probe threshold on variable 0, and default scales
   (seconds per model time unit, micrometres per model length unit), grid
   spacing, dt as a fraction of the stability limit, and D.

6. Optional: ``initial_state(params, shape_yx, *, spacing, kind, rotation,
   center_yx, rng, dt, diffusion) -> ndarray | None`` in SPEC, a
   model-specific initial condition (float32 (nvar, ny, nx)); returning None
   falls back to the generic ones of `waves.models.stimulus`.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import os
from collections.abc import Callable
from dataclasses import dataclass

import numba
import numpy as np
from numba import njit

from waves.errors import SimulationError, StabilityError, WavesError
from waves.models.grid import Grid

__all__ = [
    "ModelSpec",
    "Integrator",
    "FASTMATH",
    "TINY",
    "flush",
    "flush_numpy",
    "row_neighbours",
    "col_neighbours",
    "param_at",
    "masked_laplacian",
    "laplacian_numpy",
    "params_numpy",
    "diffusion_dt_limit",
    "check_time_step",
    "stable_dt_limit",
    "auto_threads",
    "NUMERIC_NAMES",
]

# fastmath flags that keep NaN/inf semantics (no 'nnan', no 'ninf'), so a run
# that blows up is still seen as non-finite.
FASTMATH = {"contract", "nsz"}  # no "arcp": cached and fresh builds must agree bit for bit

# grids smaller than this (512 x 512) run on one thread by default: a parallel region per
# step costs a barrier, and on a busy machine a descheduled worker stalls every
# step (measured here: 256^2 Barkley 30x slower with 2 threads under load).
PARALLEL_MIN_CELLS = 1 << 18

# names accepted beside model parameters in --set / --params / simulate(params=)
NUMERIC_NAMES = ("dt", "diffusion", "time_scale_s", "length_scale_um")


# magnitudes below this are stored as 0: states decaying towards 0 (Barkley's
# u and v at rest) would otherwise become float32 subnormals, which run ~50x
# slower on x86; differences of stored values stay normal numbers.
TINY = np.float32(1e-30)


@njit(cache=True, nogil=True, inline="always")
def flush(x):
    """x, or 0 when |x| < TINY (keeps the state free of subnormal numbers)."""
    return x if abs(x) >= TINY else np.float32(0.0)


def flush_numpy(x: np.ndarray) -> np.ndarray:
    """numpy twin of `flush`."""
    return np.where(np.abs(x) >= TINY, x, np.float32(0.0)).astype(np.float32)


@njit(cache=True, nogil=True, inline="always")
def row_neighbours(i, ny, periodic):
    """(row above, row below) of row i; no-flux mirrors onto the row itself."""
    if i > 0:
        im = i - 1
    elif periodic:
        im = ny - 1
    else:
        im = 0
    if i < ny - 1:
        ip = i + 1
    elif periodic:
        ip = 0
    else:
        ip = ny - 1
    return im, ip


@njit(cache=True, nogil=True, inline="always")
def col_neighbours(j, nx, periodic):
    """(column left, column right) of column j; same rule as `row_neighbours`."""
    if j > 0:
        jm = j - 1
    elif periodic:
        jm = nx - 1
    else:
        jm = 0
    if j < nx - 1:
        jp = j + 1
    elif periodic:
        jp = 0
    else:
        jp = nx - 1
    return jm, jp


@njit(cache=True, nogil=True, inline="always")
def param_at(p, pf, fidx, k, i, j):
    """Value of parameter k at pixel (i, j): a field if fidx[k] >= 0, else p[k]."""
    f = fidx[k]
    if f >= 0:
        return pf[f, i, j]
    return p[k]


@njit(cache=True, nogil=True, inline="always")
def masked_laplacian(um, up, ur, dom, i, j, im, ip, jm, jp):
    """Undivided 5-point Laplacian at (i, j) of the rows above (um), below (up)
    and at (ur) row i, with no flux into obstacles (dom = 0 there); the
    general path of every model kernel (twin: `laplacian_numpy`)."""
    uc = ur[j]
    return (
        dom[im, j] * (um[j] - uc)
        + dom[ip, j] * (up[j] - uc)
        + dom[i, jm] * (ur[jm] - uc)
        + dom[i, jp] * (ur[jp] - uc)
    )


def laplacian_numpy(u: np.ndarray, dom: np.ndarray, periodic: bool, inv_h2) -> np.ndarray:
    """5-point Laplacian of u (float32) with obstacles `dom` (1 medium, 0 hole).

    Sum over the four neighbours n of dom[n] * (u[n] - u); no-flux edges copy
    the edge value outward, periodic edges wrap.  Same rule as the kernels.
    """
    mode = "wrap" if periodic else "edge"
    up = np.pad(u, 1, mode=mode)
    dp = np.pad(dom, 1, mode=mode)
    c = up[1:-1, 1:-1]
    total = np.zeros_like(u)
    for sl in (
        (slice(0, -2), slice(1, -1)),
        (slice(2, None), slice(1, -1)),
        (slice(1, -1), slice(0, -2)),
        (slice(1, -1), slice(2, None)),
    ):
        total += dp[sl] * (up[sl] - c)
    return total * np.float32(inv_h2)


def params_numpy(p: np.ndarray, pf: np.ndarray, fidx: np.ndarray) -> list:
    """Parameter values for the numpy twins: scalar p[k] or field pf[fidx[k]]."""
    return [pf[f] if f >= 0 else np.float32(p[k]) for k, f in enumerate(fidx)]


@dataclass(frozen=True)
class ModelSpec:
    """Everything the framework needs to know about one model (see module doc)."""

    name: str
    description: str
    variables: tuple[str, ...]
    params_type: type
    kernel: Callable
    numpy_step: Callable
    reaction_dt_limit: Callable[[dict], tuple[float, str]]
    rest: Callable[[dict], tuple[float, ...]]
    excited: Callable[[dict], tuple[float, ...]]
    refractory: Callable[[dict], tuple[float, ...]]
    observable_ranges: dict  # variable name -> (lo, hi), fixed per model
    threshold: float  # level of variable 0 whose upward crossings time the waves
    time_scale_s: float  # seconds per model time unit (default, invented unless cited)
    length_scale_um: float  # micrometres per model length unit (default)
    spacing: float  # default grid step h, model length units
    dt_fraction: float  # default dt = dt_fraction * stability limit
    diffusion: float = 1.0  # default D of variable 0, model units
    initial_state: Callable | None = None  # optional model-specific initial conditions

    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(f.name for f in dataclasses.fields(self.params_type))

    def default_params(self) -> dict:
        return dataclasses.asdict(self.params_type())

    def resolve_params(self, overrides: dict | None) -> dict:
        """Defaults updated by `overrides`; unknown names -> WavesError listing valid ones."""
        values = self.default_params()
        for key, val in (overrides or {}).items():
            if key not in values:
                valid = ", ".join(list(values) + list(NUMERIC_NAMES))
                raise WavesError(
                    f"unknown parameter {key!r} for model {self.name!r}; valid names: {valid}"
                )
            try:
                val = float(val)
            except (TypeError, ValueError):
                raise WavesError(
                    f"parameter {key!r} must be a number, got {val!r}"
                ) from None
            if not math.isfinite(val):
                raise WavesError(f"parameter {key!r} must be finite, got {val!r}")
            values[key] = val
        self.params_type(**values)  # the dataclass may validate further
        return values

    def vector(self, params: dict) -> np.ndarray:
        return np.array([params[n] for n in self.param_names], np.float32)


def diffusion_dt_limit(spacing: float, diffusion: float, ndim: int) -> float:
    """Explicit Euler limit of the 5-point scheme: dt <= h^2 / (2 ndim D)."""
    if diffusion <= 0:
        return math.inf
    return spacing * spacing / (2.0 * ndim * diffusion)


def _param_extremes(params: dict, ranges: dict) -> list[dict]:
    """Parameter sets at the corners of the ranges of spatially varying parameters."""
    names = [n for n in ranges if n in params][:6]
    if not names:
        return [params]
    out = []
    for corner in itertools.product(*[ranges[n] for n in names]):
        q = dict(params)
        q.update(dict(zip(names, corner, strict=True)))
        out.append(q)
    return out


def stable_dt_limit(
    spec: ModelSpec,
    params: dict,
    *,
    spacing: float,
    diffusion: float,
    ndim: int = 2,
    field_ranges: dict | None = None,
    reaction_scale: float = 1.0,
) -> float:
    """The largest dt `check_time_step` accepts for these settings."""
    limit = diffusion_dt_limit(spacing, diffusion, ndim)
    if reaction_scale > 0:
        for q in _param_extremes(params, field_ranges or {}):
            limit = min(limit, spec.reaction_dt_limit(q)[0] / reaction_scale)
    return limit


def check_time_step(
    spec: ModelSpec,
    params: dict,
    *,
    dt: float,
    spacing: float,
    diffusion: float,
    ndim: int = 2,
    field_ranges: dict | None = None,
    reaction_scale: float = 1.0,
) -> None:
    """Refuse a time step the explicit scheme cannot integrate (StabilityError).

    Diffusion: dt <= h^2 / (4 D) in 2-D (h^2 / (2 D) on a single row), i.e.
    r = D dt / h^2 <= 1/4.  Reaction: the model's own limit, evaluated at the
    extremes of any spatially varying parameter (`field_ranges`: name -> (min, max)),
    divided by `reaction_scale` (the largest cell occupancy, which multiplies
    the reaction terms; 0 = no reaction anywhere, no reaction limit).
    """
    if not (math.isfinite(dt) and dt > 0):
        raise StabilityError(f"time step dt must be a positive number, got {dt!r}")
    if diffusion < 0 or not math.isfinite(diffusion):
        raise WavesError(f"diffusion coefficient must be >= 0, got {diffusion!r}")
    limit = diffusion_dt_limit(spacing, diffusion, ndim)
    if dt > limit * (1.0 + 1e-9):
        r = diffusion * dt / (spacing * spacing)
        raise StabilityError(
            f"time step dt = {dt:.6g} is above the diffusion limit dt <= h^2/({2 * ndim} D) = "
            f"{limit:.6g} (h = {spacing:.6g}, D = {diffusion:.6g}, r = D dt/h^2 = {r:.4g} > "
            f"{1 / (2 * ndim):g}); use a smaller dt (--set dt=...) or a coarser grid"
        )
    if reaction_scale <= 0:
        return
    for q in _param_extremes(params, field_ranges or {}):
        rlimit, why = spec.reaction_dt_limit(q)
        rlimit /= reaction_scale
        if dt > rlimit * (1.0 + 1e-9):
            raise StabilityError(
                f"time step dt = {dt:.6g} is above the reaction limit of model {spec.name!r}: "
                f"{why} = {rlimit:.6g}; use a smaller dt (--set dt=...)"
            )


def auto_threads(n_cells: int) -> int:
    """Threads for a grid of n_cells: all cores for grids of at least
    PARALLEL_MIN_CELLS cells on an idle machine, else 1.

    Idle means a 1-minute load average below cores - 0.5: with every core
    busy elsewhere, a parallel step waits at each barrier for a descheduled
    worker (measured here: 512^2 Barkley at 1e8 cell-updates/s on 2 threads
    against 1.2e9 on one).
    """
    cores = numba.config.NUMBA_NUM_THREADS
    if cores < 2 or n_cells < PARALLEL_MIN_CELLS:
        return 1
    try:
        load = os.getloadavg()[0]
    except (AttributeError, OSError):  # not available on this platform
        return cores
    return cores if load < cores - 0.5 else 1


class Integrator:
    """Owns the state buffers of one run and advances them through the kernel.

    state: float32 (nvar, ny, nx), copied.  params: resolved model parameters.
    multipliers: parameter name -> float array (ny, nx), the spatial factor by
    which that parameter varies (value at a pixel = params[name] * factor).
    probes_yx: int array (nprobe, 2) of pixels whose variable 0 is recorded
    every step.  Parameters may change between calls (`set_params`) for
    developmental ramps.  threads: numba threads for the kernel (None:
    `auto_threads`).
    """

    def __init__(
        self,
        spec: ModelSpec,
        grid: Grid,
        params: dict,
        state: np.ndarray,
        *,
        dt: float,
        diffusion: float,
        multipliers: dict | None = None,
        probes_yx: np.ndarray | None = None,
        threads: int | None = None,
    ) -> None:
        self.spec = spec
        self.grid = grid
        ny, nx = grid.shape_yx
        nvar = len(spec.variables)
        state = np.asarray(state)
        if state.shape != (nvar, ny, nx):
            raise WavesError(
                f"state of model {spec.name!r} must have shape {(nvar, ny, nx)}, got {state.shape}"
            )
        self.S = np.ascontiguousarray(state, dtype=np.float32).copy()
        self.S2 = np.empty_like(self.S)
        self.dt = float(dt)
        self.diffusion = float(diffusion)
        self.multipliers = {}
        for name, m in (multipliers or {}).items():
            if name not in spec.param_names:
                raise WavesError(
                    f"cannot vary unknown parameter {name!r} of model {spec.name!r}; "
                    f"valid names: {', '.join(spec.param_names)}"
                )
            m = np.asarray(m, np.float32)
            if m.shape != (ny, nx):
                raise WavesError(f"parameter field for {name!r} must have shape {(ny, nx)}")
            self.multipliers[name] = m
        self.fidx = np.full(len(spec.param_names), -1, np.int64)
        for f, name in enumerate(self.multipliers):
            self.fidx[spec.param_names.index(name)] = f
        self.general = bool(self.multipliers) or not grid.is_plain
        if self.general:
            self.occ = grid.occupancy_or_ones()
            self.dom = grid.domain()
        else:
            self.occ = np.ones((1, 1), np.float32)
            self.dom = np.ones((1, 1), np.float32)
        if self.multipliers:
            self.pf = np.empty((len(self.multipliers), ny, nx), np.float32)
        else:
            self.pf = np.ones((1, 1, 1), np.float32)
        if probes_yx is None:
            probes_yx = np.zeros((0, 2), np.int64)
        probes_yx = np.asarray(probes_yx, np.int64).reshape(-1, 2)
        self.probe_i = np.ascontiguousarray(probes_yx[:, 0])
        self.probe_j = np.ascontiguousarray(probes_yx[:, 1])
        if threads is None:
            threads = auto_threads(grid.n_cells)
        if isinstance(threads, bool) or int(threads) != threads or threads < 1:
            raise WavesError(f"threads must be a positive integer, got {threads!r}")
        self.threads = min(int(threads), numba.config.NUMBA_NUM_THREADS)
        self.steps_done = 0
        self.set_params(params)

    @property
    def state(self) -> np.ndarray:
        """The current state (a view; copy it to keep it)."""
        return self.S

    @property
    def time(self) -> float:
        """Model time reached, in model time units."""
        return self.steps_done * self.dt

    def field_ranges(self) -> dict:
        return {
            name: (float(self.params[name] * m.min()), float(self.params[name] * m.max()))
            for name, m in self.multipliers.items()
        }

    def set_params(self, params: dict) -> None:
        """Set (possibly new) parameter values and re-check the time step."""
        self.params = dict(params)
        self.p = self.spec.vector(self.params)
        for f, (name, m) in enumerate(self.multipliers.items()):
            np.multiply(m, np.float32(self.params[name]), out=self.pf[f])
        check_time_step(
            self.spec,
            self.params,
            dt=self.dt,
            spacing=self.grid.spacing,
            diffusion=self.diffusion,
            ndim=self.grid.ndim_effective,
            field_ranges=self.field_ranges(),
            reaction_scale=(
                1.0 if self.grid.occupancy is None else float(self.grid.occupancy.max())
            ),
        )

    def _args(self):
        h = self.grid.spacing
        return (
            np.float32(self.dt),
            np.float32(1.0 / (h * h)),
            np.float32(self.diffusion),
            self.p,
            self.pf,
            self.fidx,
            self.occ,
            self.dom,
            self.grid.periodic,
        )

    def advance(self, nsteps: int, *, engine: str = "numba", check: bool = True) -> np.ndarray:
        """Advance `nsteps` steps; returns the probe trace float32 (nsteps, nprobe).

        engine 'numba' runs the compiled kernel, 'numpy' the numpy twin (slow,
        for tests and benchmarks).  A state that went non-finite raises
        SimulationError naming the model time at which it was found.
        """
        nsteps = int(nsteps)
        trace = np.empty((max(nsteps, 0), self.probe_i.size), np.float32)
        if nsteps <= 0:
            return trace
        dt, inv_h2, D, p, pf, fidx, occ, dom, periodic = self._args()
        if engine == "numba":
            previous = numba.get_num_threads()
            numba.set_num_threads(self.threads)
            try:
                out = self.spec.kernel(
                    self.S, self.S2, nsteps, dt, inv_h2, D, p, pf, fidx, occ, dom, periodic,
                    self.general, self.probe_i, self.probe_j, trace,
                )
            finally:
                numba.set_num_threads(previous)
            if out is not self.S:
                self.S, self.S2 = self.S2, self.S
        elif engine == "numpy":
            if self.general:
                occ_n, dom_n = occ, dom
            else:
                occ_n = dom_n = np.ones(self.grid.shape_yx, np.float32)
            for k in range(nsteps):
                self.S = self.spec.numpy_step(
                    self.S, dt, inv_h2, D, p, pf, fidx, occ_n, dom_n, periodic
                ).astype(np.float32, copy=False)
                trace[k] = self.S[0, self.probe_i, self.probe_j]
            self.S2 = np.empty_like(self.S)
        else:
            raise WavesError(f"unknown engine {engine!r}; use 'numba' or 'numpy'")
        t0 = self.time
        self.steps_done += nsteps
        if check and not np.isfinite(self.S).all():
            raise SimulationError(
                f"model {self.spec.name!r} went non-finite between model time {t0:.6g} and "
                f"{self.time:.6g} (step {self.steps_done - nsteps} to {self.steps_done}); "
                f"likely cause: a time step (dt = {self.dt:.6g}) too large for the reaction or "
                "diffusion, or parameter values outside the model's range; lower dt or check "
                "the parameters"
            )
        return trace
