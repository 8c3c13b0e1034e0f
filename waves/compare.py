"""Measured versus model: fit a model's free scales to measured dispersion points.

`waves compare ANALYSIS_DIR [ANALYSIS_DIR ...] --model MODEL [--set NAME=VALUE ...]`
reads the dispersion points (period_min, speed_um_per_min per time window and
field region: dispersion.csv) and the medians (summary.json) of one or more
analysis folders (several movies of one preparation pool their points), fits
the model's free scales so that its dispersion relation (`waves.dispersion`)
passes through the points, and writes into the first folder (or --out):

    compare_<model>.json   fitted scales with 95 % intervals, residuals, checks,
                           the model curve in minutes and um/min, the spiral prediction
    compare_<model>.csv    one row per measured point: measured and model speed,
                           residual, robust weight, within the model's range
    compare_<model>.png    measured points and medians over the model curve

Free scales.  Two-variable models (Barkley, FitzHugh-Nagumo) are
dimensionless: the time scale s_t (time_scale_s, seconds per model time unit)
and the length scale s_l (length_scale_um, micrometres per model length unit)
map the model curve c(T) to period_min = T s_t / 60 and speed_um_per_min =
c s_l / (s_t / 60).  The relay model is in minutes and micrometres already;
its free constants are the cAMP diffusion coefficient D and the degradation
rate ke_per_min.  D enters exactly as V = sqrt(D / D0) c(T; D0) (with only D
changed, lengths scaled by sqrt(D / D0) leave the equations unchanged), so it
costs no recomputation; ke changes the kinetics, so curves are computed on a
small grid of ke values (cached) and log c is interpolated linearly in ke
between them.  A scale given with --set (time_scale_s, length_scale_um; for
the relay model diffusion, in model units of (100 um)^2/min, or ke_per_min)
is held fixed and the others are fitted.

Fit.  Least squares on log speeds (scipy.optimize.least_squares; residual
r_i = log V_i - log V_model(P_i), so each point weighs by its relative error)
over the log of each scale (ke itself for the relay model), started from the
best point of a grid search.  By default the loss is robust (Cauchy, scale
`robust_scale` = 2 % relative): points near a pacemaker, a boundary or a
start-up transient, where the analyser's local speed is off by far more than
the scatter, are down-weighted (weight 1 / (1 + (r / scale)^2), in the table)
instead of pulling the fit; robust_scale=None gives plain least squares.
Between rings the model curve is the monotone cubic interpolation of
`DispersionCurve.speed_at`; below the shortest period the fit extends log c
linearly in log T, and such points are marked out of the model's range (the
model cannot carry those trains).

Confidence intervals, on the log scale (so intervals of the scales are
asymmetric), from Student's t.  Points from analysis folders are not
independent: the regions of one time window see the same waves and
consecutive windows share half their frames.  So their covariance is the
cluster-robust sandwich over clusters of two consecutive windows (G
clusters, G - 1 degrees of freedom; `window_clusters`).  Points given
without clusters get s^2 (J^T J)^-1, J the Jacobian of the (loss-weighted)
residuals that least_squares returns and s^2 = 2 cost / (n - p), with
n - p degrees of freedom.  Neither holds a bias of the measurement itself
(a few per cent for the analyser near pacemakers and field edges).
A scale whose interval spans more
than a factor 2 is reported as not constrained (all periods where the curve
is flat, for instance, determine only s_l / s_t).

Model numerics.  The model curves and the spiral period are converged in
the grid (`waves.dispersion`: grids --spacing, --spacing / sqrt(2), ...,
Richardson-extrapolated until successive estimates agree to 0.3 %); the
grids and the convergence estimate are in the JSON ('numerics':
spacings_model, convergence_rel, shortest_period_convergence_rel;
'model_spiral': spacings_model, convergence_rel), in the table
(model_convergence_rel) and in the checks (a row for the curve, counted as
converged within 0.5 %; the spiral period row's note).  --no-converge uses
the one-grid model at --spacing instead, grid error included, which is what
a stack simulated on that grid obeys.  The fits themselves are in
`waves.compare_fit`, the files and figure in `waves.compare_output`.
"""

from __future__ import annotations

