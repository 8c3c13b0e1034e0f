"""Figures of an analysis: pure functions from arrays and tables to a
matplotlib `Figure`.

Every function takes data positionally and calibration keyword-only, and
returns a `matplotlib.figure.Figure` built without pyplot (no global state,
no backend switch: `Figure.savefig` renders with Agg).  Conventions:

- Map axes are in millimetres of the recorded image: map pixel (r, c) on the
  analysis grid sits at x_mm = (origin_x_um + c * pixel_size_um) / 1000 and
  y_mm = (origin_y_um + r * pixel_size_um) / 1000, row 0 at the top (the y
  axis grows downward, as the image is displayed).  Each map carries a scale
  bar.
- Colour maps: 'twilight' (cyclic) for phase, 'cividis' for period, 'viridis'
  for speed (both perceptually uniform and readable with the common colour
  vision deficiencies), Okabe-Ito colours for territories, centres and cores.
- Rotation marks: a curved arrow about each spiral core, turning clockwise as
  displayed for charge +1 and counterclockwise for charge -1 (DESIGN.md).
- Missing inputs (no territory map yet, no cores, an empty table, an all-NaN
  map) give a panel that says so, not an exception.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.colors import BoundaryNorm, ListedColormap
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import FancyArrowPatch

from waves.errors import InputError

__all__ = [
    "MapGrid",
    "OKABE_ITO",
    "PHASE_CMAP",
    "PERIOD_CMAP",
    "SPEED_CMAP",
    "nice_scale_length_mm",
    "mean_image_figure",
    "phase_snapshot_figure",
    "period_map_figure",
    "speed_map_figure",
    "regularity_map_figure",
    "territory_map_figure",
    "period_timecourse_figure",
    "histograms_figure",
    "dispersion_figure",
    "kymograph_figure",
    "core_tracks_figure",
    "territory_timecourse_figure",
    "centre_colour",
]

# Okabe & Ito (2008), "Color Universal Design": a qualitative palette told
# apart with the common colour vision deficiencies (black left out: markers).
OKABE_ITO = (
    "#E69F00",  # orange
    "#56B4E9",  # sky blue
    "#009E73",  # bluish green
    "#F0E442",  # yellow
    "#0072B2",  # blue
    "#D55E00",  # vermillion
    "#CC79A7",  # reddish purple
)
PHASE_CMAP = "twilight"
PERIOD_CMAP = "cividis"
SPEED_CMAP = "viridis"
# charge +1 (clockwise as displayed) and -1 (counterclockwise)
CHARGE_COLOURS = {1: "#D55E00", -1: "#0072B2"}
_NO_DATA = "#d9d9d9"


def centre_colour(centre_id) -> str:
    """Okabe-Ito colour of a centre (or territory label) id, the same in
    every figure: id 1 orange, 2 sky blue, ... (ids beyond 7 repeat)."""
    try:
        k = int(centre_id) - 1
    except (TypeError, ValueError):
        k = 0
    return OKABE_ITO[k % len(OKABE_ITO)]


@dataclass(frozen=True)
class MapGrid:
    """Where the pixels of a map sit in the recorded image (um).

    pixel_size_um   size of one map pixel.
    origin_x_um     x of map pixel (0, 0)'s centre (recorded-image coordinates).
    origin_y_um     y of that centre.
    """

    pixel_size_um: float
    origin_x_um: float = 0.0
    origin_y_um: float = 0.0

    def __post_init__(self) -> None:
        px = float(self.pixel_size_um)
        if not math.isfinite(px) or px <= 0:
            raise InputError(f"map pixel size must be a positive number of um, got {self.pixel_size_um!r}")
        object.__setattr__(self, "pixel_size_um", px)
        object.__setattr__(self, "origin_x_um", float(self.origin_x_um))
        object.__setattr__(self, "origin_y_um", float(self.origin_y_um))

    @classmethod
    def from_summary(cls, summary: Mapping) -> MapGrid:
        """The analysis grid of a summary.json (`analysis.grid`), or the
        recording's pixel size with origin 0 when the summary has none."""
        grid = (summary.get("analysis") or {}).get("grid")
        if grid:
            return cls(grid["pixel_size_um"], grid.get("origin_x_um", 0.0), grid.get("origin_y_um", 0.0))
        return cls(summary["calibration"]["pixel_size_um"])

    def extent_mm(self, shape_yx: Sequence[int]) -> tuple[float, float, float, float]:
        """imshow extent (left, right, bottom, top) in mm, pixel edges half a
        pixel beyond the centres; bottom > top because row 0 is at the top."""
        ny, nx = int(shape_yx[0]), int(shape_yx[1])
        px = self.pixel_size_um
        left = (self.origin_x_um - 0.5 * px) / 1000.0
        top = (self.origin_y_um - 0.5 * px) / 1000.0
        return left, left + nx * px / 1000.0, top + ny * px / 1000.0, top

    def x_mm(self, col) -> np.ndarray:
        return (self.origin_x_um + np.asarray(col, dtype=np.float64) * self.pixel_size_um) / 1000.0

    def y_mm(self, row) -> np.ndarray:
        return (self.origin_y_um + np.asarray(row, dtype=np.float64) * self.pixel_size_um) / 1000.0


