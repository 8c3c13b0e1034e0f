"""Writing an analysis to a folder: summary.json, CSV tables, calibrated maps.

The analysis is computed in full before anything is written, and every file
goes through a temporary file and a rename, so a failure never leaves a
half-written file or destroys an earlier result.  summary.json is written
last: its presence means the folder is complete.
"""

from __future__ import annotations

import concurrent.futures
import csv
import math
import pathlib

import numpy as np

from waves import io
from waves.errors import InputError
from waves.units import Calibration

__all__ = [
    "STACK_FILES",
    "write_table_csv",
    "read_table_csv",
    "write_analysis",
    "analyse_file",
    "MAP_FILES",
    "TABLE_FILES",
]

MAP_FILES = {
    "period_min": "period_min.tif",
    "front_speed_um_per_min": "front_speed_um_per_min.tif",
    "front_speed_phase_velocity_um_per_min": "front_speed_phase_velocity_um_per_min.tif",
    "front_speed_displacement_um_per_min": "front_speed_displacement_um_per_min.tif",
    "plane_wave_like": "plane_wave_like.tif",
    "wavelength_um": "wavelength_um.tif",
    "direction_deg": "direction_deg.tif",
    "territory_labels": "territory_labels.tif",
    "interval_cv": "interval_cv.tif",
    "amplitude": "amplitude.tif",
    "signal_to_noise": "signal_to_noise.tif",
    "mean_image": "mean_image.tif",
    "cell_mask": "cell_mask.tif",
    "covered": "covered.tif",
    "significant_wave": "significant_wave.tif",
}

STACK_FILES = {"territory_labels_windows": "territory_labels_windows.tif"}

TABLE_FILES = {
    "cores_per_frame": "cores_per_frame.csv",
    "core_tracks": "core_tracks.csv",
    "period_timecourse": "period_timecourse.csv",
    "dispersion": "dispersion.csv",
    "centres": "centres.csv",
    "territories_timecourse": "territories_timecourse.csv",
    "drift": "drift.csv",
    "rejected_centres": "rejected_centres.csv",
    "speed_by_distance": "speed_by_distance.csv",
}


def _cell(v) -> str:
    if isinstance(v, (float, np.floating)):
        return "" if not math.isfinite(float(v)) else repr(float(v))
    if isinstance(v, (np.integer, int)) and not isinstance(v, bool):
        return str(int(v))
    return str(v)


def write_table_csv(path, table: dict) -> pathlib.Path:
    """Write a column table (dict of equal-length 1-D arrays) as CSV, atomically.
    Empty tables keep their header.  NaN is written as an empty cell."""
    cols = list(table)
    arrays = [np.asarray(table[c]) for c in cols]
    n = {len(a) for a in arrays}
    if len(n) > 1:
        raise InputError(f"table columns differ in length: {dict(zip(cols, map(len, arrays), strict=True))}")
    rows = len(arrays[0]) if arrays else 0
    with io.atomic_output(path, "w") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(cols)
        for i in range(rows):
            w.writerow([_cell(a[i]) for a in arrays])
    return pathlib.Path(path)


def read_table_csv(path) -> dict:
    """Read a CSV written by `write_table_csv` back as columns of strings."""
    with open(path, encoding="utf-8", newline="") as fh:
        r = csv.reader(fh)
        header = next(r)
        cols = {h: [] for h in header}
        for row in r:
            for h, v in zip(header, row, strict=True):
                cols[h].append(v)
    return cols


def source_record(path, stack, sha256: str | None = None) -> dict:
    """The summary's `source` block: {path, sha256, shape_tyx, dtype};
    `sha256` is the file's digest when already known."""
    return {
        "path": str(path),
        "sha256": io.file_sha256(path) if sha256 is None else sha256,
        "shape_tyx": list(stack.shape_tyx),
        "dtype": str(stack.data.dtype),
    }


