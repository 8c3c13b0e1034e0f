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
from waves.dispersion import DispersionCurve, dispersion_curve
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
# scale of the robust loss: relative speed scatter of good points (common practice, no source)
DEFAULT_ROBUST_SCALE = 0.02
_UNCONSTRAINED_FACTOR = 2.0
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


# --------------------------------------------------------------------------- model curve in log space


def _log_speed(curve: DispersionCurve, log_period: np.ndarray) -> np.ndarray:
    """log c at log T; below the shortest period extended linearly in log-log
    (slope of the two shortest rings) so the least-squares problem stays smooth."""
    lt = np.asarray(log_period, np.float64)
    out = np.empty(lt.shape)
    lt0 = math.log(curve.shortest_period)
    below = lt < lt0
    out[~below] = np.log(curve.speed_at(np.exp(lt[~below])))
    if below.any():
        slope = 0.0
        if curve.period.size >= 2:
            slope = (math.log(curve.speed[1]) - math.log(curve.speed[0])) / (
                math.log(curve.period[1]) - math.log(curve.period[0]))
        out[below] = math.log(curve.speed[0]) + slope * (lt[below] - lt0)
    return out


# --------------------------------------------------------------------------- fits


@dataclass(frozen=True)
class ScaleFit:
    """Fitted free scales of a model.

    values: name -> fitted (or fixed) value; ci95: name -> (low, high) for
    fitted ones; fixed: names held fixed; constrained: name -> 95 % interval
    narrower than a factor 2.  Per point: residual_log (log V_measured -
    log V_model), model_speed_um_per_min, weight (robust weight, 1 for plain
    least squares), in_model_range (period at least the model's shortest).
    rms_relative: weighted root mean square of residual_log (about the
    relative error of a typical point).  robust_scale: None for plain least
    squares.  covariance_log: of the fitted parameters (log scales; ke itself).
    """

    values: dict
    ci95: dict
    fixed: tuple[str, ...]
    constrained: dict
    residual_log: np.ndarray
    model_speed_um_per_min: np.ndarray
    weight: np.ndarray
    in_model_range: np.ndarray
    rms_relative: float
    n_points: int
    dof: int
    covariance_log: np.ndarray
    robust_scale: float | None
    method: str
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict:
        return {
            "values": dict(self.values),
            "ci95": {k: list(v) for k, v in self.ci95.items()},
            "fixed": list(self.fixed),
            "constrained": dict(self.constrained),
            "rms_relative": self.rms_relative,
            "n_points": self.n_points,
            "n_downweighted": int(np.sum(self.weight < 0.5)),
            "dof": self.dof,
            "covariance_log": self.covariance_log.tolist(),
            "robust_scale": self.robust_scale,
            "method": self.method,
            "notes": list(self.notes),
        }


def window_clusters(measured: Measured) -> np.ndarray:
    """Cluster labels of the dispersion points for the interval estimate: the
    regions of one time window see the same waves, and consecutive windows
    share half their frames, so each folder's windows are taken in
    consecutive pairs, one cluster a pair."""
    labels = np.zeros(measured.t_min.shape, dtype=np.int64)
    next_label = 0
    for f in np.unique(measured.folder_index):
        sel = measured.folder_index == f
        times = np.unique(measured.t_min[sel])
        rank = np.searchsorted(times, measured.t_min[sel])
        labels[sel] = next_label + rank // 2
        next_label += int(rank.max()) // 2 + 1
    return labels


def _points(period_min, speed_um_per_min, n_free: int) -> tuple[np.ndarray, np.ndarray]:
    P = np.asarray(period_min, np.float64).ravel()
    V = np.asarray(speed_um_per_min, np.float64).ravel()
    if P.shape != V.shape:
        raise WavesError(f"periods and speeds differ in length ({P.size} and {V.size})")
    if not (np.all(np.isfinite(P)) and np.all(np.isfinite(V)) and np.all(P > 0) and np.all(V > 0)):
        raise WavesError("measured periods and speeds must be positive finite numbers")
    if P.size < n_free + 1:
        raise InputError(
            f"fitting {n_free} scale(s) needs at least {n_free + 1} measured (period, speed) points, "
            f"got {P.size}; analyse a longer movie, widen the time range, or fix a scale with --set"
        )
    return P, V


