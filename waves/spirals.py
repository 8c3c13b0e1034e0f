"""Spiral prediction of a model: rotation period and wavelength from 2-D simulations.

A 2-D simulation started from a broken wave (`waves.simulate.simulate`,
initial='spiral'); the rotation period is the simulator's ground truth
(threshold crossings at probe points after the first third of the run) and
the wavelength and speed are what the analyser measures on the clean field
(truth['analysis']).

Converged by default: the run is repeated on grids h, h / sqrt(2), h / 2
(time step scaled by the square of the spacing ratio, so that the explicit
scheme's O(dt) + O(h^2) error falls as h^2) and the period is
Richardson-extrapolated from each pair of successive grids,
T = 2 T(h / sqrt(2)) - T(h) (`waves.dispersion.richardson`);
`convergence_rel` is the relative difference of the last two extrapolated
periods (with two grids: of the extrapolated and the finest period).  The
wavelength and speed are the finest run's (the analyser's scatter is larger
than their grid error).  Cached like the dispersion curves.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

from waves.cable import (
    REFINE_RATIO,
    Numerics,
    _require_recovery,
    refined_numerics,
    resolve_numerics,
    richardson,
)
from waves.dispersion import ALGORITHM_VERSION
from waves.dispersion_cache import cache_key, cache_path, cache_read, cache_write
from waves.errors import WavesError
from waves.models import get_model

__all__ = ["SpiralPrediction", "spiral_prediction", "SPIRAL_LEVELS"]

# 2-D spiral prediction per model: (field side, duration, frame interval), model units; the
# field holds a few wavelengths, the run 15-20 rotations, a rotation about 20 frames
_SPIRAL_DEFAULTS = {"barkley": (40.0, 60.0, 0.15), "fhn": (80.0, 180.0, 0.5),
                    "relay": (80.0, 110.0, 0.4)}
_SPIRAL_FALLBACK = (80.0, 150.0, 0.5)
SPIRAL_LEVELS = 3  # grids h, h / sqrt(2), h / 2 of a converged prediction


@dataclass(frozen=True)
class SpiralPrediction:
    """A spiral's rotation period and wavelength from 2-D simulations, model units.

    period: simulator ground truth (median interval of upward threshold
    crossings at probe points after the first third of the run),
    Richardson-extrapolated over `spacings` when there are several (module
    doc); None when the spiral did not persist.  period_q25, period_q75: of
    the finest run.  wavelength, speed: measured by the analyser on the
    finest run's clean field (None when it found none).  n_cores: persistent
    cores it found.  size, duration: field side and run length.  spacings,
    periods: grid step and period of each run; convergence_rel: estimated
    relative error of `period` (None with one grid).
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
    spacings: tuple[float, ...] = ()
    periods: tuple = ()
    convergence_rel: float | None = None

    def to_dict(self) -> dict:
        return {
            "kind": "spiral", "key": self.key, "algorithm_version": ALGORITHM_VERSION,
            "model": self.model, "params": dict(self.params), "spacing_model": self.spacing,
            "diffusion_model": self.diffusion, "size_model": self.size,
            "duration_model": self.duration, "period_model": self.period,
            "period_q25_model": self.period_q25, "period_q75_model": self.period_q75,
            "wavelength_model": self.wavelength, "speed_model": self.speed,
            "n_cores": self.n_cores, "notes": list(self.notes),
            "spacings_model": list(self.spacings), "periods_model": list(self.periods),
            "convergence_rel": self.convergence_rel,
            "method": "2-D simulation from a broken wave (waves.simulate.simulate, initial='spiral'); "
                      "period Richardson-extrapolated over the grids",
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
            spacings=tuple(d.get("spacings_model", ())), periods=tuple(d.get("periods_model", ())),
            convergence_rel=d.get("convergence_rel"),
        )


