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

Results are cached per parameter set and numerics as JSON (key: SHA-256 of
the model, every parameter, spacing, dt, D and the algorithm's settings) in
`default_cache_dir()`: $WAVES_CACHE_DIR, else $XDG_CACHE_HOME/waves, else
~/.cache/waves.  Files are written atomically; a damaged cache file is
recomputed.

Spiral prediction (`spiral_prediction`): a 2-D simulation started from a
broken wave (`waves.simulate.simulate`, initial='spiral'); the rotation period
is the simulator's ground truth (threshold crossings at probe points after
the first third of the run) and the wavelength and speed are what the
analyser measures on the clean field (truth['analysis']); the wavelength the
1-D dispersion relation gives at that period, c(T) T, is reported beside it.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import pathlib
from dataclasses import dataclass, field

import numpy as np

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
]

ALGORITHM_VERSION = 1  # bump when the ring procedure changes: old cache entries are ignored

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
_SPIRAL_DEFAULTS = {"barkley": (40.0, 60.0, 0.15), "fhn": (80.0, 180.0, 0.5),
                    "relay": (80.0, 110.0, 0.4)}
_SPIRAL_FALLBACK = (80.0, 150.0, 0.5)


# --------------------------------------------------------------------------- numerics


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
    # a stalled or very slow wave: give up after 5e8 cell updates (a few seconds)
    max_steps = int(5e8 / nx) + chunk
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
                   dt: float | None = None, length: float | None = None) -> float:
    """Speed (model length units per model time unit) of a solitary wave on a
    no-flux cable of `length` model units (default: twice the model's default
    ring length); for the bistable Nagumo medium, the front speed."""
    num = resolve_numerics(model, params, spacing=spacing, dt=dt)
    if length is None:
        length = 2.0 * _DEFAULT_RING_LENGTH.get(num.model, _FALLBACK_RING_LENGTH)
    return _cable(num, float(length)).speed


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


def default_cache_dir() -> pathlib.Path:
    """$WAVES_CACHE_DIR, else $XDG_CACHE_HOME/waves, else ~/.cache/waves."""
    env = os.environ.get("WAVES_CACHE_DIR")
    if env:
        return pathlib.Path(env)
    xdg = os.environ.get("XDG_CACHE_HOME")
    base = pathlib.Path(xdg) if xdg else pathlib.Path.home() / ".cache"
    return base / "waves"


def cache_key(kind: str, num: Numerics, settings: dict) -> str:
    """SHA-256 (hex) of what determines a cached result."""
    record = {
        "kind": kind,
        "algorithm_version": ALGORITHM_VERSION,
        "model": num.model,
        "params": {k: float(v) for k, v in sorted(num.params.items())},
        "spacing": repr(float(num.spacing)),
        "dt": repr(float(num.dt)),
        "diffusion": repr(float(num.diffusion)),
        "settings": settings,
    }
    text = json.dumps(record, sort_keys=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _cache_read(path: pathlib.Path, key: str) -> dict | None:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("key") != key:
        return None
    return data


def _cache_write(path: pathlib.Path, data: dict) -> None:
    from waves import io as wio

    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        wio.write_json(path, data)
    except OSError:  # a read-only cache only costs recomputation
        pass


def _cache_path(cache_dir, kind: str, model: str, key: str) -> pathlib.Path:
    base = default_cache_dir() if cache_dir is None else pathlib.Path(cache_dir)
    return base / f"{kind}-{model}-{key[:20]}.json"


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
            "method": "one pulse on periodic rings of shrinking length (waves.dispersion)",
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
) -> DispersionCurve:
    """The dispersion relation c(T) of `model` on a 1-D ring (module doc).

    params: model parameters (and 'diffusion', 'dt'); spacing, dt: numerics
    (see `resolve_numerics`).  max_length: starting (longest) ring, model
    length units (default per model; doubled until the ring speed equals the
    solitary speed).  shrink: ring length factor per step (0.5 < shrink < 1).
    bisections: halvings of the gap at the shortest period.  cache_dir:
    folder of the cache (default `default_cache_dir()`); use_cache=False
    computes without reading or writing it.
    """
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
    key = cache_key("dispersion", num, settings)
    path = _cache_path(cache_dir, "dispersion", num.model, key)
    if use_cache:
        data = _cache_read(path, key)
        if data is not None:
            try:
                return DispersionCurve.from_dict(data, from_cache=True)
            except (KeyError, TypeError, ValueError):
                pass
    curve = _compute_curve(num, L0, float(shrink), int(bisections), key)
    if use_cache:
        _cache_write(path, curve.to_dict())
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
        notes=tuple(notes),
    )


# --------------------------------------------------------------------------- spiral