def _check_robust_scale(robust_scale) -> float | None:
    if robust_scale is None:
        return None
    s = float(robust_scale)
    if not (math.isfinite(s) and s > 0):
        raise WavesError(f"robust_scale must be a positive relative scatter (e.g. 0.02) or None, got {robust_scale!r}")
    return s


def _solve(residuals, x0: np.ndarray, *, robust_scale: float | None, lower=None, upper=None, clusters=None):
    """least_squares, robust weights and the covariance at the optimum (module doc).

    With `clusters` (one label per point; points of one label share their
    errors, e.g. the regions of one time window) the covariance is the
    cluster-robust sandwich (J^T J)^-1 (sum_g J_g^T r_g r_g^T J_g) (J^T J)^-1
    times G / (G - 1), with G - 1 degrees of freedom (common practice for
    correlated errors, no single source); fewer than 3 clusters give no
    finite interval."""
    from scipy.optimize import least_squares

    p = x0.size
    lb = np.full(p, -np.inf) if lower is None else np.asarray(lower, np.float64)
    ub = np.full(p, np.inf) if upper is None else np.asarray(upper, np.float64)
    for i in range(p):  # least_squares wants a start strictly inside finite bounds
        if math.isfinite(lb[i]):
            x0[i] = max(x0[i], lb[i] + 1e-9 * (abs(lb[i]) + 1))
        if math.isfinite(ub[i]):
            x0[i] = min(x0[i], ub[i] - 1e-9 * (abs(ub[i]) + 1))
    loss, f_scale = ("linear", 1.0) if robust_scale is None else ("cauchy", robust_scale)
    res = least_squares(residuals, x0, jac="3-point", bounds=(lb, ub), method="trf", loss=loss,
                        f_scale=f_scale, x_scale="jac", xtol=1e-12, ftol=1e-12, gtol=1e-12)
    r = res.fun
    dof = r.size - p
    if robust_scale is None:
        w = np.ones(r.size)
    else:
        w = 1.0 / (1.0 + (r / robust_scale) ** 2)
    s2 = 2.0 * float(res.cost) / dof if dof > 0 else math.nan
    J = res.jac
    try:
        bread = np.linalg.inv(J.T @ J)
        if clusters is None:
            cov = bread * s2
        else:
            labels = np.asarray(clusters)
            groups = np.unique(labels)
            g = len(groups)
            if g < 3:
                raise np.linalg.LinAlgError
            rw = r * np.sqrt(w)  # residuals on the scale of the robust Jacobian
            meat = np.zeros((p, p))
            for lab in groups:
                sel = labels == lab
                score = J[sel].T @ rw[sel]
                meat += np.outer(score, score)
            cov = bread @ meat @ bread * (g / (g - 1.0))
            dof = g - 1
        if not np.all(np.isfinite(cov)):
            raise np.linalg.LinAlgError
    except np.linalg.LinAlgError:
        cov = np.full((p, p), np.inf)
    return res.x, r, w, cov, dof


def _interval(x: float, var: float, dof: int) -> tuple[float, float]:
    from scipy.stats import t as student_t

    if not (dof > 0 and math.isfinite(var) and var >= 0):
        return (-math.inf, math.inf)
    half = float(student_t.ppf(0.975, dof)) * math.sqrt(var)
    return (x - half, x + half)


def _exp_interval(lo: float, hi: float) -> tuple[float, float]:
    def ex(v):
        if v == math.inf or v > 700:
            return math.inf
        return 0.0 if v == -math.inf or v < -700 else math.exp(v)

    return ex(lo), ex(hi)


def _rms(r: np.ndarray, w: np.ndarray) -> float:
    return float(np.sqrt(np.sum(w * r * r) / np.sum(w)))


_METHOD = ("least squares on log speed ({loss}); 95 % intervals from the covariance at the optimum and "
           "Student's t: cluster-robust over pairs of consecutive time windows (G - 1 degrees of freedom) "
           "when the points come from analysis folders, else s^2 (J^T J)^-1 with n - p")