import argparse
import json
import math
import pathlib
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from waves.cli_common import parse_settings
from waves.compare_fit import (  # noqa: F401  (re-exported: the fits are part of the compare API)
    DEFAULT_ROBUST_SCALE,
    ScaleFit,
    _log_speed,
    _relay_log_speed,
    _relay_shortest_period,
    _solve,
    fit_relay,
    fit_scales,
    window_clusters,
)
from waves.compare_output import _fmt_scale, comparison_figure, write_comparison
from waves.dispersion import dispersion_curve
from waves.errors import InputError, WavesError
from waves.models import get_model
from waves.spirals import SPIRAL_LEVELS, spiral_prediction

__all__ = [
    "Measured",
    "ScaleFit",
    "Comparison",
    "read_measured",
    "pool_measured",
    "fit_scales",
    "fit_relay",
    "compare_analysis",
    "comparison_figure",
    "write_comparison",
    "add_arguments",
    "run_from_args",
    "RELAY_KE_GRID",
    "DEFAULT_TOLERANCE",
    "DEFAULT_ROBUST_SCALE",
]

# ke values (1/min) of the relay curves for the ke fit; all excitable with the other
# Table 2 values (ke = 8 oscillates, REFERENCES.md [computed])
RELAY_KE_GRID = (9.0, 10.0, 12.0, 15.0, 20.0)
# a quantity counts as reproduced when the model is within 10 % (common practice, no source)
DEFAULT_TOLERANCE = 0.10
# a model prediction counts as converged when its grid extrapolations agree to 0.5 % (issue 11)
CONVERGED_REL = 0.005


# --------------------------------------------------------------------------- measured data


@dataclass(frozen=True)
class Measured:
    """Measured quantities of one or more analysis folders.

    period_min, speed_um_per_min, t_min, region, folder_index: dispersion
    points (finite, positive rows of dispersion.csv), pooled over `folders`.
    medians: per folder, summary.json's {median, q25, q75, n} (or None) for
    'period_min', 'front_speed_um_per_min', 'wavelength_um'.
    n_spiral_cores: per folder, persistent cores in summary.json.
    """

    folders: tuple[pathlib.Path, ...]
    period_min: np.ndarray
    speed_um_per_min: np.ndarray
    t_min: np.ndarray
    region: np.ndarray
    folder_index: np.ndarray
    medians: tuple[dict, ...]
    n_spiral_cores: tuple[int, ...]
    sources: tuple = ()


def _column(cols: dict, name: str, path, n: int) -> np.ndarray:
    if name not in cols:
        return np.full(n, np.nan)
    out = np.full(len(cols[name]), np.nan)
    for i, v in enumerate(cols[name]):
        try:
            out[i] = float(v) if v != "" else np.nan
        except ValueError:
            raise InputError(f"{path}: column {name!r} row {i + 1} is not a number: {v!r}") from None
    return out


def read_measured(folder, *, t_range_min: tuple[float, float] | None = None) -> Measured:
    """Read dispersion.csv and summary.json of an analysis folder (`waves analyse --out`).

    t_range_min: keep only points whose window centre t_min lies in [lo, hi]
    (e.g. to drop a start-up transient or pick a developmental stage).
    """
    from waves.result import read_table_csv

    d = pathlib.Path(folder)
    if not d.is_dir():
        raise InputError(f"analysis folder {str(d)!r} not found; give the --out folder of 'waves analyse'")
    summary_path, disp_path = d / "summary.json", d / "dispersion.csv"
    if not summary_path.is_file():
        raise InputError(f"{d} has no summary.json; run 'waves analyse STACK --out {d}' first")
    try:
        summary = json.loads(summary_path.read_text(encoding="utf-8"))
    except ValueError as exc:
        raise InputError(f"{summary_path} is not valid JSON ({exc}); rerun 'waves analyse'") from None
    if not disp_path.is_file():
        raise InputError(f"{d} has no dispersion.csv; rerun 'waves analyse STACK --out {d}'")
    cols = read_table_csv(disp_path)
    for name in ("period_min", "speed_um_per_min"):
        if name not in cols:
            raise InputError(f"{disp_path} has no column {name!r}; it must be a dispersion.csv written by 'waves analyse'")
    n = len(cols["period_min"])
    P = _column(cols, "period_min", disp_path, n)
    V = _column(cols, "speed_um_per_min", disp_path, n)
    t = _column(cols, "t_min", disp_path, n)
    reg = _column(cols, "region", disp_path, n)
    ok = np.isfinite(P) & np.isfinite(V) & (P > 0) & (V > 0)
    if t_range_min is not None:
        lo, hi = _t_range(t_range_min)
        ok &= (t >= lo) & (t <= hi)
    medians = {}
    for key in ("period_min", "front_speed_um_per_min", "wavelength_um"):
        q = summary.get(key)
        medians[key] = q if isinstance(q, dict) and q.get("median") is not None else None
    return Measured(
        folders=(d,), period_min=P[ok], speed_um_per_min=V[ok], t_min=t[ok], region=reg[ok],
        folder_index=np.zeros(int(ok.sum()), np.int64), medians=(medians,),
        n_spiral_cores=(len(summary.get("spiral_cores") or []),), sources=(summary.get("source"),),
    )


