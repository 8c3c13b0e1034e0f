"""Model predictions: dispersion relations on a 1-D ring, spiral period and wavelength.

Everything here is in model units (model time and length units, the units of
the model's equations); `DispersionCurve.in_units` converts with a time scale
(seconds per model time unit) and a length scale (micrometres per model
length unit): period_min = T * time_scale_s / 60, speed_um_per_min =
c * length_scale_um / (time_scale_s / 60).

Solitary wave (`solitary_speed`): a pulse (or, for the bistable Nagumo
medium, a front) launched at the left end of a long no-flux cable (one row of
the shared integrator, `waves.models.base.Integrator`); its speed is the
inverse slope of a straight-line fit of the arrival times (upward crossings
of the model's threshold, interpolated between steps) against position over
the middle of the cable, where the wave has settled.

Dispersion relation (`dispersion_curve`): a ring (one periodic row) of
length L carrying one pulse is a periodic wave train of wavelength L.  The
ring is started from the settled cable pulse with its whole wake (the cable
segment of length L behind and just ahead of the front, padded with the rest
state when the ring is longer), run for a few rotations, and the rotation
time T (period) is the median interval between upward threshold crossings at
four probe cells; the speed is c = L / T.  Rings then shrink geometrically,
each started from the previous ring's settled state resampled onto the
shorter ring (periodic linear interpolation), until the pulse dies; the gap
between the last surviving and the first failed ring is bisected, so the
shortest period that still propagates is found to a fraction of the last
step.  The longest ring is doubled until its speed is within 0.3 % of the
solitary speed, so the curve levels off at the solitary-wave speed.

Rings whose crossing intervals spread by more than 2 % (alternans near the
shortest period, or a train still settling) are kept but marked unsteady.

Converged by default.  The explicit scheme's error is O(dt) + O(h^2); with
dt kept proportional to h^2 it is K h^2, so the solitary speed and the curve
are computed on grids h, h / sqrt(2), h / 2, ... (`refined_numerics`; dt
scaled by the square of the spacing ratio) and Richardson-extrapolated from
each pair of successive grids, X = 2 X(h / sqrt(2)) - X(h) (`richardson`),
until two successive extrapolations agree to `rtol` (default 0.3 %) or
`max_levels` grids are used; `convergence_rel` is their relative
difference (an estimate of the error of the result).  Curves of two grids
are combined at the finer grid's ring periods that both carry; the shortest
period is the larger of the two grids' (its grid dependence is below the
bisection step, which limits its `shortest_period_convergence_rel`; that is
reported, not iterated on).  The convergence of the
curve is judged on trains at least 5 % above the shortest period and on the
solitary speed.  `converge=False` gives the plain one-grid result.

Results are cached per parameter set and numerics as JSON
(`waves.dispersion_cache`; key: SHA-256 of the model, every parameter,
spacing, dt, D and the algorithm's settings, the convergence settings
included) in `default_cache_dir()`.

Spiral prediction: `waves.spirals.spiral_prediction` (also reachable here).
"""

from __future__ import annotations

import math
import os
import pathlib
from dataclasses import dataclass, field

import numpy as np

from waves import dispersion_cache as _cache
from waves.dispersion_cache import default_cache_dir
from waves.errors import SimulationError, WavesError
from waves.models import get_model
from waves.models.base import NUMERIC_NAMES, Integrator, stable_dt_limit
from waves.models.grid import Grid
from waves.simulate import upward_crossings

__all__ = [
    "RingTrain",
    "DispersionCurve",
    "SpiralPrediction",
    "Numerics",
    "resolve_numerics",
    "solitary_speed",
    "ring_train",
    "dispersion_curve",
    "spiral_prediction",
    "default_cache_dir",
    "cache_key",
    "ALGORITHM_VERSION",
    "SolitarySpeed",
    "converged_solitary_speed",
    "refined_numerics",
    "richardson",
    "REFINE_RATIO",
    "DEFAULT_RTOL",
    "MAX_LEVELS",
]