def fit_scales(
    curve: DispersionCurve,
    period_min,
    speed_um_per_min,
    *,
    time_scale_s: float | None = None,
    length_scale_um: float | None = None,
    robust_scale: float | None = DEFAULT_ROBUST_SCALE,
    clusters=None,
) -> ScaleFit:
    """Fit time_scale_s (s per model time unit) and length_scale_um (um per
    model length unit) of a dimensionless model's curve to measured
    (period_min, speed_um_per_min) points (module doc).  A scale given here
    is held fixed.  robust_scale: Cauchy loss scale (relative), None for
    plain least squares."""
    robust_scale = _check_robust_scale(robust_scale)
    fixed = {}
    for k, v in (("time_scale_s", time_scale_s), ("length_scale_um", length_scale_um)):
        if v is not None:
            if not (math.isfinite(float(v)) and float(v) > 0):
                raise WavesError(f"{k} must be a positive number, got {v!r}")
            fixed[k] = float(v)
    free = [k for k in ("time_scale_s", "length_scale_um") if k not in fixed]
    if not free:
        raise WavesError("both time_scale_s and length_scale_um are fixed: nothing to fit; drop one --set")
    P, V = _points(period_min, speed_um_per_min, len(free))
    lP, lV = np.log(P), np.log(V)

    def logs(x) -> tuple[float, float]:
        vals = dict(fixed)
        for k, xi in zip(free, x, strict=True):
            vals[k] = math.exp(xi)
        return math.log(vals["time_scale_s"] / 60.0), math.log(vals["length_scale_um"])

    def residuals(x):
        lst, lsl = logs(x)
        return lV - (lsl - lst + _log_speed(curve, lP - lst))

    # start: grid over the time scale, the length scale being the mean offset at each
    if "time_scale_s" in free:
        lo = math.log(P.min() / (3.0 * curve.period[-1]))
        hi = math.log(P.max() / (0.8 * curve.shortest_period))
        best = None
        for lst in np.linspace(min(lo, hi), max(lo, hi), 241):
            if "length_scale_um" in free:
                lsl = float(np.median(lV + lst - _log_speed(curve, lP - lst)))
            else:
                lsl = math.log(fixed["length_scale_um"])
            r = lV - (lsl - lst + _log_speed(curve, lP - lst))
            cost = float(np.sum(np.log1p((r / (robust_scale or 1.0)) ** 2)) if robust_scale else np.sum(r * r))
            if best is None or cost < best[0]:
                best = (cost, lst, lsl)
        x0 = [best[1] + math.log(60.0)] + ([best[2]] if "length_scale_um" in free else [])
    else:
        lst = math.log(fixed["time_scale_s"] / 60.0)
        x0 = [float(np.median(lV + lst - _log_speed(curve, lP - lst)))]
    x, r, w, cov, dof = _solve(residuals, np.asarray(x0, np.float64), robust_scale=robust_scale,
                               clusters=clusters)
    values, ci, constrained = dict(fixed), {}, {}
    notes = []
    for i, k in enumerate(free):
        values[k] = math.exp(x[i])
        lo_, hi_ = _interval(x[i], cov[i, i], dof)
        ci[k] = _exp_interval(lo_, hi_)
        constrained[k] = bool(hi_ - lo_ < math.log(_UNCONSTRAINED_FACTOR))
        if not constrained[k]:
            notes.append(f"{k} is not constrained by these points (95 % interval wider than a factor "
                         f"{_UNCONSTRAINED_FACTOR:g}); the measured periods may lie where the model curve is flat")
    lst, lsl = logs(x)
    model_V = np.exp(lsl - lst + _log_speed(curve, lP - lst))
    in_range = P >= math.exp(lst) * curve.shortest_period * (1 - 1e-9)
    if not in_range.all():
        notes.append(f"{int((~in_range).sum())} point(s) lie below the model's shortest period: "
                     "the model cannot carry wave trains that fast")
    return ScaleFit(
        values=values, ci95=ci, fixed=tuple(fixed), constrained=constrained, residual_log=r,
        model_speed_um_per_min=model_V, weight=w, in_model_range=in_range, rms_relative=_rms(r, w),
        n_points=int(P.size), dof=int(dof), covariance_log=cov, robust_scale=robust_scale,
        method=_METHOD.format(loss="plain" if robust_scale is None else f"Cauchy loss, scale {robust_scale:g}")
        + "; parameters log time_scale_s, log length_scale_um",
        notes=tuple(notes),
    )


