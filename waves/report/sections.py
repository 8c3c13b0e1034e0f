"""The report's parts: figures as data URIs, tables, and one function per section
(waves.report.html puts them together)."""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io as _io
import json
import math
import pathlib
from collections.abc import Mapping, Sequence

import numpy as np

from waves import __version__
from waves.errors import InputError
from waves.report import figures as F

SECTIONS = {
    "summary": "Summary",
    "spiral-cores": "Spiral cores",
    "centres": "Centres and territories",
    "period-timecourse": "Period over the movie",
    "dispersion": "Dispersion",
    "model": "Measured against a model",
    "maps": "Maps",
    "movie": "Movie",
    "warnings": "Warnings",
    "calibration": "Calibration",
    "provenance": "Provenance",
    "meaning": "What the numbers mean",
}


def figure_png(fig, *, dpi: int = 100) -> bytes:
    """Render a matplotlib Figure to PNG bytes (Agg)."""
    buf = _io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def _img(data: bytes, mime: str, alt: str) -> str:
    uri = f"data:{mime};base64," + base64.b64encode(data).decode("ascii")
    return f'<img src="{uri}" alt="{html.escape(alt)}">'


def _figure_html(fig, alt: str, caption: str) -> str:
    return f"<figure>{_img(figure_png(fig), 'image/png', alt)}<figcaption>{html.escape(caption)}</figcaption></figure>"


def _e(v) -> str:
    return html.escape(str(v))


def _fmt(v, digits: int = 4) -> str:
    if v is None or v == "":
        return "-"
    try:
        x = float(v)
    except (TypeError, ValueError):
        return _e(v)
    if not math.isfinite(x):
        return "-"
    if x == int(x) and abs(x) < 1e9:
        return str(int(x))
    return f"{x:.{digits}g}"