ALGORITHM_VERSION = 2  # bump when the ring procedure changes: old cache entries are ignored

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


# --------------------------------------------------------------------------- numerics


def __getattr__(name):  # the spiral prediction lives in waves.spirals (no import cycle)
    if name in ("spiral_prediction", "SpiralPrediction"):
        from waves import spirals

        return getattr(spirals, name)
    raise AttributeError(f"module 'waves.dispersion' has no attribute {name!r}")


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


# --------------------------------------------------------------------------- cache


def cache_key(kind: str, num: Numerics, settings: dict) -> str:
    """SHA-256 (hex) of what determines a cached result (`waves.dispersion_cache.cache_key`)."""
    return _cache.cache_key(kind, num, settings, algorithm_version=ALGORITHM_VERSION)


# --------------------------------------------------------------------------- curve


@dataclass(frozen=True)
class DispersionCurve:
    """Speed of periodic wave trains against their period, model units.

    period, speed, wavelength: float64 arrays of the surviving rings, period
    increasing.  steady: bool per ring.  solitary_speed: speed of the
    solitary wave on a cable.  shortest_period: the shortest surviving
    period; failed_length: the longest ring on which the pulse died (the
    shortest period lies between failed_length / its speed and
    shortest_period).  key: cache key; from_cache: read from the cache.
    """

    model: str
    params: dict
    spacing: float
    dt: float
    diffusion: float
    period: np.ndarray
    speed: np.ndarray
    wavelength: np.ndarray
    steady: np.ndarray
    solitary_speed: float
    shortest_period: float
    failed_length: float | None
    key: str = ""
    from_cache: bool = False
    notes: tuple[str, ...] = field(default_factory=tuple)
    spacings: tuple[float, ...] = ()
    dts: tuple[float, ...] = ()
    convergence_rel: float | None = None
    shortest_period_convergence_rel: float | None = None
    converged: bool | None = None

    def speed_at(self, period) -> np.ndarray:
        """c(T) between the computed rings: monotone cubic (PCHIP) interpolation of
        log c against log T; the solitary speed above the longest ring; below
        the shortest period, NaN (no wave train propagates)."""
        from scipy.interpolate import PchipInterpolator

        T = np.asarray(period, np.float64)
        lt, lc = np.log(self.period), np.log(self.speed)
        out = np.full(T.shape, np.nan)
        ok = T >= self.shortest_period
        top = T > self.period[-1]
        if self.period.size >= 2:
            f = PchipInterpolator(lt, lc, extrapolate=False)
            mid = ok & ~top
            out[mid] = np.exp(f(np.log(T[mid])))
        else:
            out[ok] = self.speed[0]
        out[top] = self.speed[-1]
        return out

    def in_units(self, *, time_scale_s: float, length_scale_um: float) -> dict:
        """The curve in minutes and um/min for the given scales."""
        s_t = time_scale_s / 60.0
        v = length_scale_um / s_t
        return {
            "period_min": self.period * s_t,
            "speed_um_per_min": self.speed * v,
            "wavelength_um": self.wavelength * length_scale_um,
            "solitary_speed_um_per_min": self.solitary_speed * v,
            "shortest_period_min": self.shortest_period * s_t,
        }

    def to_dict(self) -> dict:
        return {
            "kind": "dispersion",
            "key": self.key,
            "algorithm_version": ALGORITHM_VERSION,
            "model": self.model,
            "params": dict(self.params),
            "spacing_model": self.spacing,
            "dt_model": self.dt,
            "diffusion_model": self.diffusion,
            "period_model": self.period.tolist(),
            "speed_model": self.speed.tolist(),
            "wavelength_model": self.wavelength.tolist(),
            "steady": [bool(s) for s in self.steady],
            "solitary_speed_model": self.solitary_speed,
            "shortest_period_model": self.shortest_period,
            "failed_length_model": self.failed_length,
            "notes": list(self.notes),
            "spacings_model": list(self.spacings),
            "dts_model": list(self.dts),
            "convergence_rel": self.convergence_rel,
            "shortest_period_convergence_rel": self.shortest_period_convergence_rel,
            "converged": self.converged,
            "method": "one pulse on periodic rings of shrinking length (waves.dispersion)"
                      + ("; Richardson-extrapolated over the grids" if len(self.spacings) > 1 else ""),
        }

    @classmethod
    def from_dict(cls, d: dict, *, from_cache: bool = False) -> DispersionCurve:
        return cls(
            model=d["model"], params=dict(d["params"]), spacing=float(d["spacing_model"]),
            dt=float(d["dt_model"]), diffusion=float(d["diffusion_model"]),
            period=np.asarray(d["period_model"], np.float64),
            speed=np.asarray(d["speed_model"], np.float64),
            wavelength=np.asarray(d["wavelength_model"], np.float64),
            steady=np.asarray(d["steady"], bool),
            solitary_speed=float(d["solitary_speed_model"]),
            shortest_period=float(d["shortest_period_model"]),
            failed_length=None if d["failed_length_model"] is None else float(d["failed_length_model"]),
            key=d.get("key", ""), from_cache=from_cache, notes=tuple(d.get("notes", ())),
            spacings=tuple(float(v) for v in d.get("spacings_model", ())),
            dts=tuple(float(v) for v in d.get("dts_model", ())),
            convergence_rel=d.get("convergence_rel"),
            shortest_period_convergence_rel=d.get("shortest_period_convergence_rel"),
            converged=d.get("converged"),
        )