@dataclass(frozen=True)
class SpiralPrediction:
    """A spiral's rotation period and wavelength from a 2-D simulation, model units.

    period: simulator ground truth (median interval of upward threshold
    crossings at probe points after the first third of the run); None when
    the spiral did not persist.  wavelength, speed: measured by the analyser
    on the clean field (None when it found none).  n_cores: persistent cores
    it found.  size, duration: field side and run length.
    """

    model: str
    params: dict
    spacing: float
    diffusion: float
    size: float
    duration: float
    period: float | None
    period_q25: float | None
    period_q75: float | None
    wavelength: float | None
    speed: float | None
    n_cores: int
    key: str = ""
    from_cache: bool = False
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict:
        return {
            "kind": "spiral", "key": self.key, "algorithm_version": ALGORITHM_VERSION,
            "model": self.model, "params": dict(self.params), "spacing_model": self.spacing,
            "diffusion_model": self.diffusion, "size_model": self.size,
            "duration_model": self.duration, "period_model": self.period,
            "period_q25_model": self.period_q25, "period_q75_model": self.period_q75,
            "wavelength_model": self.wavelength, "speed_model": self.speed,
            "n_cores": self.n_cores, "notes": list(self.notes),
            "method": "2-D simulation from a broken wave (waves.simulate.simulate, initial='spiral')",
        }

    @classmethod
    def from_dict(cls, d: dict, *, from_cache: bool = False) -> SpiralPrediction:
        return cls(
            model=d["model"], params=dict(d["params"]), spacing=float(d["spacing_model"]),
            diffusion=float(d["diffusion_model"]), size=float(d["size_model"]),
            duration=float(d["duration_model"]), period=d["period_model"],
            period_q25=d["period_q25_model"], period_q75=d["period_q75_model"],
            wavelength=d["wavelength_model"], speed=d["speed_model"], n_cores=int(d["n_cores"]),
            key=d.get("key", ""), from_cache=from_cache, notes=tuple(d.get("notes", ())),
        )


def spiral_prediction(
    model: str,
    *,
    params: dict | None = None,
    spacing: float | None = None,
    size: float | None = None,
    duration: float | None = None,
    seed: int = 0,
    cache_dir: str | os.PathLike | None = None,
    use_cache: bool = True,
) -> SpiralPrediction:
    """Rotation period, wavelength and speed of a spiral of `model`, model units.

    params: model parameters (and 'diffusion', 'dt'); spacing: grid step
    (model length units, default the model's); size: side of the square field
    and duration: run length, model units (defaults per model, a few
    wavelengths and about 15-20 rotations at the default parameters).  The
    run is converted to the model's default time and length scales only so
    that the analyser's default period band applies; the results are in model
    units.  Cached like `dispersion_curve`.
    """
    num = resolve_numerics(model, params, spacing=spacing)
    spec = get_model(num.model)
    _require_recovery(spec)
    side_d, dur_d, frame_model = _SPIRAL_DEFAULTS.get(num.model, _SPIRAL_FALLBACK)
    side = float(side_d if size is None else size)
    dur = float(dur_d if duration is None else duration)
    if not (math.isfinite(side) and side >= 16 * num.spacing):
        raise WavesError(f"size must be at least 16 grid steps ({16 * num.spacing:g} model units), got {size!r}")
    if not (math.isfinite(dur) and dur > 0):
        raise WavesError(f"duration must be a positive number of model time units, got {duration!r}")
    settings = {"size": side, "duration": dur, "seed": int(seed)}
    key = cache_key("spiral", num, settings)
    path = _cache_path(cache_dir, "spiral", num.model, key)
    if use_cache:
        data = _cache_read(path, key)
        if data is not None:
            try:
                return SpiralPrediction.from_dict(data, from_cache=True)
            except (KeyError, TypeError, ValueError):
                pass
    from waves.simulate import simulate

    t_s, l_um = spec.time_scale_s, spec.length_scale_um
    n = int(round(side / num.spacing))
    frame_s = frame_model * t_s
    run = simulate(
        num.model, size=(n, n), pixel_size_um=num.spacing * l_um, minutes=dur * t_s / 60.0,
        frame_interval_s=frame_s, seed=int(seed), initial="spiral", dtype="float32",
        params={**num.params, "diffusion": num.diffusion, "dt": num.dt, "time_scale_s": t_s,
                "length_scale_um": l_um},
        oversample=1, truth_analysis=True, progress=False,
    )
    notes: list[str] = []
    pm = run.truth.get("period_model")
    an = run.truth.get("analysis", {})
    if "error" in an:
        notes.append("clean-field analysis: " + an["error"])
    to_model_speed = (t_s / 60.0) / l_um
    wl = an.get("wavelength_um")
    sp = an.get("front_speed_um_per_min")
    cores = an.get("spiral_cores") or []
    if not cores:
        notes.append("the analyser found no persistent spiral core on the clean field")
    pred = SpiralPrediction(
        model=num.model, params=dict(num.params), spacing=num.spacing, diffusion=num.diffusion,
        size=n * num.spacing, duration=dur,
        period=None if pm is None else float(pm["median"]),
        period_q25=None if pm is None else float(pm["q25"]),
        period_q75=None if pm is None else float(pm["q75"]),
        wavelength=None if wl is None else float(wl["median"]) / l_um,
        speed=None if sp is None else float(sp["median"]) * to_model_speed,
        n_cores=len(cores), key=key, from_cache=False, notes=tuple(notes),
    )
    if use_cache:
        _cache_write(path, pred.to_dict())
    return pred