def _t_range(t_range_min) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in t_range_min)
    except (TypeError, ValueError):
        raise WavesError(f"time range must be two numbers of minutes (LO HI), got {t_range_min!r}") from None
    if not lo < hi:
        raise WavesError(f"time range must be increasing (LO < HI minutes), got {t_range_min!r}")
    return lo, hi


def pool_measured(parts: Sequence[Measured]) -> Measured:
    """Pool the points of several `Measured` (one per folder) into one."""
    if not parts:
        raise WavesError("give at least one analysis folder")
    return Measured(
        folders=tuple(f for m in parts for f in m.folders),
        period_min=np.concatenate([m.period_min for m in parts]),
        speed_um_per_min=np.concatenate([m.speed_um_per_min for m in parts]),
        t_min=np.concatenate([m.t_min for m in parts]),
        region=np.concatenate([m.region for m in parts]),
        folder_index=np.concatenate([np.full(m.period_min.size, k, np.int64) for k, m in enumerate(parts)]),
        medians=tuple(md for m in parts for md in m.medians),
        n_spiral_cores=tuple(c for m in parts for c in m.n_spiral_cores),
        sources=tuple(s for m in parts for s in m.sources),
    )


# --------------------------------------------------------------------------- comparison


@dataclass(frozen=True)
class Comparison:
    """Measured analyses held against a model.

    fit: the fitted scales.  curve: the model curve in measured units
    ('period_min', 'speed_um_per_min' arrays; 'solitary_speed_um_per_min',
    'shortest_period_min').  spiral: the model spiral in measured units
    ('period_min', 'wavelength_um', 'speed_um_per_min', ...) or None.
    checks: one dict per measured quantity {quantity, folder, measured,
    model, relative_difference, reproduced (True, False, or None when not
    tested), note}.
    """

    model: str
    params: dict
    measured: Measured
    fit: ScaleFit
    curve: dict
    spiral: dict | None
    checks: list
    tolerance: float
    numerics: dict
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict:
        m = self.measured
        return {
            "schema": "waves-compare",
            "schema_version": 1,
            "model": self.model,
            "params": dict(self.params),
            "analysis_folders": [str(f) for f in m.folders],
            "sources": list(m.sources),
            "fit": self.fit.to_dict(),
            "checks": list(self.checks),
            "tolerance_relative": self.tolerance,
            "measured_medians": list(m.medians),
            "measured_spiral_cores": list(m.n_spiral_cores),
            "model_curve": {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in self.curve.items()},
            "model_spiral": self.spiral,
            "numerics": dict(self.numerics),
            "notes": list(self.notes),
            "disclaimer": "research comparison with a model; not a clinical, diagnostic or safety judgement",
        }


def _check(quantity: str, folder: str | None, measured, model, tol: float, note: str = "",
           applicable: bool = True) -> dict:
    row = {"quantity": quantity, "folder": folder, "measured": measured, "model": model,
           "relative_difference": None, "reproduced": None, "note": note}
    if measured is None or model is None or not (math.isfinite(measured) and math.isfinite(model)):
        row["note"] = note or "not available"
        return row
    rel = model / measured - 1.0
    row.update(measured=float(measured), model=float(model), relative_difference=float(rel),
               reproduced=bool(abs(rel) <= tol) if applicable else None)
    return row