def analyse_file(
    path,
    *,
    out=None,
    options=None,
    frames=None,
    bin: int = 1,  # noqa: A002 - the name users know from ImageJ
    channel: int | None = None,
    zslice: int | None = None,
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
    progress: bool = False,
    times_csv=None,
    cell_mask=None,
):
    """Read a stack, analyse it and, when `out` is given, write the results
    folder (summary.json, CSV tables, calibrated maps).  Returns the
    `waves.analyse.Analysis` with its summary's `source` filled in.
    times_csv: a CSV of per-frame times (s), see `waves.io.read_stack`; the
    stack's times (the file's own, else nominal) drive the time axis.

    `cell_mask` is a single-image TIFF (path) or a 2-D array of the file's
    frame size, nonzero where cells are (`--mask`); binned like the stack.

    Nothing is written until the analysis has finished, so a failure leaves
    an earlier result in `out` as it was.
    """
    from waves.analyse import AnalysisOptions, analyse_movie

    stack = io.read_stack(
        path,
        frames=frames,
        bin=bin,
        channel=channel,
        zslice=zslice,
        pixel_size_um=pixel_size_um,
        frame_interval_s=frame_interval_s,
        min_frames=8,
        times_csv=times_csv,
    )
    mask = _read_cell_mask(cell_mask, stack, bin) if cell_mask is not None else None
    # the digest for summary['source'] is taken on a second core while the analysis runs
    # (hashlib works without the interpreter lock)
    digest = concurrent.futures.ThreadPoolExecutor(max_workers=1)
    sha256 = digest.submit(io.file_sha256, path)
    digest.shutdown(wait=False)
    scratch = None
    if out is not None:
        scratch = pathlib.Path(out)
        if scratch.exists() and not scratch.is_dir():
            raise InputError(f"--out {scratch} exists and is not a folder; give a folder to write into")
        scratch.mkdir(parents=True, exist_ok=True)
    analysis = analyse_movie(
        stack.data,
        calibration=stack.calibration,
        options=options if options is not None else AnalysisOptions(),
        scratch_dir=scratch,
        progress=progress,
        times_s=stack.times_s,
        cell_mask=mask,
    )
    rec = analysis.summary.get("recording")
    if rec is not None:
        rec["times_origin"] = stack.times_origin  # the file's source ('ome', ...), 'csv' or 'nominal'
    _to_file_coordinates(analysis, stack)
    analysis.summary["source"] = source_record(path, stack, sha256.result())
    # how the stack was read, so pictures can re-read the same frames
    if isinstance(frames, slice):
        sel = [frames.start, frames.stop, frames.step]
    elif frames is None:
        sel = None
    else:
        sel = list(frames)
    analysis.summary.setdefault("analysis", {})["read"] = {
        "frames": sel,
        "bin": int(bin),
        "channel": channel,
        "zslice": zslice,
    }
    stack_warnings = list(stack.warnings)
    if rec is not None and rec["times_origin"] != "nominal":
        # irregular recorded times are resolved by the time grid: a note, not a warning
        irregular = [w for w in stack_warnings if w.startswith("frame times (") and " are irregular" in w]
        stack_warnings = [w for w in stack_warnings if w not in irregular]
        analysis.summary.setdefault("analysis", {}).setdefault("notes", []).extend(irregular)
    analysis.summary["warnings"] = stack_warnings + list(analysis.summary["warnings"])
    if out is not None:
        write_analysis(analysis, out, source=analysis.summary["source"])
    return analysis


