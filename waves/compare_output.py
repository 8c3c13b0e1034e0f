"""Outputs of `waves compare`: the figure and the files (compare_<model>.json, .csv, .png).

Formats are described in `waves.compare`, which re-exports these functions.
"""

from __future__ import annotations

import pathlib
from typing import TYPE_CHECKING

import numpy as np

from waves.errors import InputError

if TYPE_CHECKING:
    from waves.compare import Comparison
    from waves.compare_fit import ScaleFit

__all__ = ["comparison_figure", "write_comparison"]


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