class _Model:
    """A fitted model curve in measured units: speed(period_min), scales, curve."""

    def __init__(self, speed, curve: dict, s_t_min: float, s_l_um: float):
        self.speed = speed  # period_min array -> um/min (NaN below the shortest period)
        self.curve = curve
        self.s_t_min = s_t_min  # minutes per model time unit
        self.s_l_um = s_l_um  # um per model length unit


def _convergence_record(curves) -> dict:
    """Grids and convergence estimate of the model curves (the worst of several)."""
    conv = [c.convergence_rel for c in curves]
    conv_t = [c.shortest_period_convergence_rel for c in curves]
    return {
        "spacings_model": [list(c.spacings) for c in curves] if len(curves) > 1 else list(curves[0].spacings),
        "convergence_rel": None if any(v is None for v in conv) else float(max(conv)),
        "shortest_period_convergence_rel": None if any(v is None for v in conv_t) else float(max(conv_t)),
        "converged": None if any(c.converged is None for c in curves) else all(c.converged for c in curves),
        "extrapolated": all(len(c.spacings) > 1 for c in curves),
    }


def _fit_relay_model(P, V, params, *, spacing, ke_grid, robust_scale, cache_dir, use_cache, notes, clusters=None,
                     converge=True):
    from waves.models.relay import LENGTH_UNIT_UM

    rest = dict(params or {})
    D_model = rest.pop("diffusion", None)
    ke_fixed = rest.pop("ke_per_min", None)
    D_fixed = None if D_model is None else float(D_model) * LENGTH_UNIT_UM ** 2
    kes = sorted({float(k) for k in ke_grid}) if ke_fixed is None else [float(ke_fixed)]
    curves = []
    for ke in kes:
        try:
            curves.append((ke, dispersion_curve("relay", params={**rest, "ke_per_min": ke}, spacing=spacing,
                                                cache_dir=cache_dir, use_cache=use_cache, converge=converge)))
        except WavesError as exc:
            if ke_fixed is not None:
                raise
            notes.append(f"ke = {ke:g} /min left out: {' '.join(str(exc).split())}")
    if not curves:
        raise WavesError("no ke value of the grid gives an excitable relay medium; give other --ke-grid values")
    fit = fit_relay(curves, P, V, diffusion_um2_per_min=D_fixed, ke_per_min=ke_fixed, robust_scale=robust_scale,
                    clusters=clusters)
    D, ke = fit.values["diffusion_um2_per_min"], fit.values["ke_per_min"]
    D0 = curves[0][1].diffusion * LENGTH_UNIT_UM ** 2
    s_l = LENGTH_UNIT_UM * math.sqrt(D / D0)
    T_min = _relay_shortest_period(curves, ke)
    ks = [k for k, _ in curves]
    c_sol = float(np.interp(ke, ks, [c.solitary_speed for _, c in curves])) * s_l

    def speed(period_min):
        p = np.atleast_1d(np.asarray(period_min, np.float64))
        v = s_l * np.exp(_relay_log_speed(curves, ke, np.log(p)))
        return np.where(p >= T_min, v, np.nan)

    hi = max(c.period[-1] for _, c in curves)
    Pg = np.geomspace(T_min, hi, 240)
    curve = {"period_min": Pg, "speed_um_per_min": speed(Pg), "solitary_speed_um_per_min": c_sol,
             "shortest_period_min": T_min}
    near = curves[int(np.argmin([abs(k - ke) for k in ks]))][1]
    numerics = {"spacing_model": near.spacing, "dt_model": near.dt, "diffusion0_model": near.diffusion,
                "diffusion0_um2_per_min": D0, "ke_grid_per_min": ks, "cache_keys": [c.key for _, c in curves],
                **_convergence_record([c for _, c in curves])}
    model_params = {**near.params, "ke_per_min": ke, "diffusion": D / LENGTH_UNIT_UM ** 2}
    spiral_params = {**rest, "ke_per_min": round(ke, 1)}
    return fit, _Model(speed, curve, 1.0, s_l), numerics, model_params, spiral_params