# --------------------------------------------------------------------------- helpers


def _figure(width_in: float = 6.0, height_in: float = 4.8) -> Figure:
    return Figure(figsize=(width_in, height_in), dpi=100, layout="constrained")


def _message(ax, text: str) -> None:
    """Say in the panel why there is nothing to show."""
    ax.set_xticks([])
    ax.set_yticks([])
    ax.text(0.5, 0.5, text, ha="center", va="center", wrap=True, transform=ax.transAxes,
            fontsize=10, color="#444444", gid="missing-data")


def nice_scale_length_mm(width_mm: float) -> float:
    """A round length (1, 2 or 5 x 10^k mm) of about a fifth of `width_mm`."""
    target = max(float(width_mm), 1e-9) / 5.0
    power = 10.0 ** math.floor(math.log10(target))
    for step in (5.0, 2.0, 1.0):
        if step * power <= target:
            return step * power
    return power  # pragma: no cover - step 1 always fits


def _scale_bar(ax, extent) -> None:
    left, right, bottom, top = extent
    width = right - left
    length = nice_scale_length_mm(width)
    x0 = left + 0.05 * width
    y = bottom - 0.06 * (bottom - top)  # near the bottom edge (y grows downward)
    label = f"{length:g} mm" if length >= 1 else f"{length * 1000:g} um"
    ax.add_line(Line2D([x0, x0 + length], [y, y], color="white", lw=5, solid_capstyle="butt", zorder=5))
    ax.add_line(Line2D([x0, x0 + length], [y, y], color="black", lw=2.5, solid_capstyle="butt", zorder=6,
                       gid="scale-bar"))
    ax.text(x0 + 0.5 * length, y - 0.02 * (bottom - top), label, ha="center", va="bottom", fontsize=8,
            zorder=6, bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.7, "pad": 1})


def _map_axes(ax, extent, title: str) -> None:
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_xlabel("x (mm)")
    ax.set_ylabel("y (mm)")
    ax.set_title(title, fontsize=11)
    ax.set_aspect("equal")
    _scale_bar(ax, extent)


def _as_map(image, name: str) -> np.ndarray:
    arr = np.asarray(image, dtype=np.float64)
    if arr.ndim != 2 or min(arr.shape) < 1:
        raise InputError(f"{name} must be a non-empty 2-D (y, x) array, got shape {arr.shape}")
    return arr


def _cmap(name: str):
    from matplotlib import colormaps

    return colormaps[name].with_extremes(bad=_NO_DATA)


def _finite(values) -> np.ndarray:
    v = np.asarray(values, dtype=np.float64).ravel()
    return v[np.isfinite(v)]


def _records(items, what: str) -> list[dict]:
    out = []
    for item in items or ():
        if not isinstance(item, Mapping) or "x_um" not in item or "y_um" not in item:
            raise InputError(f"each {what} must be a mapping with x_um and y_um, got {item!r}")
        out.append(dict(item))
    return out