def _one_run(num: Numerics, side: float, dur: float, frame_model: float, seed: int) -> dict:
    from waves.simulate import simulate

    spec = get_model(num.model)
    t_s, l_um = spec.time_scale_s, spec.length_scale_um
    n = int(round(side / num.spacing))
    run = simulate(
        num.model, size=(n, n), pixel_size_um=num.spacing * l_um, minutes=dur * t_s / 60.0,
        frame_interval_s=frame_model * t_s, seed=int(seed), initial="spiral", dtype="float32",
        params={**num.params, "diffusion": num.diffusion, "dt": num.dt, "time_scale_s": t_s,
                "length_scale_um": l_um},
        oversample=1, truth_analysis=True, progress=False,
    )
    return {"n": n, "period": run.truth.get("period_model"), "analysis": run.truth.get("analysis", {})}


def spiral_prediction(
    model: str,
    *,
    params: dict | None = None,
    spacing: float | None = None,
    size: float | None = None,
    duration: float | None = None,
    seed: int = 0,
    levels: int = SPIRAL_LEVELS,
    cache_dir: str | os.PathLike | None = None,
    use_cache: bool = True,
) -> SpiralPrediction:
    """Rotation period, wavelength and speed of a spiral of `model`, model units.

    params: model parameters (and 'diffusion', 'dt'); spacing: the coarsest
    grid step (model length units, default the model's); levels: number of
    grids h, h / sqrt(2), ... (1: a single run on grid h, no extrapolation);
    size: side of the square field and duration: run length, model units
    (defaults per model, a few wavelengths and about 15-20 rotations at the
    default parameters).  The runs are converted to the model's default time
    and length scales only so that the analyser's default period band
    applies; the results are in model units.  Cached like `dispersion_curve`.
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
    if int(levels) != levels or not 1 <= levels <= 4:
        raise WavesError(f"levels must be a whole number from 1 to 4 (grids h, h/sqrt(2), ...), got {levels!r}")
    settings = {"size": side, "duration": dur, "seed": int(seed), "levels": int(levels),
                "ratio": REFINE_RATIO}
    key = cache_key("spiral", num, settings, algorithm_version=ALGORITHM_VERSION)
    path = cache_path(cache_dir, "spiral", num.model, key)
    if use_cache:
        data = cache_read(path, key)
        if data is not None:
            try:
                return SpiralPrediction.from_dict(data, from_cache=True)
            except (KeyError, TypeError, ValueError):
                pass
    runs, nums = [], refined_numerics(num, int(levels))
    for nk in nums:
        runs.append(_one_run(nk, side, dur, frame_model, seed))
    notes: list[str] = []
    l_um, t_s = spec.length_scale_um, spec.time_scale_s
    fine = runs[-1]
    an = fine["analysis"]
    if "error" in an:
        notes.append("clean-field analysis: " + an["error"])
    periods = [None if r["period"] is None else float(r["period"]["median"]) for r in runs]
    period, conv = periods[-1], None
    if all(p is not None for p in periods) and len(periods) >= 2:
        ext = [richardson(periods[k - 1], periods[k]) for k in range(1, len(periods))]
        period = ext[-1]
        conv = abs(ext[-1] - (ext[-2] if len(ext) >= 2 else periods[-1])) / abs(ext[-1])
    elif len(periods) >= 2:
        notes.append("the spiral did not persist on every grid: no extrapolated period")
        period = None
    to_model_speed = (t_s / 60.0) / l_um
    wl = an.get("wavelength_um")
    sp = an.get("front_speed_um_per_min")
    cores = an.get("spiral_cores") or []
    if not cores:
        notes.append("the analyser found no persistent spiral core on the clean field")
    pm = fine["period"]
    pred = SpiralPrediction(
        model=num.model, params=dict(num.params), spacing=num.spacing, diffusion=num.diffusion,
        size=fine["n"] * nums[-1].spacing, duration=dur, period=period,
        period_q25=None if pm is None else float(pm["q25"]),
        period_q75=None if pm is None else float(pm["q75"]),
        wavelength=None if wl is None else float(wl["median"]) / l_um,
        speed=None if sp is None else float(sp["median"]) * to_model_speed,
        n_cores=len(cores), key=key, from_cache=False, notes=tuple(notes),
        spacings=tuple(nk.spacing for nk in nums), periods=tuple(periods), convergence_rel=conv,
    )
    if use_cache:
        cache_write(path, pred.to_dict())
    return pred