def _relay_log_speed(curves: Sequence[tuple[float, DispersionCurve]], ke: float, lP: np.ndarray) -> np.ndarray:
    """log c (model length units per minute) at periods exp(lP) minutes for rate ke.

    Between two grid curves j, j+1 (weight w linear in ke) the shortest period
    T_min(ke) is interpolated linearly, each curve is read at the same period
    relative to its own shortest period (so the steep ends line up instead of
    blending into a double step), and log c is blended linearly.
    """
    if len(curves) == 1:
        return _log_speed(curves[0][1], lP)
    kes = np.array([k for k, _ in curves])
    j = int(np.clip(np.searchsorted(kes, ke) - 1, 0, len(kes) - 2))
    w = (ke - kes[j]) / (kes[j + 1] - kes[j])
    a, b = curves[j][1], curves[j + 1][1]
    lt_min = (1 - w) * math.log(a.shortest_period) + w * math.log(b.shortest_period)
    rel = lP - lt_min
    return ((1 - w) * _log_speed(a, rel + math.log(a.shortest_period))
            + w * _log_speed(b, rel + math.log(b.shortest_period)))


def _relay_shortest_period(curves, ke: float) -> float:
    """T_min(ke): log T_min linear in ke between the grid curves (as `_relay_log_speed`)."""
    ks = [k for k, _ in curves]
    return float(np.exp(np.interp(ke, ks, [math.log(c.shortest_period) for _, c in curves])))