def rotation_arc_mm(x_mm: float, y_mm: float, radius_mm: float, *, clockwise: bool,
                    n: int = 40) -> np.ndarray:
    """Points (n, 2) in data mm of a 270-degree arc about (x_mm, y_mm) that
    turns clockwise or counterclockwise AS DISPLAYED (y axis growing
    downward): the displayed angle a (counterclockwise on screen) maps to
    (x + r cos a, y - r sin a)."""
    a0 = math.pi / 2
    a = a0 - np.linspace(0.0, 1.5 * math.pi, n) if clockwise else a0 + np.linspace(0.0, 1.5 * math.pi, n)
    return np.column_stack([x_mm + radius_mm * np.cos(a), y_mm - radius_mm * np.sin(a)])


def _rotation_mark(ax, x_mm: float, y_mm: float, radius_mm: float, charge: int) -> None:
    clockwise = int(charge) > 0
    pts = rotation_arc_mm(x_mm, y_mm, radius_mm, clockwise=clockwise)
    colour = CHARGE_COLOURS.get(int(np.sign(charge)), "black")
    gid = "rotation-clockwise" if clockwise else "rotation-counterclockwise"
    ax.add_line(Line2D(pts[:, 0], pts[:, 1], color="white", lw=3.2, zorder=7))
    ax.add_line(Line2D(pts[:, 0], pts[:, 1], color=colour, lw=1.8, zorder=8, gid=gid))
    head = FancyArrowPatch(tuple(pts[-3]), tuple(pts[-1]), arrowstyle="-|>", mutation_scale=14,
                           color=colour, zorder=8, gid=gid + "-head")
    ax.add_patch(head)
    ax.plot([x_mm], [y_mm], marker="x", color=colour, ms=6, mew=2, zorder=9, ls="none")


def _core_marks(ax, cores: list[dict], extent, *, rotation: bool) -> None:
    width = abs(extent[1] - extent[0])
    for core in cores:
        x, y = float(core["x_um"]) / 1000.0, float(core["y_um"]) / 1000.0
        q = int(core.get("charge", 0))
        if rotation and q != 0:
            _rotation_mark(ax, x, y, 0.06 * width, q)
        else:
            ax.plot([x], [y], marker="x", color=CHARGE_COLOURS.get(int(np.sign(q)), "black"), ms=7, mew=2,
                    ls="none", zorder=8)


def _legend_for_cores(ax, cores: list[dict]) -> None:
    charges = sorted({int(np.sign(int(c.get("charge", 0)))) for c in cores} - {0}, reverse=True)
    handles = [
        Line2D([], [], color=CHARGE_COLOURS[q], marker="x", mew=2, lw=1.8,
               label=f"core, charge {q:+d} ({'clockwise' if q > 0 else 'counterclockwise'})")
        for q in charges
    ]
    if handles:
        ax.legend(handles=handles, loc="upper right", fontsize=7, framealpha=0.8)


# --------------------------------------------------------------------------- maps


def mean_image_figure(mean_image, *, grid: MapGrid, centres: Sequence[Mapping] = (),
                      cores: Sequence[Mapping] = ()) -> Figure:
    """The temporal-mean image (grey) with pacemaker/spiral centres (Okabe-Ito
    circles, numbered by id) and persistent spiral cores (crosses).

    centres: [{id, kind, x_um, y_um, ...}] (summary['centres']); cores:
    [{x_um, y_um, charge, ...}] (summary['spiral_cores']); positions in um.
    """
    img = _as_map(mean_image, "mean image")
    centres, cores = _records(centres, "centre"), _records(cores, "core")
    fig = _figure()
    ax = fig.add_subplot()
    extent = grid.extent_mm(img.shape)
    if not np.isfinite(img).any():
        _message(ax, "the mean image holds no finite value")
        return fig
    lo, hi = np.percentile(_finite(img), [1, 99])
    im = ax.imshow(img, cmap=_cmap("gray"), extent=extent, origin="upper", vmin=lo, vmax=hi if hi > lo else lo + 1,
                   interpolation="nearest")
    fig.colorbar(im, ax=ax, shrink=0.8, label="mean intensity (camera units)")
    _map_axes(ax, extent, "Mean image with centres and cores")
    for k, c in enumerate(centres):
        colour = centre_colour(c.get("id", k + 1))
        x, y = float(c["x_um"]) / 1000.0, float(c["y_um"]) / 1000.0
        ax.plot([x], [y], marker="o", ms=11, mfc="none", mec=colour, mew=2.5, ls="none", zorder=8, gid="centre")
        ax.annotate(f"{c.get('id', k)} {c.get('kind', '')}".strip(), (x, y), xytext=(7, 7),
                    textcoords="offset points", color=colour, fontsize=8, fontweight="bold")
    _core_marks(ax, cores, extent, rotation=False)
    if not centres and not cores:
        ax.text(0.5, 0.02, "no centres or persistent cores found", transform=ax.transAxes, ha="center",
                va="bottom", fontsize=8, color="white", gid="missing-data")
    return fig