def dispersion_curve(
    model: str,
    *,
    params: dict | None = None,
    spacing: float | None = None,
    dt: float | None = None,
    max_length: float | None = None,
    shrink: float = 0.9,
    bisections: int = 4,
    cache_dir: str | os.PathLike | None = None,
    use_cache: bool = True,
    converge: bool = True,
    rtol: float = DEFAULT_RTOL,
    max_levels: int = MAX_LEVELS,
) -> DispersionCurve:
    """The dispersion relation c(T) of `model` on a 1-D ring (module doc).

    converge=True (default): curves on grids spacing, spacing / sqrt(2), ...
    Richardson-extrapolated until two successive extrapolations agree to
    `rtol` (at most `max_levels` grids); the curve reports the grids and its
    `convergence_rel`.  converge=False: one grid, `spacing` itself.

    params: model parameters (and 'diffusion', 'dt'); spacing, dt: numerics
    (see `resolve_numerics`).  max_length: starting (longest) ring, model
    length units (default per model; doubled until the ring speed equals the
    solitary speed).  shrink: ring length factor per step (0.5 < shrink < 1).
    bisections: halvings of the gap at the shortest period.  cache_dir:
    folder of the cache (default `default_cache_dir()`); use_cache=False
    computes without reading or writing it.
    """
    if converge and spacing is None:
        spacing = _CONVERGE_START.get(get_model(model).name)
    num = resolve_numerics(model, params, spacing=spacing, dt=dt)
    spec = get_model(num.model)
    _require_recovery(spec)
    if not (0.5 < float(shrink) < 1.0):
        raise WavesError(f"shrink must lie between 0.5 and 1 (ring length factor per step), got {shrink!r}")
    if int(bisections) != bisections or bisections < 0:
        raise WavesError(f"bisections must be a whole number >= 0, got {bisections!r}")
    L0 = float(max_length if max_length is not None
               else _DEFAULT_RING_LENGTH.get(num.model, _FALLBACK_RING_LENGTH))
    if not (math.isfinite(L0) and L0 > 16 * num.spacing):
        raise WavesError(
            f"max_length must be a number of model length units above 16 grid steps "
            f"({16 * num.spacing:g}), got {max_length!r}"
        )
    settings = {"max_length": L0, "shrink": float(shrink), "bisections": int(bisections)}
    if converge:
        _check_convergence_options(rtol, max_levels)
        settings.update(converge=True, rtol=float(rtol), max_levels=int(max_levels), ratio=REFINE_RATIO)
    key = cache_key("dispersion", num, settings)
    path = _cache.cache_path(cache_dir, "dispersion", num.model, key)
    if use_cache:
        data = _cache.cache_read(path, key)
        if data is not None:
            try:
                return DispersionCurve.from_dict(data, from_cache=True)
            except (KeyError, TypeError, ValueError):
                pass
    if converge:
        def one(nk: Numerics) -> DispersionCurve:
            return dispersion_curve(num.model, params={**nk.params, "diffusion": nk.diffusion},
                                    spacing=nk.spacing, dt=nk.dt, max_length=L0, shrink=shrink,
                                    bisections=bisections, cache_dir=cache_dir, use_cache=use_cache,
                                    converge=False)

        curve = _converged_curve(one, num, float(rtol), int(max_levels), key)
    else:
        curve = _compute_curve(num, L0, float(shrink), int(bisections), key)
    if use_cache:
        _cache.cache_write(path, curve.to_dict())
    return curve


