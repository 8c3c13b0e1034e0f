"""The HTML report: one self-contained file (report.html) in a results folder.

Images are embedded as base64 PNG (and GIF) data URIs, the style sheet is
inline, and there is no script: a Content-Security-Policy meta tag forbids
every network request, so the report opens the same offline, from an e-mail
or years later.  `write_report` reads only what a results folder holds
(summary.json, the CSV tables, the TIFF maps), so it also works on a folder
written by an older analysis; pictures that need the phase movie (phase
snapshot, kymograph, movie) are recomputed from the original stack when it
is found (`waves.report.signal`).
"""

from __future__ import annotations

import pathlib
from collections.abc import Mapping, Sequence

import numpy as np

from waves import __version__
from waves.errors import InputError, WavesError
from waves.report import figures as F
from waves.report.drift import drift_caption, drift_trace_figure
from waves.report.sections import (
    _TOOL_NOTE,
    SECTIONS,
    _calibration_section,
    _centres_section,
    _cores_section,
    _dispersion_section,
    _e,
    _figure_html,
    _floats,
    _img,
    _maps_section,
    _meaning_section,
    _model_section,
    _movie_section,
    _provenance_section,
    _read_folder,
    _summary_section,
    _timecourse_section,
    _warnings_section,
    figure_png,
)

__all__ = ["write_report", "figure_png", "SECTIONS", "REPORT_NAME", "CSP"]

REPORT_NAME = "report.html"
# no network, no script; only inline style and embedded (data:) images
CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"
# section id -> heading, in report order

_STYLE = """
body{font-family:-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;color:#1a1a1a;max-width:1100px;
margin:0 auto;padding:1em 1.5em;line-height:1.45}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:2px solid #0072B2;padding-bottom:.15em;margin-top:1.6em}
table{border-collapse:collapse;margin:.6em 0}th,td{border:1px solid #c8c8c8;padding:.25em .6em;text-align:left;
vertical-align:top}th{background:#eef3f8}td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{display:inline-block;margin:.5em 1em .5em 0;vertical-align:top}figcaption{font-size:.9em;color:#444;
max-width:600px}img{max-width:100%;height:auto}.note{background:#fff8e1;border-left:4px solid #E69F00;
padding:.5em .8em}.disclaimer{background:#f3f3f3;border-left:4px solid #555;padding:.5em .8em}
code{background:#f3f3f3;padding:0 .2em}dt{font-weight:bold;margin-top:.6em}
"""


# --------------------------------------------------------------------------- small helpers


# --------------------------------------------------------------------------- entry point


def _stack_candidates(summary: Mapping, folder: pathlib.Path, stack_path) -> list[pathlib.Path]:
    if stack_path is not None:
        return [stack_path]  # as given: a file, a folder of frames or a glob
    p = (summary.get("source") or {}).get("path")
    if not p:
        return []
    p = pathlib.Path(p)
    return [p] if p.is_absolute() else [p, folder / p, folder.parent / p]