def _fit_scaled_model(spec, P, V, params, *, spacing, robust_scale, cache_dir, use_cache, clusters=None,
                      converge=True):
    given = dict(params or {})
    ts = given.pop("time_scale_s", None)
    ls = given.pop("length_scale_um", None)
    c = dispersion_curve(spec.name, params=given, spacing=spacing, cache_dir=cache_dir, use_cache=use_cache,
                         converge=converge)
    fit = fit_scales(c, P, V, time_scale_s=ts, length_scale_um=ls, robust_scale=robust_scale, clusters=clusters)
    s_t = fit.values["time_scale_s"] / 60.0
    s_l = fit.values["length_scale_um"]

    def speed(period_min):
        p = np.atleast_1d(np.asarray(period_min, np.float64))
        return c.speed_at(p / s_t) * s_l / s_t

    Pg = np.geomspace(c.shortest_period, c.period[-1], 240) * s_t
    curve = {"period_min": Pg, "speed_um_per_min": speed(Pg),
             "solitary_speed_um_per_min": c.solitary_speed * s_l / s_t,
             "shortest_period_min": c.shortest_period * s_t}
    numerics = {"spacing_model": c.spacing, "dt_model": c.dt, "diffusion_model": c.diffusion,
                "cache_keys": [c.key], "curve_notes": list(c.notes), **_convergence_record([c])}
    return fit, _Model(speed, curve, s_t, s_l), numerics, dict(c.params), given


