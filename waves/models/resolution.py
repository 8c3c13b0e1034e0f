"""Does a run's grid resolve the model's front?  A cheap 1-D estimate made
before a simulation.

A solitary wave (for the bistable Nagumo medium, a front) is launched at the
left end of a no-flux cable (one row of the shared integrator) and timed at
probes over the middle of the cable (upward threshold crossings, interpolated
between steps; speed = inverse slope of arrival time against position).  This
is done at the run's grid step h and time step dt, and on a grid twice as
fine, h/2 with dt/4, which keeps the diffusion number D dt / h^2.  At a fixed
diffusion number the scheme (5-point Laplacian, explicit Euler) is second
order in h, so the Richardson extrapolation

    c_inf = c(h/2) + (c(h/2) - c(h)) / 3

estimates the converged speed and (c(h) - c_inf) / c_inf the run's front
speed error.  With error e, refining by an integer factor N brings it to about
e / N^2, so N = ceil(sqrt(|e| / limit)) is the refinement that brings it under
`limit`.

The estimate uses the model's uniform parameters (not spatial variation,
occupancy or ramps).  It gives up (returns None, with the reason) when the
wave does not propagate, when resting cells fire by themselves (an oscillatory
medium has no solitary wave), when the arrival times are not a straight line,
or when it would cost more than MAX_CELL_UPDATES.  Results are cached in the
process per model, parameters and numerics.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from waves.errors import WavesError
from waves.models.base import Integrator
from waves.models.crossings import upward_crossings
from waves.models.grid import Grid

__all__ = ["FrontResolution", "cable_front_speed", "front_resolution", "MAX_CELL_UPDATES",
           "CABLE_CELLS"]

# cable length: this many cells of the model's default grid step
CABLE_CELLS = 200
# budget of the two cable runs together (about a second of one core)
MAX_CELL_UPDATES = 3e8
# arrival times must lie on a straight line within this fraction of the travel time
_LINEARITY = 0.01


class _NoEstimate(Exception):
    """The cable gives no speed; the message says why."""


@dataclass(frozen=True)
class FrontResolution:
    """Front speed at the run's grid and its convergence estimate (model units).

    speed: c(h, dt); speed_fine: c(h/2, dt/4); speed_converged: the Richardson
    extrapolation; rel_error: (speed - speed_converged) / speed_converged;
    refine_factor(limit) is the integer refinement that brings |rel_error|
    under `limit`.
    """

    spacing: float
    dt: float
    speed: float
    speed_fine: float
    speed_converged: float
    rel_error: float

    def refine_factor(self, limit: float) -> int:
        return max(1, math.ceil(math.sqrt(abs(self.rel_error) / limit) - 1e-9))

    def to_dict(self) -> dict:
        return {
            "method": "solitary wave on a 1-D no-flux cable at (h, dt) and (h/2, dt/4); "
                      "Richardson extrapolation for a second-order scheme",
            "spacing_model": self.spacing,
            "dt_model": self.dt,
            "speed_model": self.speed,
            "speed_fine_model": self.speed_fine,
            "speed_converged_model": self.speed_converged,
            "speed_rel_error": self.rel_error,
        }


def cable_front_speed(spec, params: dict, *, spacing: float, dt: float, diffusion: float,
                      length: float, max_cell_updates: float = MAX_CELL_UPDATES) -> float:
    """Speed of a solitary wave on a no-flux cable of `length` model units
    (module doc).  Raises WavesError when there is no propagating wave."""
    try:
        return _cable_speed(spec, params, spacing, dt, diffusion, length, max_cell_updates)
    except _NoEstimate as exc:
        raise WavesError(f"model {spec.name!r}: {exc}") from None


def _cable_speed(spec, params, h, dt, D, length, budget) -> float:
    nx = max(40, int(round(length / h)))
    nvar = len(spec.variables)
    rest, exc = spec.rest(params), spec.excited(params)
    width = max(3, nx // 20)
    state = np.empty((nvar, 1, nx), np.float32)
    for k in range(nvar):
        state[k] = np.float32(rest[k])
        state[k, 0, :width] = np.float32(exc[k])
    # probes over the middle of the cable, and one at the far end: a far cell that
    # fires before the wave could reach it means the medium fires by itself
    pj = np.unique(np.linspace(0.4 * nx, 0.8 * nx, 9).astype(np.int64))
    pj = np.append(pj, nx - 1)
    probes = np.stack([np.zeros_like(pj), pj], axis=1)
    it = Integrator(spec, Grid((1, nx), h), params, state, dt=dt, diffusion=D,
                    probes_yx=probes, threads=1)
    thr = spec.threshold
    arrival = np.full(pj.size, np.nan)
    prev, t_prev = it.state[0, 0, pj].copy(), 0.0
    chunk = max(1, int(round(0.25 / dt)))
    max_steps = int(budget / nx) + chunk
    steps = 0
    while np.isnan(arrival[-2]):
        trace = it.advance(chunk)
        times = it.time - dt * np.arange(chunk - 1, -1, -1)
        for k, c in enumerate(upward_crossings(trace, times, thr, prev, t_prev)):
            if c.size and np.isnan(arrival[k]):
                arrival[k] = c[0]
        prev, t_prev = trace[-1].copy(), it.time
        steps += chunk
        if steps > max_steps:
            raise _NoEstimate("the cable run exceeds its cost budget (a slow wave or a very "
                              "fine grid)")
        if it.state[0].max() < thr:
            raise _NoEstimate("a wave launched on a 1-D cable did not propagate")
    if not np.isnan(arrival[-1]):
        raise _NoEstimate("resting cells fire by themselves (an oscillatory medium)")
    arrival = arrival[:-1]
    x = pj[:-1] * h
    slope, icpt = np.polyfit(x, arrival, 1)
    travel = arrival[-1] - arrival[0]
    resid = np.abs(arrival - (slope * x + icpt)).max()
    if not (slope > 0 and travel > 0 and resid < _LINEARITY * travel):
        raise _NoEstimate("the arrival times along the cable are not those of a steady wave")
    return float(1.0 / slope)


def front_resolution(spec, params: dict, *, spacing: float, dt: float,
                     diffusion: float) -> tuple[FrontResolution | None, str]:
    """(estimate, "") or (None, reason): the front speed error of a run with
    grid step `spacing` and time step `dt` (module doc)."""
    key = tuple(sorted((k, float(v)) for k, v in params.items()))
    return _cached(spec.name, key, float(spacing), float(dt), float(diffusion))


@functools.lru_cache(maxsize=64)
def _cached(model, key, h, dt, D):
    from waves.models import get_model

    spec = get_model(model)
    params = dict(key)
    if not D > 0:
        return None, "no diffusion, no front"
    length = CABLE_CELLS * spec.spacing
    try:
        coarse = _cable_speed(spec, params, h, dt, D, length, MAX_CELL_UPDATES / 9)
        fine = _cable_speed(spec, params, h / 2, dt / 4, D, length, MAX_CELL_UPDATES * 8 / 9)
    except _NoEstimate as exc:
        return None, str(exc)
    except WavesError as exc:  # e.g. a cable run that went non-finite: no estimate, no failure
        return None, " ".join(str(exc).split())
    converged = fine + (fine - coarse) / 3.0
    return FrontResolution(h, dt, coarse, fine, converged, (coarse - converged) / converged), ""