def write_report(
    results_dir,
    *,
    stack_path=None,
    movie: bool = True,
    kymograph_line_um: Sequence[float] | None = None,
    movie_frames: int = 60,
    progress: bool = False,
) -> pathlib.Path:
    """Write report.html (and movie.gif, movie.mp4 when ffmpeg is installed)
    into `results_dir`, a folder written by `waves analyse`; returns the
    report's path.

    stack_path          the analysed stack, for the phase snapshot, kymograph
                        and movie (default: summary['source']['path']); when
                        it cannot be found those pictures say so.
    movie               write and embed the movie.
    kymograph_line_um   (x0, y0, x1, y1) in um of the recorded image; default:
                        a horizontal line through the main centre.
    movie_frames        frames in the movie (at most 120).
    """
    from tqdm.auto import tqdm

    from waves import io
    from waves.report.movie import MAX_MOVIE_FRAMES, write_movie
    from waves.report.signal import recompute_phase

    folder = pathlib.Path(results_dir)
    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder; give the --out folder of 'waves analyse'")
    if isinstance(movie_frames, bool) or not isinstance(movie_frames, int) or not 1 <= movie_frames <= MAX_MOVIE_FRAMES:
        raise InputError(f"movie_frames must be 1..{MAX_MOVIE_FRAMES}, got {movie_frames!r}")
    if kymograph_line_um is not None and len(kymograph_line_um) != 4:
        raise InputError(f"a kymograph line is four numbers x0 y0 x1 y1 in um, got {kymograph_line_um!r}")
    summary, tables, maps = _read_folder(folder)
    grid = F.MapGrid.from_summary(summary)
    report_notes: list[str] = []  # provenance notes: how the pictures differ from the analysis
    bar = tqdm(total=6, desc="report", unit="step", disable=not progress, leave=False)

    # phase pictures need the original stack
    pf, why = None, None
    candidates = _stack_candidates(summary, folder, stack_path)
    if stack_path is None:
        candidates = [c for c in candidates if c.exists()]
    if not candidates:
        why = "the analysed stack was not found" + (
            f" at {(summary.get('source') or {}).get('path')}" if (summary.get("source") or {}).get("path") else "")
        why += "; pass it with stack_path= (or --stack) to see the phase, kymograph and movie"
    else:
        try:
            pf = recompute_phase(candidates[0], summary, mean_image=maps.get("mean_image"),
                                 max_frames=int(movie_frames), line_um=kymograph_line_um, progress=progress)
            report_notes += list(pf.notes)
        except WavesError as exc:
            why = f"phase pictures not made: {exc}"
    bar.update(1)

    cores_table = tables.get("cores_per_frame") or {}
    figs: list[str] = []
    mean = maps.get("mean_image")
    if mean is not None:
        figs.append(_figure_html(
            F.mean_image_figure(mean, grid=grid, centres=summary.get("centres") or [],
                                cores=summary.get("spiral_cores") or []),
            "mean image", "Temporal mean of the movie on the analysis grid; circles: centres; crosses: persistent "
            "spiral cores (vermillion charge +1, blue charge -1)."))
    if pf is not None:
        k = len(pf.frames) // 2
        frame = int(pf.frames[k])
        fr = _floats(cores_table.get("frame"))
        sel = np.flatnonzero(fr == frame)
        here = [{"x_um": float(cores_table["x_um"][i]), "y_um": float(cores_table["y_um"][i]),
                 "charge": int(float(cores_table["charge"][i]))} for i in sel]
        figs.append(_figure_html(
            F.phase_snapshot_figure(pf.phase[k], grid=grid, cores=here, t_min=float(pf.t_min[k])),
            "phase snapshot", "Wave phase in one frame (cyclic colours: the same colour is the same stage of "
            "the wave); arrows: rotation sense of each spiral core detected in this frame."))
    else:
        figs.append(f'<p class="note">Phase snapshot: {_e(why)}.</p>')
    bar.update(1)
    if "period_min" in maps:
        figs.append(_figure_html(F.period_map_figure(maps["period_min"], grid=grid), "period map",
                                 "Wave period at each place (minutes); grey: no wave signal."))
    else:
        figs.append('<p class="note">Period map: not in this results folder (no period was measured).</p>')
    if "front_speed_um_per_min" not in maps:
        figs.append('<p class="note">Speed map: not in this results folder (no front speed was measured).</p>')
    else:
        figs.append(_figure_html(
            F.speed_map_figure(maps["front_speed_um_per_min"], maps.get("direction_deg"), grid=grid,
                               excluded=np.isfinite(maps["period_min"]) if "period_min" in maps else None),
            "speed map", "Front speed (um/min) from each wave's local plane fit, median over the waves, where the "
            "wave direction is steady; arrows: direction of travel; light grey: waves kept out of the speed "
            "statistics (collision lines, centres, cores, edges; margins in summary.json 'speed_regions'); "
            "dark: no wave signal."))
    if "interval_cv" in maps:
        figs.append(_figure_html(
            F.regularity_map_figure(maps["interval_cv"], grid=grid), "regularity map",
            "Spread of the intervals between successive waves relative to their mean (0: perfectly regular); "
            "high near collisions and where centres compete."))
    figs.append(_figure_html(
        F.histograms_figure(maps.get("period_min", np.zeros(0)), maps.get("front_speed_um_per_min", np.zeros(0))),
        "period and speed histograms", "Distribution over pixels; solid line: median; dashed: quartiles."))
    drift_fig = drift_trace_figure(tables.get("drift"), summary.get("drift"))
    if drift_fig is not None:
        figs.append(_figure_html(drift_fig, "stage drift", drift_caption(summary["drift"])))
    bar.update(1)
    if pf is not None:
        d_mm = pf.distance_um / 1000.0
        x0, y0, x1, y1 = pf.line_um
        figs.append(_figure_html(
            F.kymograph_figure(pf.kymograph, t_min=pf.kymograph_t_min, distance_mm=d_mm,
                               title=f"Kymograph from ({x0 / 1000:.2f}, {y0 / 1000:.2f}) mm to "
                                     f"({x1 / 1000:.2f}, {y1 / 1000:.2f}) mm"),
            "kymograph", f"Band-passed signal along the line from ({x0 / 1000:.2f}, {y0 / 1000:.2f}) mm to "
                         f"({x1 / 1000:.2f}, {y1 / 1000:.2f}) mm (across) over time (down); each sloped band is a "
                         "front, its slope the speed along the line."))
    else:
        figs.append(f'<p class="note">Kymograph: {_e(why)}.</p>')
    shape = next((m.shape for m in maps.values()), None)
    if shape is not None:
        ids = [int(c["id"]) for c in summary.get("spiral_cores") or [] if "id" in c]
        ct = {k: cores_table.get(k, []) for k in ("frame", "track_id", "x_um", "y_um", "charge")}
        figs.append(_figure_html(
            F.core_tracks_figure(ct, grid=grid, shape_yx=shape, background=mean, persistent_ids=ids),
            "core tracks", "Tracks of spiral cores: circle at the first frame, square at the last; faint lines: "
                           "short-lived cores (usually noise)."))
    territory = _figure_html(
        F.territory_map_figure(maps.get("territory_labels"), grid=grid, centres=summary.get("centres") or []),
        "territory map", "Which centre's waves reach each place first.")
    bar.update(1)

    movie_html = ""
    if not movie:
        movie_html = "<p>Movie not made (switched off).</p>"
    elif pf is None:
        movie_html = f'<p class="note">Movie: {_e(why)}.</p>'
    else:
        files = write_movie(pf, folder, cores_per_frame=cores_table, progress=progress)
        movie_html = (f"<figure>{_img(files.gif.read_bytes(), 'image/gif', 'movie')}<figcaption>"
                      f"Processed signal (left) and phase (right), {files.n_frames} frames from "
                      f"{pf.t_min[0]:.1f} to {pf.t_min[-1]:.1f} min; circles: spiral cores. Also saved as "
                      f"{_e(files.gif.name)}" + (f" and {_e(files.mp4.name)}" if files.mp4 else "")
                      + ".</figcaption></figure>")
    bar.update(1)

    title = pathlib.Path((summary.get("source") or {}).get("path") or folder.name).name
    parts = [
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">",
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>waves report: {_e(title)}</title><style>{_STYLE}</style></head><body>",
        f"<h1>Wave analysis of {_e(title)}</h1>",
        f'<p class="disclaimer">{_e(_TOOL_NOTE)}</p>',
        _summary_section(summary),
        _cores_section(summary, tables),
        _centres_section(summary, tables, territory),
        _timecourse_section(summary, tables),
        _dispersion_section(tables),
        _model_section(folder),
        _maps_section(figs),
        _movie_section(movie_html),
        _warnings_section(summary, [why] if why else []),
        _calibration_section(summary),
        _provenance_section(summary, report_notes),
        _meaning_section(summary),
        f"<footer><p>Written by waves {_e(__version__)}.</p></footer></body></html>\n",
    ]
    out = folder / REPORT_NAME
    with io.atomic_output(out, "w") as fh:
        fh.write("\n".join(parts))
    bar.update(1)
    bar.close()
    return out