def _compute_curve(num: Numerics, L0: float, shrink: float, bisections: int, key: str) -> DispersionCurve:
    spec = get_model(num.model)
    rest = spec.rest(num.params)
    notes: list[str] = []
    h = num.spacing
    try:
        cable = _cable(num, 1.3 * L0)
    except SimulationError:
        _check_not_oscillatory(num, duration=max(200.0, 1000.0 * num.dt))
        raise
    c_sol = cable.speed
    _check_not_oscillatory(num, duration=max(100.0, 3.0 * L0 / c_sol))
    # longest ring: doubled until it runs at the solitary speed
    nx = int(round(L0 / h))
    trains: list[RingTrain] = []
    for _ in range(_MAX_DOUBLINGS + 1):
        train, state = _run_ring(num, _ring_from_cable(cable, nx, rest), c_sol,
                                 transient_rotations=3.0, measure_intervals=3)
        if train.alive and train.speed >= c_sol * (1.0 - _PLATEAU_TOL):
            break
        nx *= 2
    else:
        notes.append(
            f"the longest ring ({nx * h:g} units) ran at {train.speed if train.alive else 0:.4g}, "
            f"below the solitary speed {c_sol:.4g}: the curve may not reach its plateau"
        )
    if not train.alive:
        raise SimulationError(
            f"model {spec.name!r}: a pulse on a ring of {nx * h:g} model units did not survive; "
            "check that the parameters give an excitable medium"
        )
    trains.append(train)
    alive_state = state
    failed: float | None = None
    min_nx = 8
    while True:
        nx_new = int(math.floor(nx * shrink))
        if nx_new < min_nx or nx_new == nx:
            notes.append(f"rings down to {nx * h:g} units still carried the pulse (grid limit)")
            break
        train, state = _run_ring(num, _resample(alive_state, nx_new), trains[-1].speed,
                                 transient_rotations=3.0, measure_intervals=3)
        if not train.alive:
            failed = nx_new * h
            break
        trains.append(train)
        alive_state, nx = state, nx_new
    if failed is not None:
        lo_nx = int(round(failed / h))
        for _ in range(bisections):
            mid = (lo_nx + nx) // 2
            if mid in (lo_nx, nx):
                break
            train, state = _run_ring(num, _resample(alive_state, mid), trains[-1].speed,
                                     transient_rotations=3.0, measure_intervals=3)
            if train.alive:
                trains.append(train)
                alive_state, nx = state, mid
            else:
                lo_nx = mid
        failed = lo_nx * h
    trains.sort(key=lambda t: t.period)
    # periods must increase strictly for the interpolant (rings of equal rotation time are one train)
    trains = [t for k, t in enumerate(trains) if k == 0 or t.period > trains[k - 1].period * (1 + 1e-12)]
    period = np.array([t.period for t in trains])
    speed = np.array([t.speed for t in trains])
    length = np.array([t.length for t in trains])
    steady = np.array([t.steady for t in trains])
    if not steady.all():
        notes.append(f"{int((~steady).sum())} ring(s) had crossing intervals spreading by more "
                     f"than {_STEADY_SPREAD:.0%} (alternans or slow settling)")
    return DispersionCurve(
        model=num.model, params=dict(num.params), spacing=h, dt=num.dt, diffusion=num.diffusion,
        period=period, speed=speed, wavelength=length, steady=steady, solitary_speed=c_sol,
        shortest_period=float(period[0]), failed_length=failed, key=key, from_cache=False,
        notes=tuple(notes), spacings=(h,), dts=(num.dt,),
    )


