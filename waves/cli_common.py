"""Command-line pieces shared by several subcommands: calibration and
analysis options, frame ranges, NAME=VALUE settings.  No heavy imports."""

from __future__ import annotations

import argparse
from collections.abc import Sequence

from waves.errors import WavesError

__all__ = [
    "add_calibration_options",
    "add_analysis_options",
    "add_times_option",
    "add_cell_mask_option",
    "analysis_options_from_args",
    "parse_frames",
    "parse_settings",
    "summary_lines",
]


def add_calibration_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--pixel-size",
        dest="pixel_size_um",
        type=float,
        metavar="UM",
        help="pixel size in micrometres; overrides or supplies the file's calibration",
    )
    p.add_argument(
        "--frame-interval",
        dest="frame_interval_s",
        type=float,
        metavar="S",
        help="seconds between frames; overrides or supplies the file's calibration",
    )


def add_times_option(p: argparse.ArgumentParser) -> None:
    """--times FILE.csv: per-frame acquisition times (`waves info`, `waves analyse`)."""
    p.add_argument(
        "--times",
        dest="times_csv",
        metavar="FILE.csv",
        help="CSV of the acquisition time (s) of every frame of the file; replaces the file's own "
        "per-frame times (dropped frames and gaps are found from them)",
    )


def add_analysis_options(p: argparse.ArgumentParser) -> None:
    """Options of the analysis itself (shared by `analyse` and `screen`)."""
    p.add_argument("--frames", metavar="START:STOP", help="frame range to analyse (stop exclusive)")
    p.add_argument("--bin", type=int, default=1, metavar="N", help="bin N x N pixels on read")
    p.add_argument(
        "--period-band",
        type=float,
        nargs=2,
        metavar=("LO", "HI"),
        help="band of wave periods in minutes (default 2 20)",
    )
    p.add_argument(
        "--smooth", type=float, metavar="UM", help="spatial smoothing sigma in um (default: wavelength/12)"
    )
    p.add_argument(
        "--phase",
        choices=("hilbert", "delay"),
        default="hilbert",
        help="phase from the analytic signal (default) or by delay embedding (quarter-period lag)",
    )
    reg = p.add_mutually_exclusive_group()
    reg.add_argument("--register", dest="register", action="store_const", const=True, default=None,
                     help="always correct rigid drift of the field (default: when it exceeds a quarter pixel)")
    reg.add_argument("--no-register", dest="register", action="store_const", const=False,
                     help="never correct drift (it is still measured and reported)")
    p.add_argument("--no-flatten", action="store_true", help="do not correct uneven illumination")
    p.add_argument("--no-brightness", action="store_true",
                   help="do not correct the lamp fade and flicker (per-frame brightness)")
    p.add_argument(
        "--memory-mb", type=float, default=400.0, metavar="MB", help="working-memory budget of an analysis"
    )


def add_cell_mask_option(p: argparse.ArgumentParser) -> None:
    """--mask FILE.tif: where the cells are (nonzero = cells), instead of the automatic cell field."""
    p.add_argument(
        "--mask",
        metavar="FILE.tif",
        help="single-image TIFF of the recorded frame size, nonzero where cells are; nothing is measured "
        "elsewhere (default: the cell field is found automatically)",
    )


def analysis_options_from_args(args: argparse.Namespace, *, workers: int | None = None):
    from waves.analyse import DEFAULT_PERIOD_BAND_MIN, AnalysisOptions

    extra = {} if workers is None else {"workers": workers}
    return AnalysisOptions(
        period_band_min=tuple(args.period_band) if args.period_band else DEFAULT_PERIOD_BAND_MIN,
        phase_method=args.phase,
        flatten=not args.no_flatten,
        brightness=not args.no_brightness,
        register=args.register,
        smooth_sigma_um=args.smooth,
        memory_budget_mb=args.memory_mb,
        **extra,
    )


def parse_frames(text: str | None) -> slice | None:
    """'START:STOP' (either may be empty) as a slice; None stays None."""
    if text is None:
        return None
    parts = text.split(":")
    try:
        if len(parts) != 2:
            raise ValueError
        start = int(parts[0]) if parts[0] else 0
        stop = int(parts[1]) if parts[1] else None
    except ValueError:
        raise WavesError(f"--frames must look like START:STOP (e.g. 0:300), got {text!r}") from None
    return slice(start, stop)