def phase_snapshot_figure(phase, *, grid: MapGrid, cores: Sequence[Mapping] = (),
                          t_min: float | None = None) -> Figure:
    """One frame of the wave phase (radians, cyclic 'twilight' map) with the
    spiral cores of that frame and curved arrows showing their rotation
    (charge +1 clockwise as displayed, -1 counterclockwise).

    phase: (y, x) radians on the grid `grid`; cores: [{x_um, y_um, charge}].
    """
    ph = _as_map(phase, "phase")
    cores = _records(cores, "core")
    fig = _figure()
    ax = fig.add_subplot()
    extent = grid.extent_mm(ph.shape)
    if not np.isfinite(ph).any():
        _message(ax, "no phase to show")
        return fig
    im = ax.imshow(np.angle(np.exp(1j * ph)), cmap=_cmap(PHASE_CMAP), vmin=-math.pi, vmax=math.pi, extent=extent,
                   origin="upper", interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, shrink=0.8, label="phase (rad)")
    cb.set_ticks([-math.pi, 0, math.pi], labels=["-\u03c0", "0", "\u03c0"])
    title = "Wave phase" + (f" at {t_min:.1f} min" if t_min is not None else "")
    _map_axes(ax, extent, title)
    _core_marks(ax, cores, extent, rotation=True)
    _legend_for_cores(ax, cores)
    if not cores:
        ax.text(0.5, 0.02, "no spiral cores in this frame", transform=ax.transAxes, ha="center", va="bottom",
                fontsize=8, gid="missing-data")
    return fig


def _scalar_map(image, *, grid: MapGrid, cmap: str, title: str, label: str, name: str, fig=None, ax=None):
    arr = _as_map(image, name)
    if fig is None:
        fig = _figure()
        ax = fig.add_subplot()
    extent = grid.extent_mm(arr.shape)
    vals = _finite(arr)
    if vals.size == 0:
        _message(ax, f"no {name} measured anywhere in the field")
        ax.set_title(title, fontsize=11)
        return fig, ax, None
    lo, hi = np.percentile(vals, [2, 98])
    if hi <= lo:
        lo, hi = lo - 0.5 * max(abs(lo), 1e-6), hi + 0.5 * max(abs(hi), 1e-6)
    im = ax.imshow(np.ma.masked_invalid(arr), cmap=_cmap(cmap), vmin=lo, vmax=hi, extent=extent, origin="upper",
                   interpolation="nearest")
    fig.colorbar(im, ax=ax, shrink=0.8, label=label)
    _map_axes(ax, extent, title)
    return fig, ax, im


def period_map_figure(period_min, *, grid: MapGrid) -> Figure:
    """Wave period per pixel (minutes, 'cividis'); grey where not measured."""
    fig, _, _ = _scalar_map(period_min, grid=grid, cmap=PERIOD_CMAP, title="Period map",
                            label="period (min)", name="period")
    return fig


def regularity_map_figure(interval_cv, *, grid: MapGrid) -> Figure:
    """Firing regularity per pixel: the coefficient of variation (standard
    deviation / mean, no unit) of the intervals between successive waves
    ('magma', perceptually uniform); near 0 for a regular pacemaker."""
    fig, _, _ = _scalar_map(interval_cv, grid=grid, cmap="magma", title="Firing regularity",
                            label="interval CV (std / mean)", name="interval CV")
    return fig


