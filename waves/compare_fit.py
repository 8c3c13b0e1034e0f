"""Least-squares fits of a model's free scales to measured dispersion points.

The procedure (residuals on log speed, robust Cauchy loss, cluster-robust
intervals, the relay model's D and ke) is described in `waves.compare`,
which re-exports everything public here.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from waves.dispersion import DispersionCurve
from waves.errors import InputError, WavesError

if TYPE_CHECKING:
    from waves.compare import Measured

__all__ = ["ScaleFit", "fit_scales", "fit_relay", "window_clusters", "DEFAULT_ROBUST_SCALE"]

# scale of the robust loss: relative speed scatter of good points (common practice, no source)
DEFAULT_ROBUST_SCALE = 0.02
_UNCONSTRAINED_FACTOR = 2.0


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
