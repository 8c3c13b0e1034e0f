"""Ground truth and checks of a simulation run (used by `waves.simulate`).

`summarise`: the period summary of the sidecar.  `front_resolution_check`: the
1-D front speed error of the run's grid (`waves.models.resolution`) and a
warning when it exceeds FRONT_SPEED_TOLERANCE.  `clean_field_truth`: the
analyser's findings on the clean observable.
"""

from __future__ import annotations

import numpy as np

from waves.errors import WavesError
from waves.models.resolution import front_resolution
from waves.units import Calibration

__all__ = ["summarise", "front_resolution_check", "clean_field_truth", "FRONT_SPEED_TOLERANCE"]

# a run whose 1-D front speed estimate is off by more than this fraction is warned about
FRONT_SPEED_TOLERANCE = 0.02


def summarise(values: list[float]) -> dict | None:
    """Median, quartiles, range and count of `values` (None when empty)."""
    if not values:
        return None
    v = np.asarray(values, np.float64)
    return {
        "median": float(np.median(v)),
        "q25": float(np.percentile(v, 25)),
        "q75": float(np.percentile(v, 75)),
        "min": float(v.min()),
        "max": float(v.max()),
        "n": int(v.size),
    }


def front_resolution_check(spec, params, *, h, dt, diffusion, pixel_size_um, oversample):
    """The run's front speed error (`waves.models.resolution`) for the sidecar, and a
    warning when it exceeds FRONT_SPEED_TOLERANCE, naming the refinement that fixes it."""
    est, why = front_resolution(spec, params, spacing=h, dt=dt, diffusion=diffusion)
    if est is None:
        return {"estimated": False, "reason": why}, []
    out = {"estimated": True, **est.to_dict(), "tolerance": FRONT_SPEED_TOLERANCE}
    if abs(est.rel_error) <= FRONT_SPEED_TOLERANCE:
        return out, []
    n = est.refine_factor(FRONT_SPEED_TOLERANCE)
    slow = "slow" if est.rel_error < 0 else "fast"
    px = pixel_size_um / oversample
    fix = oversample * n
    return out, [
        f"the grid under-resolves the {spec.name} front: at grid step h = {h:.4g} model units "
        f"({px:.4g} um) its speed is about {abs(est.rel_error):.1%} {slow} (1-D estimate "
        f"{est.speed:.4g} against {est.speed_converged:.4g} converged); a grid step of "
        f"{h / n:.4g} ({px / n:.4g} um) brings it under {FRONT_SPEED_TOLERANCE:.0%}: "
        f"oversample={fix} (--oversample {fix})"
    ]


def clean_field_truth(clean, calibration: Calibration) -> dict:
    """The analyser's findings on the clean observable: the same functions
    that measure recorded stacks, on the field before rendering and noise."""
    from waves.analyse import analyse_movie

    method = "waves.analyse.analyse_movie on the clean observable (before rendering and noise)"
    try:
        s = analyse_movie(clean.view(), calibration=calibration).summary
    except WavesError as exc:
        return {"method": method, "error": " ".join(str(exc).split())}
    return {
        "method": method,
        "spiral_cores": s["spiral_cores"],
        "period_min": s["period_min"],
        "front_speed_um_per_min": s["front_speed_um_per_min"],
        "wavelength_um": s["wavelength_um"],
        "period_timecourse": s["period_timecourse"],
        "warnings": s["warnings"],
    }