def _table(header: Sequence[str], rows: Sequence[Sequence], *, numeric: Sequence[bool] | None = None) -> str:
    numeric = numeric or [False] * len(header)
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = []
    for row in rows:
        cells = []
        for v, is_num in zip(row, numeric, strict=True):
            cells.append(f'<td class="num">{_fmt(v)}</td>' if is_num else f"<td>{_e(v)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _floats(col) -> np.ndarray:
    return np.asarray([float(x) if str(x) not in ("", "None") else np.nan for x in (col or [])], dtype=np.float64)


def _section(sid: str, body: str) -> str:
    return f'<section id="{sid}"><h2>{_e(SECTIONS[sid])}</h2>\n{body}\n</section>\n'


# --------------------------------------------------------------------------- reading a folder


def _read_folder(folder: pathlib.Path):
    from waves import io
    from waves.result import MAP_FILES, TABLE_FILES, read_table_csv

    spath = folder / "summary.json"
    if not spath.is_file():
        raise InputError(
            f"{folder} holds no summary.json: it is not a finished results folder; run "
            f"'waves analyse STACK --out {folder}' first"
        )
    try:
        summary = json.loads(spath.read_text(encoding="utf-8"))
    except ValueError as exc:
        raise InputError(f"{spath} is not valid JSON ({exc}); rerun the analysis") from None
    if not isinstance(summary, dict) or "calibration" not in summary:
        raise InputError(f"{spath} is not an analysis summary (no calibration); rerun the analysis")
    tables = {}
    for key, name in TABLE_FILES.items():
        if (folder / name).is_file():
            tables[key] = read_table_csv(folder / name)
    maps = {}
    for key, name in {**MAP_FILES, "territory_labels": "territory_labels.tif"}.items():
        if (folder / name).is_file():
            maps[key] = io.read_map(folder / name).data
    return summary, tables, maps


# --------------------------------------------------------------------------- sections


_QUANTITIES = (
    ("period_min", "Wave period", "min"),
    ("front_speed_um_per_min", "Front speed (per-wave fits)", "um/min"),
    ("front_speed_phase_velocity_um_per_min", "Front speed (phase velocity)", "um/min"),
    ("front_speed_displacement_um_per_min", "Front speed (front displacement)", "um/min"),
    ("wavelength_um", "Wavelength", "um"),
)


def _summary_section(s: Mapping) -> str:
    rows = []
    conf = s.get("confidence") or {}
    for key, label, unit in _QUANTITIES:
        q = s.get(key)
        ci = (conf.get(key) or {}).get("ci95") or [None, None]
        if q:
            rows.append([label, q.get("median"), ci[0], ci[1], q.get("q25"), q.get("q75"), q.get("n"), unit])
        elif key in s:
            rows.append([label, None, None, None, None, None, 0, unit + " (not measured)"])
    body = _table(["quantity", "median", "95 % interval, low", "95 % interval, high", "lower quartile",
                   "upper quartile", "n (pixels)", "unit"], rows,
                  numeric=[False, True, True, True, True, True, True, False])
    if conf.get("method"):
        body += f"<p>Intervals: {html.escape(conf['method'])}; blocks of {conf['block_um']:.0f} um.</p>"
    extra = []
    det = s.get("detection")
    if det:
        extra.append(["field beating red noise (detection)", 100.0 * float(det["significant_fraction"]),
                      f"% of the cell field, at the {100 * det['level']:.0f} % level"])
    if s.get("dominant_period_min") is not None:
        extra.append(["dominant period (spectral peak)", s["dominant_period_min"], "min"])
    extra.append(["persistent spiral cores", len(s.get("spiral_cores") or []), "count"])
    if s.get("cores_per_cm2") is not None:
        extra.append(["spiral-core density", s["cores_per_cm2"], "cores per cm\u00b2 of signal"])
    sig = (s.get("analysis") or {}).get("signal_fraction")
    if sig is not None:
        extra.append(["field with a wave signal", 100.0 * float(sig), "% of the analysis grid"])
    body += _table(["quantity", "value", "unit"], extra, numeric=[False, True, False])
    return _section("summary", body)


def _cores_section(s: Mapping, tables: Mapping) -> str:
    cores = s.get("spiral_cores") or []
    spread = {c["id"]: c.get("position_spread_um") for c in (s.get("confidence") or {}).get("spiral_cores") or []}
    if cores:
        body = _table(
            ["id", "x (um)", "y (um)", "position spread (um)", "charge", "rotation (as displayed)",
             "first seen (min)", "last seen (min)"],
            [[c.get("id"), c.get("x_um"), c.get("y_um"), spread.get(c.get("id")), c.get("charge"), c.get("rotation"),
              c.get("first_min"), c.get("last_min")] for c in cores],
            numeric=[True, True, True, True, True, False, True, True],
        )
    else:
        body = "<p>No persistent spiral core was found (a core must keep its winding for about two periods).</p>"
    tr = tables.get("core_tracks")
    if tr and tr.get("track_id"):
        ids = {int(c.get("id")) for c in cores}
        n = len(tr["track_id"])
        cols = [tr.get(c) or [None] * n
                for c in ("track_id", "lifetime_min", "gyration_radius_um", "max_excursion_um", "path_length_um")]
        rows = [[col[k] for col in cols] for k in range(n) if int(float(tr["track_id"][k])) in ids]
        if rows:
            body += "<p>Meander of the persistent cores' tracks:</p>" + _table(
                ["track id", "lifetime (min)", "radius of gyration (um)", "largest excursion (um)", "path length (um)"],
                rows, numeric=[True] * 5)
        n_all = len(tr["track_id"])
        body += (f"<p>{n_all} track{'s' if n_all != 1 else ''} in all (cores_per_frame.csv, core_tracks.csv); "
                 "short-lived ones are mostly noise.</p>")
    return _section("spiral-cores", body)


def _centres_section(s: Mapping, tables: Mapping, territory_fig: str) -> str:
    centres = s.get("centres") or []
    ranges = {c["id"]: c for c in (s.get("confidence") or {}).get("centres") or []}
    if centres:
        def share(c):
            v = c.get("field_share")
            return None if v is None else 100.0 * float(v)

        def across(c):
            r = ranges.get(c.get("id")) or {}
            if not r.get("windows"):
                return "-"
            return f"{_fmt(r['territory_min_mm2'])}-{_fmt(r['territory_max_mm2'])}"

        body = _table(
            ["id", "kind", "x (um)", "y (um)", "period (min)", "interval CV", "territory (mm\u00b2)",
             "territory over the windows (mm\u00b2)", "equivalent diameter (um)", "share of field (%)", "rotation",
             "active (min)"],
            [[c.get("id"), c.get("kind"), c.get("x_um"), c.get("y_um"), c.get("period_min"), c.get("interval_cv"),
              c.get("territory_area_mm2"), across(c), c.get("equivalent_diameter_um"), share(c),
              c.get("rotation") or "-",
              (f"{_fmt(c['first_min'])}-{_fmt(c['last_min'])}" if c.get("first_min") is not None
               and c.get("last_min") is not None else "-")] for c in centres],
            numeric=[True, False, True, True, True, True, True, False, True, True, False, False],
        )
        extra = []
        if s.get("centres_per_cm2") is not None:
            extra.append(["centre density", s["centres_per_cm2"], "centres per cm\u00b2"])
        if s.get("unassigned_share") is not None:
            extra.append(["field recruited by no centre", 100.0 * float(s["unassigned_share"]), "%"])
        if extra:
            body += _table(["quantity", "value", "unit"], extra, numeric=[False, True, False])
        body += _territory_speed_table(s)
    else:
        body = "<p>No centres (pacemakers or spirals with their territories) are reported in this analysis.</p>"
    body += territory_fig
    tt = tables.get("territories_timecourse")
    if tt and tt.get("t_min"):
        body += _figure_html(
            F.territory_timecourse_figure(_floats(tt["t_min"]), _floats(tt.get("centre_id")),
                                          _floats(tt.get("territory_area_mm2"))),
            "territory time course", "Area each centre recruits in each time window (colours as in the map); a "
                                     "faster centre takes over its neighbours' territory.")
    return _section("centres", body)


def _territory_speed_table(s: Mapping) -> str:
    """Each territory's front speed: its median, and the eikonal fit c = c0 - D / r
    against the distance r from its centre (plane-wave speed c0, curvature coefficient D)."""
    rows = []
    for t in s.get("front_speed_by_territory") or []:
        e = t.get("eikonal") or {}
        ci0, cid = e.get("plane_wave_speed_ci95") or [None, None], e.get("curvature_coefficient_ci95") or [None, None]
        fit = ("fitted" if e.get("constrained") else "D not constrained") if e else "too few distances"
        rows.append([t.get("centre_id"), t.get("median_um_per_min"), e.get("plane_wave_speed_um_per_min"),
                     f"{_fmt(ci0[0])}-{_fmt(ci0[1])}" if e else "-", e.get("curvature_coefficient_um2_per_min"),
                     f"{_fmt(cid[0])}-{_fmt(cid[1])}" if e else "-",
                     f"{_fmt(e['r_min_um'])}-{_fmt(e['r_max_um'])}" if e else "-", fit])
    if not rows:
        return ""
    return ("<p>Front speed by territory. Rings near a pacemaker are curved and move slower, c = c0 - D / r "
            "(eikonal relation, Tyson &amp; Keener 1988): c0 is the plane-wave speed, D the curvature coefficient, "
            "fitted to the speed against the distance r from the centre (speed_by_distance.csv).</p>"
            + _table(["centre", "median speed (um/min)", "plane-wave speed c0 (um/min)", "c0 95 % interval",
                      "D (um\u00b2/min)", "D 95 % interval", "distances fitted (um)", "fit"], rows,
                     numeric=[True, True, True, False, True, False, False, False]))


def _timecourse_section(s: Mapping, tables: Mapping) -> str:
    tc = tables.get("period_timecourse")
    if tc and tc.get("t_min"):
        t, p = _floats(tc["t_min"]), _floats(tc["period_min"])
        lo, hi = _floats(tc.get("period_q25_min")), _floats(tc.get("period_q75_min"))
    else:
        course = s.get("period_timecourse") or []
        t = np.asarray([c["t_min"] for c in course], dtype=np.float64)
        p = np.asarray([c["period_min"] for c in course], dtype=np.float64)
        lo = hi = None
    fig = F.period_timecourse_figure(t, p, q25_min=lo if lo is not None and lo.size == t.size else None,
                                     q75_min=hi if hi is not None and hi.size == t.size else None)
    window = (s.get("analysis") or {}).get("window_min")
    cap = "Median period (and interquartile range) in sliding windows"
    cap += f" of {window:.1f} min" if window else ""
    body = _figure_html(fig, "period time course", cap + ", plotted at the middle of each window.")
    if t.size:
        body += _table(["window middle (min)", "median period (min)"], [[a, b] for a, b in zip(t, p, strict=True)],
                       numeric=[True, True])
    return _section("period-timecourse", body)


def _dispersion_section(tables: Mapping) -> str:
    d = tables.get("dispersion") or {}
    p, v = _floats(d.get("period_min")), _floats(d.get("speed_um_per_min"))
    t = _floats(d.get("t_min"))
    fig = F.dispersion_figure(p, v, t_min=t if t.size == p.size else None)
    return _section("dispersion", _figure_html(
        fig, "dispersion scatter",
        "Front speed against period, one point per time window and field region (a 3 x 3 grid). In an "
        "excitable medium waves that follow closely travel slower; a rising curve is the dispersion relation."))


def _model_section(folder: pathlib.Path) -> str:
    """What `waves compare` wrote into the folder (compare_<model>.json/.png)."""
    found = sorted(folder.glob("compare_*.json"))
    if not found:
        return _section("model", "<p>No model comparison in this folder. "
                        "<code>waves compare DIR --model barkley|fhn|relay</code> fits a model's "
                        "dispersion relation to these measurements; rerun <code>waves report</code> "
                        "afterwards to show it here.</p>")
    parts = []
    for path in found:
        try:
            comp = json.loads(path.read_text(encoding="utf-8"))
        except ValueError:
            parts.append(f"<p>{_e(path.name)} is not valid JSON; rerun waves compare.</p>")
            continue
        model = comp.get("model", path.stem[len("compare_"):])
        parts.append(f"<h3>{_e(model)}</h3>")
        png = path.with_suffix(".png")
        if png.is_file():
            parts.append(f"<figure>{_img(png.read_bytes(), 'image/png', f'{model} dispersion')}"
                         "<figcaption>Measured (period, speed) points and medians over the model's "
                         "dispersion curve with the fitted scales.</figcaption></figure>")
        fit = comp.get("fit") or {}
        values, ci = fit.get("values") or {}, fit.get("ci95") or {}
        rows = [[k, v, *(ci.get(k) or [None, None]), "fixed" if k in (fit.get("fixed") or []) else
                 ("yes" if (fit.get("constrained") or {}).get(k, True) else "no")] for k, v in values.items()]
        if rows:
            parts.append(_table(["fitted scale", "value", "95 % low", "95 % high", "constrained"], rows,
                                numeric=[False, True, True, True, False]))
        if fit.get("rms_relative") is not None:
            parts.append(f"<p>Weighted rms relative residual {_fmt(100 * fit['rms_relative'], 3)} % over "
                         f"{_e(fit.get('n_points'))} points ({_e(fit.get('n_downweighted'))} down-weighted). "
                         "The intervals allow for points of one time window (and its neighbour) sharing their errors; "
                         "a bias of the measurement itself is not in them.</p>")
        checks = comp.get("checks") or []
        if checks:
            parts.append(_table(
                ["quantity", "measured", "model", "relative difference", "reproduced", "note"],
                [[c.get("quantity"), c.get("measured"), c.get("model"), c.get("relative_difference"),
                  {True: "yes", False: "NO"}.get(c.get("reproduced"), "not tested"), c.get("note")]
                 for c in checks],
                numeric=[False, True, True, True, False, False]))
        notes = comp.get("notes") or []
        if notes:
            parts.append('<ul class="note">' + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul>")
    return _section("model", "\n".join(parts))


def _maps_section(figs: list[str]) -> str:
    return _section("maps", "\n".join(figs))


def _movie_section(movie_html: str) -> str:
    return _section("movie", movie_html)


def _warnings_section(s: Mapping, extra: Sequence[str]) -> str:
    items = list(s.get("warnings") or []) + list(extra)
    if not items:
        return _section("warnings", "<p>No warnings.</p>")
    return _section("warnings", '<ul class="note">' + "".join(f"<li>{_e(w)}</li>" for w in items) + "</ul>")


def _calibration_section(s: Mapping) -> str:
    cal = s.get("calibration") or {}
    grid = (s.get("analysis") or {}).get("grid") or {}
    rows = [
        ["pixel size", cal.get("pixel_size_um"), "um", cal.get("pixel_size_origin", cal.get("origin"))],
        ["frame interval", cal.get("frame_interval_s"), "s", cal.get("frame_interval_origin", cal.get("origin"))],
    ]
    if grid:
        rows += [
            ["analysis grid binning", grid.get("bin"), "recorded pixels per side", "analysis"],
            ["analysis grid pixel size", grid.get("pixel_size_um"), "um", "analysis"],
            ["analysis grid origin (x, y)", f"{_fmt(grid.get('origin_x_um'))}, {_fmt(grid.get('origin_y_um'))}",
             "um", "analysis"],
        ]
    src = s.get("source") or {}
    shape = src.get("shape_tyx")
    if shape and cal.get("pixel_size_um") and cal.get("frame_interval_s"):
        t, ny, nx = shape
        rows += [
            ["duration", t * float(cal["frame_interval_s"]) / 60.0, "min", "frames x interval"],
            ["field size", f"{nx * float(cal['pixel_size_um']) / 1000:.3g} x {ny * float(cal['pixel_size_um']) / 1000:.3g}",
             "mm (x by y)", "columns/rows x pixel size"],
        ]
    body = _table(["quantity", "value", "unit", "from"], rows, numeric=[False, True, False, False])
    body += ("<p>Positions are in the recorded image: x = column x pixel size, y = row x pixel size, row 0 at the "
             "top. Times are minutes from the first frame.</p>")
    return _section("calibration", body)


def _provenance_section(s: Mapping, report_notes: Sequence[str]) -> str:
    an = s.get("analysis") or {}
    src = s.get("source") or {}
    rows = [
        ["waves version (analysis)", an.get("waves_version", "unknown")],
        ["waves version (report)", __version__],
        ["source file", src.get("path", "unknown")],
        ["source sha256", src.get("sha256", "unknown")],
        ["shape (t, y, x)", " x ".join(str(v) for v in src.get("shape_tyx") or []) or "unknown"],
        ["data type", src.get("dtype", "unknown")],
        ["report written", _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")],
    ]
    for key, label in (("passband_period_min", "band-pass (periods, min)"),
                       ("trimmed_frames_each_end", "frames trimmed at each end"),
                       ("phase_method", "phase method"), ("window_min", "time-course window (min)"),
                       ("smoothing_sigma_um", "spatial smoothing sigma (um)")):
        if an.get(key) is not None:
            v = an[key]
            rows.append([label, ", ".join(_fmt(x) for x in v) if isinstance(v, list) else _fmt(v)])
    body = _table(["item", "value"], rows)
    opts = an.get("options") or {}
    if opts:
        body += "<p>Options of the analysis:</p>" + _table(
            ["option", "value"], [[k, json.dumps(v)] for k, v in opts.items()])
    notes = list(an.get("notes") or []) + list(report_notes)
    if notes:
        body += "<p>Notes:</p><ul>" + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul>"
    return _section("provenance", body)


_MEANING = (
    ("Median, quartiles and n",
     "Each number is the median over the pixels of the analysis grid where it could be measured; the quartiles "
     "bound the middle half of those pixels. n counts pixels, and neighbouring pixels see the same waves, so n "
     "overstates how many independent measurements there are. A wide interquartile range means the field is not "
     "uniform: look at the maps before quoting a median."),
    ("Wave period (min)",
     "Time between successive waves passing one place, from whole phase cycles over the movie. Only periods "
     "inside the band-pass can be found; a movie needs at least about 3.5 periods; a period that drifts during "
     "the movie is averaged (see the time course)."),
    ("Front speed (um/min)",
     "How fast a wave front moves, perpendicular to itself: the phase velocity (period-weighted phase gradient), "
     "and independently from plane fits to the times the fronts arrive. It is reported only where the wave "
     "direction is steady, away from spiral cores and from places where waves collide, where a speed is not "
     "defined."),
    ("Wavelength (um)",
     "Distance between successive fronts: front speed x period at each pixel."),
    ("Dispersion",
     "Front speed against period in time windows and field regions. Faster waves at longer periods is the "
     "dispersion relation of an excitable medium; few points or a flat cloud mean the data do not constrain it."),
    ("Spiral cores, charge and rotation",
     "A spiral core is a point the phase winds around (a phase singularity). Charge +1 means the phase winds "
     "once counterclockwise as displayed; since the phase increases in time, such a spiral turns clockwise on "
     "the screen, charge -1 counterclockwise. Only cores that persist for about a period are listed; noise makes "
     "short-lived pairs. Positions are the mean over the track, to about one analysis-grid pixel."),
    ("Centres and territories",
     "A centre is a pacemaker (target waves) or a spiral core that sends waves out; its territory is the area "
     "its waves reach, found by following the waves back to where they came from. Areas are in mm\u00b2 of the "
     "field in view; a territory cut by the edge of the view is larger in the dish. The interval CV is the spread "
     "of the times between successive waves divided by their mean: near 0 for a regular pacemaker. Places no "
     "centre recruits have no signal, are obstacles, or get their waves from outside the view."),
    ("Pictures",
     "Phase snapshot, kymograph and movie are recomputed from the original stack with the analysis's binning, "
     "band-pass and smoothing; maps are on the analysis grid, whose pixels are larger than the recording's. Grey "
     "in a map means not measured there."),
)


def _meaning_section(s: Mapping) -> str:
    body = "<dl>" + "".join(f"<dt>{_e(t)}</dt><dd>{_e(d)}</dd>" for t, d in _MEANING) + "</dl>"
    disclaimer = s.get("disclaimer") or "research measurements; not a clinical, diagnostic or safety judgement"
    body += f'<p class="disclaimer" id="disclaimer">{_e(disclaimer.capitalize())}. {_e(_TOOL_NOTE)}</p>'
    return _section("meaning", body)


_TOOL_NOTE = (
    "waves is a research tool: its numbers are measurements with the limits described in 'What the numbers "
    "mean', to be checked against the pictures; they are not a clinical, diagnostic or safety judgement."
)