def _read_cell_mask(cell_mask, stack, bin_factor: int) -> np.ndarray:
    """The user's cell mask (a TIFF path or an array of the file's frame
    size, nonzero = cells) on the grid of the stack as read (binned by
    `bin_factor`: a binned pixel is in when at least half of it is)."""
    from waves.preprocess import bin_frames, user_cell_mask

    if isinstance(cell_mask, np.ndarray):
        arr = cell_mask
    else:
        arr = io.read_map(cell_mask).data
    b = int(bin_factor)
    ny, nx = (int(v) for v in stack.data.shape[1:])
    arr = np.asarray(arr)
    if b > 1 and arr.ndim == 2 and (arr.shape[0] // b, arr.shape[1] // b) == (ny, nx):
        arr = arr[: ny * b, : nx * b]  # the rows and columns the binned read drops
        mask = user_cell_mask(arr, (ny * b, nx * b))
        mask = bin_frames(mask.astype(np.float32), b) >= 0.5
        if not mask.any():
            raise InputError(f"the cell mask marks no {b} x {b} block as cells (at least half of it)")
        return mask
    return user_cell_mask(arr, (ny, nx))


_TIME_KEYS = ("t_min", "first_min", "last_min")
_POSITION_KEYS = ("x_um", "y_um")


def _to_file_coordinates(analysis, stack) -> None:
    """Put times and positions of an analysis of a frame range or a binned
    read into the file's own time and pixel coordinates (in place).

    `analyse_movie` counts time from the first frame it is given and
    positions from the centre of its pixel (0, 0); a read from frame
    `first_frame` on is `stack.start_min` later, and a read binned by b has
    its pixel (0, 0) centred (b - 1) / 2 file pixels from the file's."""
    dt, dx, f0, step = stack.start_min, stack.origin_um, stack.first_frame, stack.frame_step
    if dt == 0 and dx == 0 and step == 1:
        return

    def shift(record) -> None:
        for k in _TIME_KEYS:
            if record.get(k) is not None:
                record[k] = record[k] + dt
        for k in _POSITION_KEYS:
            if record.get(k) is not None:
                record[k] = record[k] + dx
        if record.get("frame") is not None:
            record["frame"] = f0 + np.asarray(record["frame"]) * step

    s = analysis.summary
    for key in ("spiral_cores", "centres", "period_timecourse"):
        for rec in s.get(key) or ():
            shift(rec)
    for gap in (s.get("recording") or {}).get("gaps") or ():
        gap["start_min"], gap["stop_min"] = gap["start_min"] + dt, gap["stop_min"] + dt
    an = s.get("analysis") or {}
    if an.get("window_centres_min") is not None:
        an["window_centres_min"] = [t + dt for t in an["window_centres_min"]]
    if an.get("grid"):
        an["grid"] = {**an["grid"], "origin_x_um": an["grid"]["origin_x_um"] + dx,
                      "origin_y_um": an["grid"]["origin_y_um"] + dx}
    for table in analysis.tables.values():
        shift(table)


def write_analysis(analysis, out_dir, *, source: dict) -> pathlib.Path:
    """Write maps, tables and summary.json of an `Analysis` into `out_dir`.

    `source` is the summary's {path, sha256, shape_tyx, dtype}.  Returns the
    path of summary.json.
    """
    out = pathlib.Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder; give a folder to write into")
    out.mkdir(parents=True, exist_ok=True)
    # maps are on the analysis grid: its pixel size, and where its pixel (0, 0) sits
    grid = analysis.summary.get("analysis", {}).get("grid")
    px = float(grid["pixel_size_um"] if grid else analysis.summary["calibration"]["pixel_size_um"])
    meta = {"origin_x_um": grid["origin_x_um"], "origin_y_um": grid["origin_y_um"]} if grid else {}
    for key, name in MAP_FILES.items():
        if key in analysis.maps:
            io.write_map(out / name, analysis.maps[key], pixel_size_um=px, metadata={"quantity": key, **meta})
    for key, name in TABLE_FILES.items():
        if key in analysis.tables:
            write_table_csv(out / name, analysis.tables[key])
    labels = analysis.stacks.get("territory_labels_windows")
    step = analysis.summary.get("analysis", {}).get("window_step_min")
    if labels is not None and len(labels) and grid:
        # one frame per time window; the frame interval is the window step
        cal = Calibration(px, 60.0 * (step or 1.0), "options", "options")
        io.write_stack(out / STACK_FILES["territory_labels_windows"], labels.astype(np.uint16), calibration=cal,
                       metadata={"quantity": "territory labels per time window", **meta,
                                 "window_centres_min": analysis.summary["analysis"]["window_centres_min"]})
    summary = dict(analysis.summary)
    summary["source"] = source
    if analysis.timings_s:  # what each step cost, for benchmarks and for people waiting on big stacks
        summary["analysis"] = {**summary.get("analysis", {}),
                               "step_seconds": {k: round(float(v), 3) for k, v in analysis.timings_s.items()}}
    summary["files"] = sorted(
        [MAP_FILES[k] for k in MAP_FILES if k in analysis.maps]
        + [TABLE_FILES[k] for k in TABLE_FILES if k in analysis.tables]
        + [STACK_FILES[k] for k in STACK_FILES if len(analysis.stacks.get(k, ())) and grid]
    )
    return io.write_json(out / "summary.json", summary)