def speed_map_figure(speed_um_per_min, direction_deg=None, *, grid: MapGrid, arrows: int = 14,
                     excluded=None) -> Figure:
    """Front speed per pixel (um/min, 'viridis', colour limits at the 2nd and
    98th percentiles) with arrows showing the direction of travel (degrees
    counterclockwise from +x as displayed) on a coarse lattice of about
    `arrows` x `arrows` points; `excluded` (bool map): pixels with a wave but
    kept out of the speed statistics, drawn in light grey."""
    fig, ax, im = _scalar_map(speed_um_per_min, grid=grid, cmap=SPEED_CMAP, title="Front speed and direction",
                              label="front speed (um/min)", name="speed")
    if im is not None and excluded is not None:
        ex = np.asarray(excluded, dtype=bool) & ~np.isfinite(_as_map(speed_um_per_min, "speed"))
        if ex.shape == np.shape(speed_um_per_min) and ex.any():
            ax.imshow(np.ma.masked_where(~ex, np.ones(ex.shape)), cmap=ListedColormap(["#cfcfcf"]),
                      vmin=0, vmax=1, extent=grid.extent_mm(ex.shape), origin="upper", interpolation="nearest")
            ax.set_xlabel(ax.get_xlabel() + "\nlight grey: waves kept out of the speed statistics "
                          "(collision lines, centres, cores, edges)", fontsize=8)
    if im is None or direction_deg is None:
        return fig
    d = _as_map(direction_deg, "direction")
    if d.shape != np.shape(speed_um_per_min):
        raise InputError(f"direction map {d.shape} and speed map {np.shape(speed_um_per_min)} differ in shape")
    ny, nx = d.shape
    step = max(1, int(math.ceil(max(ny, nx) / max(int(arrows), 1))))
    rr, cc = np.mgrid[step // 2 : ny : step, step // 2 : nx : step]
    a = np.deg2rad(d[rr, cc])
    ok = np.isfinite(a)
    if ok.any():
        # displayed direction (cos a, sin a) with screen-up positive; the y axis
        # grows downward, so in data units the y component is -sin a
        ax.quiver(grid.x_mm(cc[ok]), grid.y_mm(rr[ok]), np.cos(a[ok]), -np.sin(a[ok]), angles="xy",
                  color="white", edgecolor="black", linewidth=0.4, pivot="middle", gid="direction-arrows",
                  scale=1.0 / (0.7 * step * grid.pixel_size_um / 1000.0), scale_units="xy", width=0.006)
    return fig


def territory_map_figure(labels=None, *, grid: MapGrid, centres: Sequence[Mapping] = ()) -> Figure:
    """Which centre recruits each pixel: integer labels (0 = none) coloured
    with the Okabe-Ito palette, centres marked.  Without a label map the
    panel says that territories are not measured."""
    centres = _records(centres, "centre")
    fig = _figure() if labels is not None else _figure(5.0, 1.2)
    ax = fig.add_subplot()
    if labels is None:
        _message(ax, "territories not measured: this results folder holds no territory map")
        ax.set_title("Territories", fontsize=11)
        return fig
    lab = np.asarray(labels)
    if lab.ndim != 2 or min(lab.shape) < 1:
        raise InputError(f"territory labels must be a 2-D (y, x) array, got shape {lab.shape}")
    lab = np.where(np.isfinite(lab.astype(np.float64)), lab, 0).astype(np.int64)
    ids = sorted(int(v) for v in np.unique(lab) if v > 0)
    if not ids:
        _message(ax, "no territory found: every pixel is unassigned")
        ax.set_title("Territories", fontsize=11)
        return fig
    index = np.zeros(lab.shape, dtype=np.int64)
    for k, v in enumerate(ids, start=1):
        index[lab == v] = k
    colours = [_NO_DATA] + [centre_colour(v) for v in ids]
    cmap = ListedColormap(colours)
    norm = BoundaryNorm(np.arange(len(colours) + 1) - 0.5, len(colours))
    extent = grid.extent_mm(lab.shape)
    ax.imshow(index, cmap=cmap, norm=norm, extent=extent, origin="upper", interpolation="nearest")
    _map_axes(ax, extent, "Territories")
    px_mm2 = (grid.pixel_size_um / 1000.0) ** 2
    handles = [
        Line2D([], [], marker="s", ls="none", ms=9, color=colours[k],
               label=f"centre {v}: {np.count_nonzero(lab == v) * px_mm2:.2f} mm\u00b2")
        for k, v in enumerate(ids, start=1)
    ]
    ax.legend(handles=handles, loc="upper right", fontsize=7, framealpha=0.8)
    for c in centres:
        ax.plot([float(c["x_um"]) / 1000.0], [float(c["y_um"]) / 1000.0], marker="o", ms=9, mfc="white",
                mec="black", mew=1.5, ls="none", zorder=8, gid="centre")
    return fig


# --------------------------------------------------------------------------- curves


def period_timecourse_figure(t_min, period_min, *, q25_min=None, q75_min=None) -> Figure:
    """Median period (minutes) in sliding windows against the window's
    middle time (minutes), with the interquartile band when given."""
    t = np.asarray(t_min, dtype=np.float64).ravel()
    p = np.asarray(period_min, dtype=np.float64).ravel()
    if t.shape != p.shape:
        raise InputError(f"time course columns differ in length: t_min {t.size}, period_min {p.size}")
    fig = _figure(6.0, 3.6)
    ax = fig.add_subplot()
    ax.set_title("Period over the movie", fontsize=11)
    ok = np.isfinite(t) & np.isfinite(p)
    if not ok.any():
        _message(ax, "no period time course: the movie is too short for sliding windows or holds no waves")
        return fig
    if q25_min is not None and q75_min is not None:
        lo = np.asarray(q25_min, dtype=np.float64).ravel()
        hi = np.asarray(q75_min, dtype=np.float64).ravel()
        if lo.shape == t.shape and hi.shape == t.shape:
            band = ok & np.isfinite(lo) & np.isfinite(hi)
            ax.fill_between(t[band], lo[band], hi[band], color=OKABE_ITO[1], alpha=0.35, lw=0,
                            label="interquartile range")
    ax.plot(t[ok], p[ok], marker="o", color=OKABE_ITO[4], lw=2, label="median", gid="period-median")
    ax.set_xlabel("time (min)")
    ax.set_ylabel("period (min)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return fig


def _histogram(ax, values, *, label: str, colour: str, name: str) -> None:
    v = _finite(values)
    if v.size == 0:
        _message(ax, f"no {name} measured")
        ax.set_xlabel(label)
        return
    q25, med, q75 = np.percentile(v, [25, 50, 75])
    lo, hi = np.percentile(v, [0.5, 99.5])
    if hi <= lo:
        lo, hi = lo - 0.5, hi + 0.5
    ax.hist(np.clip(v, lo, hi), bins=40, range=(lo, hi), color=colour, alpha=0.85)
    ax.axvline(med, color="black", lw=2, gid="median", label=f"median {med:.3g}")
    ax.axvline(q25, color="black", lw=1.2, ls="--", gid="q25", label=f"quartiles {q25:.3g}-{q75:.3g}")
    ax.axvline(q75, color="black", lw=1.2, ls="--", gid="q75")
    ax.set_xlabel(label)
    ax.set_ylabel("pixels")
    ax.legend(fontsize=8, title=f"n = {v.size}", title_fontsize=8)


def histograms_figure(period_min, speed_um_per_min) -> Figure:
    """Histograms of the period (minutes) and front speed (um/min) over all
    measured pixels, with the median (solid) and quartiles (dashed); values
    beyond the 0.5 and 99.5 percentiles are piled into the end bins."""
    fig = _figure(8.0, 3.4)
    ax1, ax2 = fig.subplots(1, 2)
    _histogram(ax1, period_min, label="period (min)", colour=OKABE_ITO[0], name="period")
    ax1.set_title("Period", fontsize=11)
    _histogram(ax2, speed_um_per_min, label="front speed (um/min)", colour=OKABE_ITO[2], name="speed")
    ax2.set_title("Front speed", fontsize=11)
    return fig


def dispersion_figure(period_min, speed_um_per_min, *, t_min=None) -> Figure:
    """Speed-period points (one per time window and field region), coloured
    by time (minutes) when given."""
    p = np.asarray(period_min, dtype=np.float64).ravel()
    s = np.asarray(speed_um_per_min, dtype=np.float64).ravel()
    if p.shape != s.shape:
        raise InputError(f"dispersion columns differ in length: period {p.size}, speed {s.size}")
    fig = _figure(5.6, 4.2)
    ax = fig.add_subplot()
    ax.set_title("Dispersion: front speed against period", fontsize=11)
    ok = np.isfinite(p) & np.isfinite(s)
    if not ok.any():
        _message(ax, "no dispersion points: no window and region had a steady wave direction")
        return fig
    if t_min is not None and np.shape(t_min) == p.shape:
        t = np.asarray(t_min, dtype=np.float64)
        sc = ax.scatter(p[ok], s[ok], c=t[ok], cmap="viridis", s=28, edgecolor="black", linewidth=0.4,
                        gid="dispersion-points")
        fig.colorbar(sc, ax=ax, label="time (min)")
    else:
        ax.scatter(p[ok], s[ok], color=OKABE_ITO[4], s=28, gid="dispersion-points")
    ax.set_xlabel("period (min)")
    ax.set_ylabel("front speed (um/min)")
    ax.grid(alpha=0.3)
    return fig


def kymograph_figure(kymograph, *, t_min, distance_mm, title: str = "Kymograph") -> Figure:
    """Processed signal along a line (columns: distance along the line, mm)
    against time (rows: minutes, time running down).  A front is a sloped
    band; its slope is the front speed along the line."""
    k = np.asarray(kymograph, dtype=np.float64)
    t = np.asarray(t_min, dtype=np.float64).ravel()
    s = np.asarray(distance_mm, dtype=np.float64).ravel()
    fig = _figure(6.0, 4.6)
    ax = fig.add_subplot()
    ax.set_title(title, fontsize=10)
    if k.ndim != 2 or k.shape != (t.size, s.size) or k.size == 0:
        _message(ax, "no kymograph: the original stack was not available" if k.size == 0
                 else f"kymograph shape {k.shape} does not match {t.size} times x {s.size} positions")
        return fig
    vals = _finite(k)
    if vals.size == 0:
        _message(ax, "no signal along the line")
        return fig
    lim = float(np.percentile(np.abs(vals), 98)) or 1.0
    dt = (t[-1] - t[0]) / max(t.size - 1, 1)
    ds = (s[-1] - s[0]) / max(s.size - 1, 1)
    extent = (s[0] - 0.5 * ds, s[-1] + 0.5 * ds, t[-1] + 0.5 * dt, t[0] - 0.5 * dt)
    im = ax.imshow(k, cmap=_cmap("gray"), vmin=-lim, vmax=lim, extent=extent, origin="upper", aspect="auto",
                   interpolation="nearest")
    fig.colorbar(im, ax=ax, label="band-passed signal (a.u.)")
    ax.set_xlabel("distance along the line (mm)")
    ax.set_ylabel("time (min)")
    return fig


def core_tracks_figure(cores_per_frame: Mapping, *, grid: MapGrid, shape_yx: Sequence[int], background=None,
                       persistent_ids: Sequence[int] | None = None) -> Figure:
    """Tracks of spiral cores over the movie (recorded-image mm) on the
    field's extent, each track a line from a circle (first frame) to a
    square (last frame); charge +1 in vermillion, -1 in blue; tracks not in
    `persistent_ids` (short-lived, usually noise) thin and faint.

    cores_per_frame: columns frame, track_id, x_um, y_um, charge (CSV strings
    or numbers); background: optional (y, x) image on `grid` (e.g. the mean
    image); shape_yx: the map shape, for the extent.
    """
    fig = _figure()
    ax = fig.add_subplot()
    extent = grid.extent_mm(shape_yx)
    if background is not None:
        bg = _as_map(background, "background")
        if np.isfinite(bg).any():
            lo, hi = np.percentile(_finite(bg), [1, 99])
            ax.imshow(bg, cmap=_cmap("gray"), extent=extent, origin="upper", vmin=lo, vmax=hi if hi > lo else lo + 1,
                      alpha=0.6, interpolation="nearest")
    _map_axes(ax, extent, "Spiral-core tracks")
    cols = {k: cores_per_frame.get(k) for k in ("frame", "track_id", "x_um", "y_um", "charge")}
    if any(v is None for v in cols.values()):
        missing = [k for k, v in cols.items() if v is None]
        raise InputError(f"core table lacks column(s) {missing}; pass cores_per_frame.csv read as columns")
    try:
        num = {k: np.asarray([float(x) if str(x) != "" else np.nan for x in v], dtype=np.float64)
               for k, v in cols.items()}
    except (TypeError, ValueError) as exc:
        raise InputError(f"core table holds a value that is not a number ({exc}); rerun the analysis") from None
    if num["frame"].size == 0:
        _message(ax, "no spiral cores detected")
        ax.set_xlabel("x (mm)")
        ax.set_ylabel("y (mm)")
        return fig
    keep = None if persistent_ids is None else {int(i) for i in persistent_ids}
    for tid in np.unique(num["track_id"][np.isfinite(num["track_id"])]):
        m = num["track_id"] == tid
        order = np.argsort(num["frame"][m])
        x = num["x_um"][m][order] / 1000.0
        y = num["y_um"][m][order] / 1000.0
        q = int(np.sign(np.nanmedian(num["charge"][m])))
        colour = CHARGE_COLOURS.get(q, "black")
        strong = keep is None or int(tid) in keep
        ax.plot(x, y, color=colour, lw=2.0 if strong else 0.8, alpha=1.0 if strong else 0.35, zorder=6,
                gid=f"track-{int(tid)}")
        if strong:
            ax.plot(x[:1], y[:1], marker="o", color=colour, ms=6, ls="none", zorder=7)
            ax.plot(x[-1:], y[-1:], marker="s", color=colour, ms=6, ls="none", zorder=7)
    present = sorted({int(np.sign(v)) for v in num["charge"][np.isfinite(num["charge"])]} - {0}, reverse=True)
    handles = [Line2D([], [], color=CHARGE_COLOURS[q], lw=2,
                      label=f"charge {q:+d} ({'clockwise' if q > 0 else 'counterclockwise'})") for q in present]
    handles += [Line2D([], [], marker="o", color="grey", ls="none", label="first frame"),
                Line2D([], [], marker="s", color="grey", ls="none", label="last frame")]
    ax.legend(handles=handles, loc="upper right", fontsize=7, framealpha=0.8)
    return fig


def territory_timecourse_figure(t_min, centre_id, area_mm2) -> Figure:
    """Territory area (mm^2) of each centre against time (minutes, the middle
    of each window): one line per centre id, in that centre's colour."""
    t = np.asarray(t_min, dtype=np.float64).ravel()
    ids = np.asarray(centre_id, dtype=np.float64).ravel()
    a = np.asarray(area_mm2, dtype=np.float64).ravel()
    if not t.shape == ids.shape == a.shape:
        raise InputError(f"territory time course columns differ in length: {t.size}, {ids.size}, {a.size}")
    fig = _figure(6.0, 3.6)
    ax = fig.add_subplot()
    ax.set_title("Territory areas over the movie", fontsize=11)
    ok = np.isfinite(t) & np.isfinite(ids) & np.isfinite(a)
    if not ok.any():
        _message(ax, "no territory time course: no centre was found in any window")
        return fig
    for cid in np.unique(ids[ok]):
        m = ok & (ids == cid)
        order = np.argsort(t[m])
        ax.plot(t[m][order], a[m][order], marker="o", color=centre_colour(cid), lw=2, label=f"centre {int(cid)}",
                gid=f"territory-{int(cid)}")
    ax.set_xlabel("time (min)")
    ax.set_ylabel("territory area (mm\u00b2)")
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return fig