def compare_analysis(
    folders,
    model: str,
    *,
    params: dict | None = None,
    spacing: float | None = None,
    spiral: bool = True,
    tolerance: float = DEFAULT_TOLERANCE,
    t_range_min: tuple[float, float] | None = None,
    robust_scale: float | None = DEFAULT_ROBUST_SCALE,
    ke_grid: Sequence[float] = RELAY_KE_GRID,
    cache_dir=None,
    use_cache: bool = True,
    spiral_levels: int = SPIRAL_LEVELS,
    converge: bool = True,
) -> Comparison:
    """Fit `model` to the analyses in `folders` (one folder or a sequence) and
    check which measured quantities it reproduces (module doc).

    params: model parameters and numerics as for `waves simulate --set`; the
    free scales given here are held fixed (module doc).  spacing: grid step
    of the model runs (model length units).  spiral: also predict the spiral
    period and wavelength with a 2-D simulation (cached).  tolerance: relative
    difference within which a quantity counts as reproduced.  t_range_min:
    use only dispersion points with t_min in [lo, hi].  robust_scale: see
    `fit_scales`.  ke_grid: relay ke values (1/min) of the ke fit.
    cache_dir / use_cache: see `waves.dispersion.dispersion_curve`.
    spiral_levels: grids of the spiral prediction (`waves.spirals`).  The
    model curves are converged (`waves.dispersion.dispersion_curve`), their
    grids and convergence estimate are in `numerics` and the checks;
    converge=False uses the one-grid curves at `spacing` and one spiral run
    (the model as a simulation on that grid runs it, grid error included).
    """
    spec = get_model(model)
    tol = float(tolerance)
    if not (math.isfinite(tol) and 0 < tol < 1):
        raise WavesError(f"tolerance must be a fraction between 0 and 1, got {tolerance!r}")
    if isinstance(folders, (str, pathlib.Path)):
        folders = [folders]
    measured = pool_measured([read_measured(f, t_range_min=t_range_min) for f in folders])
    P, V = measured.period_min, measured.speed_um_per_min
    clusters = window_clusters(measured)
    notes: list[str] = []
    if spec.name == "relay":
        fit, mod, numerics, model_params, spiral_params = _fit_relay_model(
            P, V, params, spacing=spacing, ke_grid=ke_grid, robust_scale=robust_scale,
            cache_dir=cache_dir, use_cache=use_cache, notes=notes, clusters=clusters, converge=converge)
        spiral_spacing = 0.4 if spacing is None else spacing  # 40 um: a 2-D relay run of seconds
    else:
        fit, mod, numerics, model_params, spiral_params = _fit_scaled_model(
            spec, P, V, params, spacing=spacing, robust_scale=robust_scale, cache_dir=cache_dir,
            use_cache=use_cache, clusters=clusters, converge=converge)
        spiral_spacing = spacing
    notes.extend(fit.notes)

    frac = float(np.mean(fit.in_model_range))
    checks = [
        {"quantity": "dispersion points (weighted rms relative residual)", "folder": None,
         "measured": None, "model": None, "relative_difference": fit.rms_relative,
         "reproduced": bool(fit.rms_relative <= tol),
         "note": f"{fit.n_points} points, {int(np.sum(fit.weight < 0.5))} down-weighted as outliers"},
        {"quantity": "periods the model can carry (at least its shortest period)", "folder": None,
         "measured": float(P.min()), "model": float(mod.curve["shortest_period_min"]),
         "relative_difference": None, "reproduced": bool(frac == 1.0),
         "note": f"{frac:.0%} of the points lie at or above the model's shortest period"},
    ]
    conv = numerics.get("convergence_rel")
    grids = numerics.get("spacings_model") or []
    n_grids = len(grids[0]) if grids and isinstance(grids[0], list) else len(grids)
    checks.append({
        "quantity": "model curve converged in the grid (speeds; last two extrapolations)", "folder": None,
        "measured": None, "model": None, "relative_difference": conv,
        "reproduced": None if conv is None else bool(conv <= CONVERGED_REL),
        "note": (f"Richardson-extrapolated over {n_grids} grids from h = {numerics['spacing_model']:g}"
                 if numerics.get("extrapolated") else "one grid, not extrapolated (converge=False)")
        + f"; counted as converged within {CONVERGED_REL:.1%}",
    })
    pred = None
    if spiral:
        pred = spiral_prediction(spec.name, params=spiral_params, spacing=spiral_spacing,
                                 levels=spiral_levels if converge else 1,
                                 cache_dir=cache_dir, use_cache=use_cache)
    for k, (folder, med) in enumerate(zip(measured.folders, measured.medians, strict=True)):
        name = str(folder)
        p_med = med["period_min"]["median"] if med["period_min"] else None
        v_med = med["front_speed_um_per_min"]["median"] if med["front_speed_um_per_min"] else None
        wl_med = med["wavelength_um"]["median"] if med["wavelength_um"] else None
        v_model = None if p_med is None else float(mod.speed([p_med])[0])
        if v_model is not None and not math.isfinite(v_model):
            v_model = None
        checks.append(_check("front speed at the median period (um/min)", name, v_med, v_model, tol,
                             "model speed at the measured median period"))
        checks.append(_check("wavelength at the median period (um)", name, wl_med,
                             None if v_model is None else v_model * p_med, tol,
                             "model speed times the measured median period"))
        if pred is not None:
            has = measured.n_spiral_cores[k] > 0
            why = "" if has else ("no persistent spiral core in this field: its period is set by pacemakers, "
                                  "so the model spiral is shown, not tested")
            sp_p = None if pred.period is None else pred.period * mod.s_t_min
            sp_wl = None if pred.wavelength is None else pred.wavelength * mod.s_l_um
            if pred.convergence_rel is not None:
                why = (why + "; " if why else "") + (
                    f"model period extrapolated over {len(pred.spacings)} grids, converged to "
                    f"{pred.convergence_rel:.2%}")
            checks.append(_check("spiral period (min)", name, p_med, sp_p, tol, why, applicable=has))
            checks.append(_check("spiral wavelength (um)", name, wl_med, sp_wl, tol, why, applicable=has))
    spiral_out = None
    if pred is not None:
        spiral_out = {
            "period_min": None if pred.period is None else pred.period * mod.s_t_min,
            "wavelength_um": None if pred.wavelength is None else pred.wavelength * mod.s_l_um,
            "speed_um_per_min": None if pred.speed is None else pred.speed * mod.s_l_um / mod.s_t_min,
            "period_model": pred.period, "wavelength_model": pred.wavelength, "speed_model": pred.speed,
            "n_cores": pred.n_cores, "size_model": pred.size, "duration_model": pred.duration,
            "spacing_model": pred.spacing, "params": pred.params, "notes": list(pred.notes),
            "spacings_model": list(pred.spacings), "periods_model": list(pred.periods),
            "convergence_rel": pred.convergence_rel,
            "method": "2-D simulation from a broken wave; period from threshold crossings, wavelength "
                      "and speed from the analyser on the clean field",
        }
        if spec.name == "relay":
            spiral_out["notes"].append(
                f"run at ke = {pred.params['ke_per_min']:g} /min with D0 on a {pred.spacing * 100:g} um grid; "
                "wavelength and speed scaled by sqrt(D / D0)")
    return Comparison(
        model=spec.name, params=model_params, measured=measured, fit=fit, curve=mod.curve, spiral=spiral_out,
        checks=checks, tolerance=tol, numerics=numerics, notes=tuple(notes),
    )