def parse_settings(items: Sequence[str] | None) -> dict:
    """NAME=VALUE strings (from --set) as {name: float}."""
    out = {}
    for item in items or ():
        if "=" not in item:
            raise WavesError(f"--set expects NAME=VALUE, got {item!r}")
        name, value = item.split("=", 1)
        name = name.strip()
        try:
            out[name] = float(value)
        except ValueError:
            raise WavesError(f"--set {name}: value {value!r} is not a number") from None
    return out


def summary_lines(summary: dict) -> list[str]:
    """The lines `waves analyse` and `waves demo` print about a result."""

    conf = summary.get("confidence") or {}

    def fmt(key, unit):
        q = summary.get(key)
        if q is None:
            return "not measured"
        ci = (conf.get(key) or {}).get("ci95")
        interval = f"95 % interval {ci[0]:.3g}-{ci[1]:.3g}; " if ci else "no interval: too few windows and blocks; "
        return f"{q['median']:.3g} {unit} ({interval}IQR {q['q25']:.3g}-{q['q75']:.3g}, n={q['n']} px)"

    lines = []
    det = summary.get("detection")
    if det and det.get("waves_detected"):
        lines.append(f"waves           detected: {100 * det['significant_fraction']:.0f} % of the cell field beats "
                     f"red noise at the {100 * det['level']:.0f} % level")
    lines.append(f"period          {fmt('period_min', 'min')}")
    analysis = summary.get("analysis") or {}
    applied = analysis.get("passband_period_min")
    asked = (analysis.get("options") or {}).get("period_band_min")
    if applied:
        lines.append(f"period band     {applied[0]:.3g}-{applied[1]:.3g} min applied"
                     + (f" (of {asked[0]:g}-{asked[1]:g} min asked)" if asked else ""))
    spread = [c["position_spread_um"] for c in conf.get("spiral_cores") or [] if c.get("position_spread_um") is not None]
    lines += [
        f"front speed     {fmt('front_speed_um_per_min', 'um/min')}, per-wave fits",
        f"  phase velocity {fmt('front_speed_phase_velocity_um_per_min', 'um/min')}",
        f"  front displacement {fmt('front_speed_displacement_um_per_min', 'um/min')}",
        f"wavelength      {fmt('wavelength_um', 'um')}",
        f"spiral cores    {len(summary.get('spiral_cores') or [])} persistent"
        + (f" (position spread {min(spread):.3g}-{max(spread):.3g} um)" if len(spread) > 1 else
           f" (position spread {spread[0]:.3g} um)" if spread else ""),
    ]
    ranges = {c["id"]: c for c in conf.get("centres") or []}
    for c in summary.get("centres") or []:
        per = "?" if c["period_min"] is None else f"{c['period_min']:.3g}"
        r = ranges.get(c["id"]) or {}
        across = (f" ({r['territory_min_mm2']:.3g}-{r['territory_max_mm2']:.3g} over {r['windows']} windows)"
                  if r.get("windows", 0) > 1 else "")
        lines.append(
            f"centre {c['id']:<8d} {c['kind']:<7s} at x {c['x_um']:.0f} um, y {c['y_um']:.0f} um; "
            f"period {per} min; territory {c['territory_area_mm2']:.3g} mm^2{across}"
        )
    for t in summary.get("front_speed_by_territory") or []:
        e = t.get("eikonal")
        if e and t.get("median_um_per_min") is not None:
            ci = e["plane_wave_speed_ci95"]
            lines.append(f"  territory {t['centre_id']:<4d} speed {t['median_um_per_min']:.3g} um/min; plane-wave "
                         f"speed c0 {e['plane_wave_speed_um_per_min']:.3g} um/min ({ci[0]:.3g}-{ci[1]:.3g}), "
                         f"curvature coefficient D {e['curvature_coefficient_um2_per_min']:.3g} um^2/min"
                         + ("" if e["constrained"] else " (not constrained)"))
    rejected = summary.get("rejected_centres") or []
    if rejected:
        lines.append(f"left out        {len(rejected)} candidate centre{'s' if len(rejected) > 1 else ''} "
                     "that did not qualify (rejected_centres.csv says why)")
    lines += [f"warning         {w}" for w in summary.get("warnings") or []]
    return lines