def fit_relay(
    curves: Sequence[tuple[float, DispersionCurve]],
    period_min,
    speed_um_per_min,
    *,
    diffusion_um2_per_min: float | None = None,
    ke_per_min: float | None = None,
    robust_scale: float | None = DEFAULT_ROBUST_SCALE,
    clusters=None,
) -> ScaleFit:
    """Fit the relay model's D (diffusion_um2_per_min) and ke (ke_per_min) to measured points.

    curves: (ke, curve) pairs computed with one D0 (model units: 1 length
    unit = 100 um, time in minutes).  With one pair, or ke_per_min given, ke
    is fixed; with diffusion_um2_per_min given, D is fixed.  D enters as
    sqrt(D / D0) (module doc); between the curves log c is linear in ke.
    """
    from waves.models.relay import LENGTH_UNIT_UM

    robust_scale = _check_robust_scale(robust_scale)
    curves = sorted(((float(k), c) for k, c in curves), key=lambda kc: kc[0])
    if not curves:
        raise WavesError("fit_relay needs at least one (ke, curve) pair")
    if any(c.model != "relay" for _, c in curves):
        raise WavesError("fit_relay needs dispersion curves of the relay model")
    D0 = curves[0][1].diffusion * LENGTH_UNIT_UM ** 2
    if any(abs(c.diffusion * LENGTH_UNIT_UM ** 2 - D0) > 1e-9 * D0 for _, c in curves):
        raise WavesError("relay curves for the ke fit must share one diffusion coefficient")
    kes = [k for k, _ in curves]
    fixed = {}
    if diffusion_um2_per_min is not None:
        D = float(diffusion_um2_per_min)
        if not (math.isfinite(D) and D > 0):
            raise WavesError(f"diffusion_um2_per_min must be a positive number, got {diffusion_um2_per_min!r}")
        fixed["diffusion_um2_per_min"] = D
    if ke_per_min is not None:
        ke_per_min = float(ke_per_min)
        if len(curves) > 1 and not kes[0] <= ke_per_min <= kes[-1]:
            raise WavesError(f"ke_per_min = {ke_per_min:g} lies outside the curves' ke range {kes[0]:g}-{kes[-1]:g}")
        fixed["ke_per_min"] = ke_per_min
    elif len(curves) == 1:
        fixed["ke_per_min"] = kes[0]
    free = [k for k in ("diffusion_um2_per_min", "ke_per_min") if k not in fixed]
    if not free:
        raise WavesError("both D and ke are fixed: nothing to fit; drop one --set")
    P, V = _points(period_min, speed_um_per_min, len(free))
    lP = np.log(P)
    lV = np.log(V) - math.log(LENGTH_UNIT_UM)  # model length units per minute

    def unpack(x) -> tuple[float, float]:
        vals = dict(fixed)
        for k, xi in zip(free, x, strict=True):
            vals[k] = math.exp(xi) if k == "diffusion_um2_per_min" else float(xi)
        return vals["diffusion_um2_per_min"], vals["ke_per_min"]

    def model_log(D, ke):
        return 0.5 * math.log(D / D0) + _relay_log_speed(curves, ke, lP)

    def residuals(x):
        D, ke = unpack(x)
        return lV - model_log(D, ke)

    def cost(r):
        return float(np.sum(np.log1p((r / robust_scale) ** 2)) if robust_scale else np.sum(r * r))

    ke_try = [fixed["ke_per_min"]] if "ke_per_min" in fixed else list(np.linspace(kes[0], kes[-1], 41))
    best = None
    for ke in ke_try:
        if "diffusion_um2_per_min" in fixed:
            D = fixed["diffusion_um2_per_min"]
        else:
            D = D0 * math.exp(2.0 * float(np.median(lV - _relay_log_speed(curves, ke, lP))))
        c_ = cost(lV - model_log(D, ke))
        if best is None or c_ < best[0]:
            best = (c_, D, ke)
    x0, lb, ub = [], [], []
    for k in free:
        if k == "diffusion_um2_per_min":
            x0.append(math.log(best[1]))
            lb.append(-np.inf)
            ub.append(np.inf)
        else:
            x0.append(best[2])
            lb.append(kes[0])
            ub.append(kes[-1])
    x, r, w, cov, dof = _solve(residuals, np.asarray(x0, np.float64), robust_scale=robust_scale,
                               lower=lb, upper=ub, clusters=clusters)
    values, ci, constrained = dict(fixed), {}, {}
    notes = []
    for i, k in enumerate(free):
        lo_, hi_ = _interval(x[i], cov[i, i], dof)
        if k == "diffusion_um2_per_min":
            values[k] = math.exp(x[i])
            ci[k] = _exp_interval(lo_, hi_)
            constrained[k] = bool(hi_ - lo_ < math.log(_UNCONSTRAINED_FACTOR))
        else:
            values[k] = float(x[i])
            ci[k] = (lo_, hi_)
            constrained[k] = bool(math.isfinite(hi_ - lo_) and lo_ > 0 and hi_ / lo_ < _UNCONSTRAINED_FACTOR)
            if min(abs(x[i] - kes[0]), abs(x[i] - kes[-1])) < 1e-6 * kes[-1]:
                notes.append(f"ke_per_min reached the edge of the computed range {kes[0]:g}-{kes[-1]:g} /min; "
                             "widen --ke-grid")
        if not constrained[k]:
            notes.append(f"{k} is not constrained by these points (95 % interval wider than a factor "
                         f"{_UNCONSTRAINED_FACTOR:g})")
    D, ke = unpack(x)
    model_V = np.exp(math.log(LENGTH_UNIT_UM) + model_log(D, ke))
    in_range = P >= _relay_shortest_period(curves, ke) * (1 - 1e-9)
    if not in_range.all():
        notes.append(f"{int((~in_range).sum())} point(s) lie below the model's shortest period: "
                     "the model cannot carry wave trains that fast")
    return ScaleFit(
        values={"diffusion_um2_per_min": values["diffusion_um2_per_min"], "ke_per_min": values["ke_per_min"]},
        ci95=ci, fixed=tuple(fixed), constrained=constrained, residual_log=r,
        model_speed_um_per_min=model_V, weight=w, in_model_range=in_range, rms_relative=_rms(r, w),
        n_points=int(P.size), dof=int(dof), covariance_log=cov, robust_scale=robust_scale,
        method=_METHOD.format(loss="plain" if robust_scale is None else f"Cauchy loss, scale {robust_scale:g}")
        + "; parameters log D and ke, log c linear in ke between curves at ke = "
        + ", ".join(f"{k:g}" for k in kes) + " /min",
        notes=tuple(notes),
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


def _fmt_scale(fit: ScaleFit, name: str) -> str:
    v = fit.values[name]
    if name in fit.fixed:
        return f"{name} = {v:.4g} (fixed)"
    lo, hi = fit.ci95[name]
    return f"{name} = {v:.4g} (95 % CI {lo:.4g} to {hi:.4g})"


def comparison_figure(comp: Comparison):
    """matplotlib Figure (Agg canvas, no pyplot state): the model curve with the
    measured points (colour: time; crosses: below the model's shortest
    period; faint: down-weighted outliers), the measured medians with their
    quartiles, the solitary speed, the shortest period and the model spiral."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.0, 5.0), dpi=110)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    c = comp.curve
    ax.plot(c["period_min"], c["speed_um_per_min"], "-", color="0.15", lw=1.8,
            label=f"{comp.model} dispersion relation (fitted)")
    ax.axhline(c["solitary_speed_um_per_min"], color="0.5", ls="--", lw=1.0, label="solitary-wave speed")
    ax.axvline(c["shortest_period_min"], color="0.5", ls=":", lw=1.0, label="shortest period")
    m, f = comp.measured, comp.fit
    good = f.in_model_range & (f.weight >= 0.5)
    tcol = m.t_min if np.all(np.isfinite(m.t_min)) else np.zeros(m.t_min.size)
    if good.any():
        sc = ax.scatter(m.period_min[good], m.speed_um_per_min[good], s=16, c=tcol[good], cmap="viridis",
                        label="measured (window, region)", zorder=3)
        fig.colorbar(sc, ax=ax, label="window centre (min)")
    weak = f.in_model_range & (f.weight < 0.5)
    if weak.any():
        ax.scatter(m.period_min[weak], m.speed_um_per_min[weak], s=14, color="0.6", alpha=0.6,
                   label="measured, down-weighted outlier", zorder=2)
    if (~f.in_model_range).any():
        ax.scatter(m.period_min[~f.in_model_range], m.speed_um_per_min[~f.in_model_range], s=22, marker="x",
                   color="crimson", label="measured, faster than the model can carry", zorder=3)
    for k, med in enumerate(m.medians):
        pm, vm = med["period_min"], med["front_speed_um_per_min"]
        if pm and vm:
            ax.errorbar([pm["median"]], [vm["median"]],
                        xerr=[[pm["median"] - pm["q25"]], [pm["q75"] - pm["median"]]],
                        yerr=[[vm["median"] - vm["q25"]], [vm["q75"] - vm["median"]]],
                        fmt="s", color="darkorange", ms=7, capsize=3, zorder=4,
                        label="measured medians (quartiles)" if k == 0 else None)
    if comp.spiral and comp.spiral.get("period_min") and comp.spiral.get("speed_um_per_min"):
        ax.plot([comp.spiral["period_min"]], [comp.spiral["speed_um_per_min"]], "*", color="royalblue",
                ms=14, label="model spiral (2-D simulation)", zorder=5)
    ax.set_xlabel("period (min)")
    ax.set_ylabel("front speed (um/min)")
    ax.set_title("\n".join(_fmt_scale(f, n) for n in f.values), fontsize=9)
    ax.legend(fontsize=7, loc="lower right")
    ax.grid(True, alpha=0.3)
    fig.tight_layout()
    return fig


def write_comparison(comp: Comparison, out_dir=None) -> dict:
    """Write compare_<model>.json, .csv and .png atomically into `out_dir`
    (default: the first analysis folder); returns {'json', 'csv', 'png': path}."""
    from waves import io as wio
    from waves.result import write_table_csv

    out = pathlib.Path(comp.measured.folders[0] if out_dir is None else out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder; give a folder")
    out.mkdir(parents=True, exist_ok=True)
    stem = f"compare_{comp.model}"
    m, f = comp.measured, comp.fit
    table = {
        "folder": np.array([m.folders[i].name for i in m.folder_index], dtype=object),
        "t_min": m.t_min,
        "region": np.where(np.isfinite(m.region), m.region, -1).astype(np.int64),
        "period_min": m.period_min,
        "speed_um_per_min": m.speed_um_per_min,
        "model_speed_um_per_min": f.model_speed_um_per_min,
        "residual_log": f.residual_log,
        "weight": f.weight,
        "in_model_range": np.where(f.in_model_range, "yes", "no"),
        "model_convergence_rel": np.full(m.period_min.size, np.nan if comp.numerics.get("convergence_rel") is None
                                         else float(comp.numerics["convergence_rel"])),
    }
    paths = {"csv": write_table_csv(out / f"{stem}.csv", table)}
    fig = comparison_figure(comp)
    png = out / f"{stem}.png"
    with wio.atomic_output(png, "wb") as fh:
        fig.savefig(fh, format="png")
    paths["png"] = png
    record = comp.to_dict()
    record["files"] = {"table": f"{stem}.csv", "figure": f"{stem}.png"}
    paths["json"] = wio.write_json(out / f"{stem}.json", record)
    return paths


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
