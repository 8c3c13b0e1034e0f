"""1-D runs of a model for its predictions: numerics, a cable (solitary wave), a ring (wave train).

Model units throughout.  `solitary_speed`: a pulse (or, for the bistable
Nagumo medium, a front) launched at the left end of a long no-flux cable
(one row of the shared integrator, `waves.models.base.Integrator`); its
speed is the inverse slope of a straight-line fit of the arrival times
(upward crossings of the model's threshold, interpolated between steps)
against position over the middle of the cable.  `ring_train`: one pulse on
a periodic row of length L, a wave train of wavelength L.  Grid refinement
and Richardson extrapolation (`refined_numerics`, `richardson`,
`converged_solitary_speed`): see `waves.dispersion`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from waves.errors import SimulationError, WavesError
from waves.models import get_model
from waves.models.base import NUMERIC_NAMES, Integrator, stable_dt_limit
from waves.models.grid import Grid

__all__ = [
    "Numerics",
    "resolve_numerics",
    "refined_numerics",
    "richardson",
    "solitary_speed",
    "SolitarySpeed",
    "converged_solitary_speed",
    "RingTrain",
    "ring_train",
    "REFINE_RATIO",
    "DEFAULT_RTOL",
    "MAX_LEVELS",
]


# default longest ring (model length units): a few solitary-pulse wakes; doubled
# automatically until the ring speed equals the solitary speed (within _PLATEAU_TOL)
_DEFAULT_RING_LENGTH = {"barkley": 60.0, "fhn": 60.0, "relay": 120.0}
_FALLBACK_RING_LENGTH = 60.0
_PLATEAU_TOL = 0.003
_MAX_DOUBLINGS = 4
_STEADY_SPREAD = 0.02
_N_PROBES = 4
# 2-D spiral prediction per model: (field side, duration, frame interval), model units; the
# field holds a few wavelengths, the run 15-20 rotations, a rotation about 20 frames
REFINE_RATIO = math.sqrt(2.0)  # spacing ratio of successive grids of a converged prediction
DEFAULT_RTOL = 0.003  # successive Richardson estimates agreeing this well count as converged
MAX_LEVELS = 5  # grids h ... h / 4
# coarsest grid of a converged curve when no spacing is given (default: the model's own);
# relay: 40 um, whose extrapolation agrees with finer grids to 0.1 % at a quarter of the cost
_CONVERGE_START = {"relay": 0.4}
_CONVERGE_ABOVE = 1.05  # curve convergence judged on trains at least this far above T_min


@dataclass(frozen=True)
class Numerics:
    """Model, resolved parameters and the grid/time step used (model units)."""

    model: str
    params: dict
    spacing: float
    dt: float
    diffusion: float


def resolve_numerics(model: str, params: dict | None = None, *, spacing: float | None = None,
                     dt: float | None = None) -> Numerics:
    """Resolve parameters and numerics of `model` (model units).

    params: model parameters, plus optionally 'diffusion' (D of variable 0)
    and 'dt'; 'time_scale_s' / 'length_scale_um' are accepted and ignored
    (they only convert units).  spacing: grid step h (default: the model's).
    dt: time step (default: the model's dt fraction of the 2-D stability
    limit at that h, the step a 2-D simulation with the same h uses).
    """
    spec = get_model(model)
    given = dict(params or {})
    numerics = {k: given.pop(k) for k in list(given) if k in NUMERIC_NAMES}
    values = spec.resolve_params(given)
    h = float(spec.spacing if spacing is None else spacing)
    if not (math.isfinite(h) and h > 0):
        raise WavesError(f"grid spacing must be a positive number of model length units, got {spacing!r}")
    D = float(numerics.get("diffusion", spec.diffusion))
    if not (math.isfinite(D) and D > 0):
        raise WavesError(f"diffusion must be a positive number (model units), got {D!r}")
    if dt is None:
        dt = numerics.get("dt")
    if dt is None:
        dt = spec.dt_fraction * stable_dt_limit(spec, values, spacing=h, diffusion=D, ndim=2)
    dt = float(dt)
    if not (math.isfinite(dt) and dt > 0):
        raise WavesError(f"time step dt must be a positive number (model time units), got {dt!r}")
    return Numerics(spec.name, values, h, dt, D)


# --------------------------------------------------------------------------- cable


@dataclass(frozen=True)
class _Cable:
    speed: float
    state: np.ndarray  # (nvar, nx) when the front reached the last probe
    front_index: int  # cell of the front in `state`


def _launch_state(spec, num: Numerics, nx: int, width: int) -> np.ndarray:
    rest = spec.rest(num.params)
    exc = spec.excited(num.params)
    s = np.empty((len(spec.variables), 1, nx), np.float32)
    for k in range(len(spec.variables)):
        s[k] = np.float32(rest[k])
        s[k, 0, :width] = np.float32(exc[k])
    return s


def _cable(num: Numerics, length: float) -> _Cable:
    """Launch a wave at the left end of a no-flux cable and time it (module doc)."""
    from waves.simulate import upward_crossings

    spec = get_model(num.model)
    nx = max(40, int(round(length / num.spacing)))
    width = max(3, int(round(2.0 / num.spacing)), nx // 20)
    probes_j = np.unique(np.linspace(0.35 * nx, 0.85 * nx, 11).astype(np.int64))
    probes = np.stack([np.zeros_like(probes_j), probes_j], axis=1)
    it = Integrator(spec, Grid((1, nx), num.spacing), num.params,
                    _launch_state(spec, num, nx, width), dt=num.dt, diffusion=num.diffusion,
                    probes_yx=probes, threads=1)
    thr = spec.threshold
    arrival = np.full(probes_j.size, np.nan)
    prev = it.state[0, 0, probes_j].copy()
    t_prev = 0.0
    chunk = max(1, int(round(0.25 / num.dt)))
    # a stalled or very slow wave: give up after 5e8 cell updates at the model's grid (a few
    # seconds), as many model time units on finer grids
    max_steps = int(5e8 / nx * max(1.0, spec.spacing / num.spacing) ** 3) + chunk
    steps = 0
    while np.isnan(arrival[-1]):
        trace = it.advance(chunk)
        times = it.time - num.dt * np.arange(chunk - 1, -1, -1)
        for k, c in enumerate(upward_crossings(trace, times, thr, prev, t_prev)):
            if c.size and np.isnan(arrival[k]):
                arrival[k] = c[0]
        prev = trace[-1].copy()
        t_prev = it.time
        steps += chunk
        # a travelling wave keeps variable 0 above threshold in its excited part
        if steps > max_steps or it.state[0].max() < thr:
            raise SimulationError(
                f"model {spec.name!r}: a wave launched at the end of a {nx * num.spacing:g}-unit cable "
                "did not propagate; the parameters may not give an excitable medium (check them, "
                "or give a finer grid spacing)"
            )
    x = probes_j * num.spacing
    slope, _ = np.polyfit(x, arrival, 1)
    if not slope > 0:
        raise SimulationError(f"model {spec.name!r}: arrival times on the cable do not increase")
    state = it.state[:, 0, :].copy()
    above = np.nonzero(state[0] >= thr)[0]
    front = int(above.max()) if above.size else int(probes_j[-1])  # leading excited cell
    return _Cable(float(1.0 / slope), state, front)


def solitary_speed(model: str, *, params: dict | None = None, spacing: float | None = None,
                   dt: float | None = None, length: float | None = None, converge: bool = False) -> float:
    """Speed (model length units per model time unit) of a solitary wave on a
    no-flux cable of `length` model units (default: twice the model's default
    ring length); for the bistable Nagumo medium, the front speed.

    converge=False: the speed on grid `spacing` itself (what a simulation on
    that grid runs at); converge=True: extrapolated to h -> 0 from that grid
    and finer ones (`converged_solitary_speed`, which also reports the
    grids and the convergence estimate)."""
    if converge:
        return converged_solitary_speed(model, params=params, spacing=spacing, dt=dt, length=length).speed
    num = resolve_numerics(model, params, spacing=spacing, dt=dt)
    if length is None:
        length = 2.0 * _DEFAULT_RING_LENGTH.get(num.model, _FALLBACK_RING_LENGTH)
    return _cable(num, float(length)).speed


def refined_numerics(num: Numerics, levels: int) -> list[Numerics]:
    """Grids h, h / sqrt(2), ... (`levels` of them) with dt scaled by the square of
    the spacing ratio, so that the scheme's O(dt) + O(h^2) error scales as h^2."""
    return [Numerics(num.model, dict(num.params), num.spacing / REFINE_RATIO ** k,
                     num.dt / REFINE_RATIO ** (2 * k), num.diffusion) for k in range(int(levels))]


def richardson(coarse, fine, ratio: float = REFINE_RATIO, order: int = 2):
    """Extrapolation to h -> 0 of a quantity with error K h^order from grids h and h / ratio."""
    r = ratio ** order
    return (r * np.asarray(fine, np.float64) - np.asarray(coarse, np.float64)) / (r - 1.0) \
        if isinstance(fine, np.ndarray) else (r * float(fine) - float(coarse)) / (r - 1.0)


@dataclass(frozen=True)
class SolitarySpeed:
    """A converged solitary-wave speed, model units.

    speed: the last Richardson extrapolation; spacings, dts, speeds: grid,
    time step and speed of each cable; extrapolated: one Richardson value per
    pair of successive grids; convergence_rel: relative difference of the
    last two extrapolations (with two grids: of the extrapolation and the
    finest speed); converged: convergence_rel <= rtol.
    """

    speed: float
    spacings: tuple[float, ...]
    dts: tuple[float, ...]
    speeds: tuple[float, ...]
    extrapolated: tuple[float, ...]
    convergence_rel: float
    converged: bool


def _check_convergence_options(rtol, max_levels) -> None:
    if not (isinstance(rtol, (int, float)) and math.isfinite(rtol) and 0 < rtol < 0.5):
        raise WavesError(f"rtol must be a relative tolerance between 0 and 0.5 (e.g. 0.002), got {rtol!r}")
    if int(max_levels) != max_levels or not 2 <= max_levels <= 7:
        raise WavesError(f"max_levels must be a whole number from 2 to 7 (grids h, h/sqrt(2), ...), got {max_levels!r}")


def _converge(values_at, num: Numerics, rtol: float, max_levels: int):
    """Evaluate values_at(Numerics) on refined grids until successive Richardson
    extrapolations agree to rtol; returns (levels, raw values, extrapolations, conv)."""
    levels = refined_numerics(num, max_levels)
    raw, ext, conv = [], [], math.inf
    for k, nk in enumerate(levels):
        raw.append(values_at(nk))
        if k >= 1:
            ext.append(richardson(raw[-2], raw[-1]))
            prev = ext[-2] if len(ext) >= 2 else raw[-1]
            conv = abs(ext[-1] - prev) / abs(ext[-1])
            if len(ext) >= 2 and conv <= rtol:
                break
    return levels[:len(raw)], raw, ext, conv


def converged_solitary_speed(model: str, *, params: dict | None = None, spacing: float | None = None,
                             dt: float | None = None, length: float | None = None,
                             rtol: float = DEFAULT_RTOL, max_levels: int = MAX_LEVELS) -> SolitarySpeed:
    """Solitary-wave speed extrapolated to h -> 0 (module doc): cables on grids
    spacing, spacing / sqrt(2), ... until successive Richardson values agree to rtol."""
    _check_convergence_options(rtol, max_levels)
    num = resolve_numerics(model, params, spacing=spacing, dt=dt)
    if length is None:
        length = 2.0 * _DEFAULT_RING_LENGTH.get(num.model, _FALLBACK_RING_LENGTH)
    levels, raw, ext, conv = _converge(lambda nk: _cable(nk, float(length)).speed, num, rtol, max_levels)
    return SolitarySpeed(float(ext[-1]), tuple(n.spacing for n in levels), tuple(n.dt for n in levels),
                         tuple(float(v) for v in raw), tuple(float(v) for v in ext), float(conv),
                         bool(conv <= rtol))


# --------------------------------------------------------------------------- ring


@dataclass(frozen=True)
class RingTrain:
    """One pulse on a ring: a wave train of wavelength `length` (model units).

    alive: the pulse still propagated at the end.  period: median rotation
    time (None when it died); speed = length / period.  spread: (max - min) /
    median of the crossing intervals used; steady: spread <= 2 %.
    """

    length: float
    alive: bool
    period: float | None
    speed: float | None
    spread: float | None
    steady: bool
    n_intervals: int


def _ring_from_cable(cable: _Cable, nx: int, rest) -> np.ndarray:
    """Ring state of nx cells: the cable segment ending a little ahead of the
    front, padded with rest ahead of the front when the cable is too short."""
    nvar, n = cable.state.shape
    ahead = max(2, nx // 20)
    end = min(n, cable.front_index + ahead)
    start = end - nx
    ring = np.empty((nvar, 1, nx), np.float32)
    for k in range(nvar):
        ring[k, 0, :] = np.float32(rest[k])
    if start >= 0:
        ring[:, 0, :] = cable.state[:, start:end]
    else:
        ring[:, 0, -end:] = cable.state[:, :end]
    return ring


def _resample(state: np.ndarray, nx_new: int) -> np.ndarray:
    """Periodic linear interpolation of a ring state (nvar, 1, nx) onto nx_new cells."""
    nvar, _, nx = state.shape
    x_old = np.arange(nx, dtype=np.float64)
    x_new = np.arange(nx_new, dtype=np.float64) * (nx / nx_new)
    out = np.empty((nvar, 1, nx_new), np.float32)
    for k in range(nvar):
        out[k, 0] = np.interp(x_new, x_old, state[k, 0].astype(np.float64), period=nx)
    return out


def _run_ring(num: Numerics, state: np.ndarray, speed_guess: float, *, transient_rotations: float,
              measure_intervals: int) -> tuple[RingTrain, np.ndarray]:
    from waves.simulate import upward_crossings

    spec = get_model(num.model)
    nx = state.shape[2]
    L = nx * num.spacing
    probes_j = (np.arange(_N_PROBES) * nx) // _N_PROBES
    probes = np.stack([np.zeros_like(probes_j), probes_j], axis=1)
    it = Integrator(spec, Grid((1, nx), num.spacing, "periodic"), num.params, state,
                    dt=num.dt, diffusion=num.diffusion, probes_yx=probes, threads=1)
    thr = spec.threshold
    t_guess = L / speed_guess
    chunk = max(1, int(round(0.25 * t_guess / num.dt)))
    crossings: list[list[float]] = [[] for _ in probes_j]
    prev = it.state[0, 0, probes_j].copy()
    t_prev = 0.0
    t_transient = transient_rotations * t_guess
    # the slowest train kept: half the guessed speed; beyond that the pulse is dead or stalled
    t_end_max = t_transient + (measure_intervals + 2) * 2.0 * t_guess
    last_crossing = 0.0

    def dead() -> RingTrain:
        return RingTrain(L, False, None, None, None, False, 0)

    while True:
        trace = it.advance(chunk)
        times = it.time - num.dt * np.arange(chunk - 1, -1, -1)
        for k, c in enumerate(upward_crossings(trace, times, thr, prev, t_prev)):
            if c.size:
                crossings[k].extend(float(v) for v in c)
                last_crossing = max(last_crossing, float(c[-1]))
        prev = trace[-1].copy()
        t_prev = it.time
        if it.state[0].max() < thr or it.time - last_crossing > 2.5 * t_guess:
            return dead(), it.state.copy()
        later = [np.asarray(c)[np.asarray(c) > t_transient] for c in crossings]
        if all(c.size >= measure_intervals + 1 for c in later):
            break
        if it.time > t_end_max:
            return dead(), it.state.copy()
    intervals = np.concatenate([np.diff(c) for c in later])
    period = float(np.median(intervals))
    spread = float((intervals.max() - intervals.min()) / period)
    train = RingTrain(L, True, period, L / period, spread, spread <= _STEADY_SPREAD, int(intervals.size))
    return train, it.state.copy()


def ring_train(model: str, length: float, *, params: dict | None = None,
               spacing: float | None = None, dt: float | None = None,
               transient_rotations: float = 4.0, measure_intervals: int = 3) -> RingTrain:
    """One pulse on a ring of `length` model units, started from a settled
    cable pulse (module doc); its rotation period and speed in model units."""
    num = resolve_numerics(model, params, spacing=spacing, dt=dt)
    spec = get_model(num.model)
    _require_recovery(spec)
    try:
        length = float(length)
    except (TypeError, ValueError):
        raise WavesError(f"ring length must be a number of model length units, got {length!r}") from None
    if not (math.isfinite(length) and length >= 8 * num.spacing):
        raise WavesError(f"ring length must be at least 8 grid steps ({8 * num.spacing:g} model units), got {length!r}")
    if not (transient_rotations >= 0 and int(measure_intervals) == measure_intervals and measure_intervals >= 1):
        raise WavesError("transient_rotations must be >= 0 and measure_intervals a whole number >= 1")
    nx = int(round(length / num.spacing))
    default = _DEFAULT_RING_LENGTH.get(num.model, _FALLBACK_RING_LENGTH)
    cable = _cable(num, max(2.0 * nx * num.spacing, 2.0 * default))
    state = _ring_from_cable(cable, nx, spec.rest(num.params))
    train, _ = _run_ring(num, state, cable.speed, transient_rotations=float(transient_rotations),
                         measure_intervals=int(measure_intervals))
    return train


def _require_recovery(spec) -> None:
    if len(spec.variables) < 2:
        raise WavesError(
            f"model {spec.name!r} has no recovery variable, so it carries fronts but no wave "
            "trains and has no dispersion relation; use solitary_speed for its front speed"
        )


def _check_not_oscillatory(num: Numerics, duration: float) -> None:
    """Refuse a parameter set whose resting medium fires by itself."""
    spec = get_model(num.model)
    rest = spec.rest(num.params)
    state = np.empty((len(spec.variables), 1, 8), np.float32)
    for k in range(len(spec.variables)):
        state[k] = np.float32(rest[k])
    # a small kick: an unstable rest state left exactly in place stays there for long
    state[0] += np.float32(0.01 * max(abs(rest[0]), 0.1))
    it = Integrator(spec, Grid((1, 8), num.spacing, "periodic"), num.params, state,
                    dt=num.dt, diffusion=num.diffusion, probes_yx=np.array([[0, 0]]), threads=1)
    nsteps = int(math.ceil(duration / num.dt))
    chunk = max(1, min(nsteps, 20000))
    done = 0
    while done < nsteps:
        trace = it.advance(min(chunk, nsteps - done))
        done += chunk
        if trace.max() >= spec.threshold:
            first = int(np.argmax(trace[:, 0] >= spec.threshold))
            t_fire = it.time - (trace.shape[0] - 1 - first) * num.dt
            raise WavesError(
                f"model {spec.name!r} with these parameters is oscillatory: resting cells fire by "
                f"themselves (first at {t_fire:.3g} model time units), so there is no solitary wave "
                "and no dispersion relation of an excitable medium; choose excitable parameters "
                + ("(e.g. --set ke_per_min=10 for the relay model)" if spec.name == "relay" else "")
            )


