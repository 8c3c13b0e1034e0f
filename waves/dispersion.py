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
solitary speed.  `converge=False` gives the plain one-grid result.  A
converged relay curve starts from 40 um when no spacing is given (its
extrapolation agrees with finer starts to 0.1 % at a quarter of the cost).
`solitary_speed` alone stays the one-grid value by default (the speed a
simulation on that grid runs at, e.g. to warn about an under-resolved grid);
`solitary_speed(..., converge=True)` and `converged_solitary_speed` give the
extrapolated one.

Results are cached per parameter set and numerics as JSON
(`waves.dispersion_cache`; key: SHA-256 of the model, every parameter,
spacing, dt, D and the algorithm's settings, the convergence settings
included) in `default_cache_dir()`.

Spiral prediction: `waves.spirals.spiral_prediction` (also reachable here).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np

from waves import dispersion_cache as _cache
from waves.cable import (  # noqa: F401  (re-exported: the public API of model predictions)
    _CONVERGE_ABOVE,
    _CONVERGE_START,
    _DEFAULT_RING_LENGTH,
    _FALLBACK_RING_LENGTH,
    _MAX_DOUBLINGS,
    _PLATEAU_TOL,
    _STEADY_SPREAD,
    DEFAULT_RTOL,
    MAX_LEVELS,
    REFINE_RATIO,
    Numerics,
    RingTrain,
    SolitarySpeed,
    _cable,
    _check_convergence_options,
    _check_not_oscillatory,
    _require_recovery,
    _resample,
    _ring_from_cable,
    _run_ring,
    converged_solitary_speed,
    refined_numerics,
    resolve_numerics,
    richardson,
    ring_train,
    solitary_speed,
)
from waves.dispersion_cache import default_cache_dir
from waves.errors import SimulationError, WavesError
from waves.models import get_model

__all__ = [
    "RingTrain",
    "DispersionCurve",
    "Numerics",
    "resolve_numerics",
    "solitary_speed",
    "ring_train",
    "dispersion_curve",
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

# --------------------------------------------------------------------------- numerics


def __getattr__(name):  # the spiral prediction lives in waves.spirals (no import cycle)
    if name in ("spiral_prediction", "SpiralPrediction"):
        from waves import spirals

        return getattr(spirals, name)
    raise AttributeError(f"module 'waves.dispersion' has no attribute {name!r}")


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