# --------------------------------------------------------------------------- outputs


# --------------------------------------------------------------------------- CLI


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the `compare` options to `parser`."""
    parser.add_argument("analysis_dirs", nargs="+", metavar="ANALYSIS_DIR",
                        help="--out folder(s) of 'waves analyse'; several folders pool their points")
    parser.add_argument("--model", required=True, help="model: barkley, fhn or relay")
    parser.add_argument("--set", dest="set_params", action="append", default=[], metavar="NAME=VALUE",
                        help="model parameter or numeric (dt, diffusion); time_scale_s / length_scale_um "
                             "(relay: diffusion, ke_per_min) given here are held fixed; repeatable")
    parser.add_argument("--out", metavar="DIR", help="folder for the outputs (default: the first ANALYSIS_DIR)")
    parser.add_argument("--t-range", type=float, nargs=2, metavar=("LO", "HI"),
                        help="use only dispersion points with window centre between LO and HI minutes")
    parser.add_argument("--spacing", type=float, metavar="H",
                        help="coarsest grid step of the model runs (model units); finer grids h/sqrt(2), ... "
                             "are added until the Richardson-extrapolated prediction converges")
    parser.add_argument("--tolerance", type=float, default=DEFAULT_TOLERANCE,
                        help="relative difference counted as reproduced (default 0.1)")
    parser.add_argument("--robust-scale", type=float, default=DEFAULT_ROBUST_SCALE, metavar="R",
                        help="relative scatter of the robust (Cauchy) loss (default 0.02); 0: plain least squares")
    parser.add_argument("--ke-grid", type=float, nargs="+", metavar="KE",
                        help="relay: ke values (1/min) of the curves for the ke fit")
    parser.add_argument("--no-spiral", action="store_true", help="skip the 2-D spiral prediction")
    parser.add_argument("--no-converge", action="store_true",
                        help="use the model on the --spacing grid alone, grid error included (as a simulation "
                             "on that grid runs), instead of extrapolating to a converged prediction")
    parser.add_argument("--cache-dir", metavar="DIR",
                        help="cache of model curves (default $WAVES_CACHE_DIR or ~/.cache/waves)")
    parser.add_argument("--no-cache", action="store_true", help="neither read nor write the cache")
    parser.add_argument("--quiet", action="store_true", help="print nothing on success")


def run_from_args(args: argparse.Namespace) -> int:
    """Run `waves compare` from parsed arguments; returns the exit code."""
    robust = args.robust_scale
    if robust is not None and robust == 0:
        robust = None
    comp = compare_analysis(
        args.analysis_dirs, args.model, params=parse_settings(args.set_params), spacing=args.spacing,
        spiral=not args.no_spiral, tolerance=args.tolerance,
        t_range_min=tuple(args.t_range) if args.t_range else None, robust_scale=robust,
        ke_grid=tuple(args.ke_grid) if args.ke_grid else RELAY_KE_GRID,
        cache_dir=args.cache_dir, use_cache=not args.no_cache, converge=not args.no_converge,
    )
    paths = write_comparison(comp, args.out)
    if not args.quiet:
        lines = [f"model           {comp.model}"]
        lines += [f"fit             {_fmt_scale(comp.fit, n)}" for n in comp.fit.values]
        lines.append(f"residuals       weighted rms {comp.fit.rms_relative:.1%} over {comp.fit.n_points} points")
        conv = comp.numerics.get("convergence_rel")
        if conv is not None:
            lines.append(f"model numerics  from h = {comp.numerics['spacing_model']:g}, grid extrapolations "
                         f"agree to {conv:.2%}")
        for ch in comp.checks:
            verdict = {True: "reproduced", False: "NOT reproduced", None: "not tested"}[ch["reproduced"]]
            where = f" [{pathlib.Path(ch['folder']).name}]" if ch.get("folder") and len(comp.measured.folders) > 1 else ""
            lines.append(f"{verdict:<15} {ch['quantity']}{where}")
        for n in comp.notes:
            lines.append(f"note            {n}")
        lines.append(f"results in      {paths['json']}")
        print("\n".join(lines))
    return 0