def _extrapolate_curves(a: DispersionCurve, b: DispersionCurve) -> DispersionCurve:
    """Richardson combination of the curves of grids h (a) and h / sqrt(2) (b) at the
    periods of b's rings that both carry (module doc)."""
    t_lo = max(a.shortest_period, b.shortest_period)
    keep = (b.period >= t_lo) & (b.period <= a.period[-1])
    period = b.period[keep]
    speed = richardson(a.speed_at(period), b.speed_at(period))
    failed = None if b.failed_length is None else b.failed_length * (speed[0] * period[0]) / b.wavelength[keep][0]
    return DispersionCurve(
        model=b.model, params=dict(b.params), spacing=b.spacing, dt=b.dt, diffusion=b.diffusion,
        period=period, speed=speed, wavelength=speed * period, steady=b.steady[keep].copy(),
        solitary_speed=richardson(a.solitary_speed, b.solitary_speed), shortest_period=float(period[0]),
        failed_length=failed, notes=b.notes,
    )


def _curve_difference(new: DispersionCurve, old: DispersionCurve) -> tuple[float, float]:
    """(largest relative speed difference over trains at least 5 % above both shortest
    periods, and of the solitary speed; relative difference of the shortest periods)."""
    t_lo = _CONVERGE_ABOVE * max(new.shortest_period, old.shortest_period)
    T = new.period[(new.period >= t_lo) & (new.period <= old.period[-1])]
    d = [abs(new.solitary_speed / old.solitary_speed - 1.0)]
    if T.size:
        d.append(float(np.max(np.abs(new.speed_at(T) / old.speed_at(T) - 1.0))))
    return max(d), abs(new.shortest_period / old.shortest_period - 1.0)


def _converged_curve(one, num: Numerics, rtol: float, max_levels: int, key: str) -> DispersionCurve:
    levels = refined_numerics(num, max_levels)
    raw: list[DispersionCurve] = []
    ext: list[DispersionCurve] = []
    conv, conv_t = math.inf, math.inf
    for k, nk in enumerate(levels):
        raw.append(one(nk))
        if k == 0:
            continue
        ext.append(_extrapolate_curves(raw[-2], raw[-1]))
        conv, conv_t = _curve_difference(ext[-1], ext[-2] if len(ext) >= 2 else raw[-1])
        if len(ext) >= 2 and conv <= rtol:
            break
    best = ext[-1]
    notes = list(best.notes)
    if conv > rtol:
        notes.append(f"not converged to {rtol:.2%} on {len(raw)} grids (down to h = {raw[-1].spacing:.4g}): "
                     f"the last two extrapolations differ by {conv:.2%}")
    used = levels[:len(raw)]
    return DispersionCurve(
        model=best.model, params=dict(num.params), spacing=num.spacing, dt=num.dt, diffusion=num.diffusion,
        period=best.period, speed=best.speed, wavelength=best.wavelength, steady=best.steady,
        solitary_speed=best.solitary_speed, shortest_period=best.shortest_period,
        failed_length=best.failed_length, key=key, from_cache=False, notes=tuple(notes),
        spacings=tuple(n.spacing for n in used), dts=tuple(n.dt for n in used),
        convergence_rel=float(conv), shortest_period_convergence_rel=float(conv_t), converged=bool(conv <= rtol),
    )
