"""The pipeline's time axis: true frame times -> the uniform grid it analyses,
the notes and warnings about dropped frames and gaps, and the summary's
`recording` block."""

from __future__ import annotations

import dataclasses

import numpy as np

from waves.errors import InputError
from waves.preprocess.timebase import GAP_MIN_FRAMES, GridResampler, Timebase, build_timebase
from waves.units import Calibration


def time_axis(times_s, valid_frames, *, n_frames: int, calibration: Calibration, notes: list, warnings: list):
    """(timebase or None, resampler or None, calibration on the grid).

    None, None, calibration when neither times nor bad frames are given.  The
    resampler is None when the grid is the movie itself (regular times, no
    bad frame).  The calibration's interval becomes the grid's.
    """
    if times_s is None and valid_frames is None:
        return None, None, calibration
    cal = calibration
    if times_s is None:
        times = np.arange(n_frames, dtype=np.float64) * cal.frame_interval_s
    else:
        times = np.asarray(times_s, dtype=np.float64).reshape(-1)
        if times.size != n_frames:
            raise InputError(f"times_s holds {times.size} times for a movie of {n_frames} frames; give one per frame")
    excluded = None
    if valid_frames is not None:
        vf = np.asarray(valid_frames).reshape(-1)
        if vf.size != n_frames:
            raise InputError(f"valid_frames holds {vf.size} values for a movie of {n_frames} frames; give one per frame")
        excluded = ~vf.astype(bool)
    tb = build_timebase(times, nominal_interval_s=cal.frame_interval_s, excluded=excluded)
    if tb.interval_s != cal.frame_interval_s:
        notes.append(
            f"frame interval {tb.interval_s:g} s from the recorded frame times (median step) instead of "
            f"the calibration's {cal.frame_interval_s:g} s"
        )
        cal = dataclasses.replace(cal, frame_interval_s=tb.interval_s)
    dt_min = tb.interval_s / 60.0
    n_drop = int(tb.dropped.size)
    gaps = tb.gaps
    if n_drop:
        notes.append(
            f"{n_drop} of {tb.n_grid} frames are missing from the recording (dropped"
            + (f", {len(gaps)} gap{'s' if len(gaps) > 1 else ''} among them" if gaps else "")
            + f"); the true frame times were used: frames were put on a regular {tb.interval_s:g} s grid "
            "and the missing ones filled by interpolation in time"
        )
    for a, b in gaps:
        warnings.append(
            f"gap in the recording: {b - a} frames missing from {a * dt_min:.1f} to {b * dt_min:.1f} min; "
            "nothing is measured there (periods, speeds and cores come from the frames before and after it)"
        )
    n_excl = int(tb.excluded.sum())
    if n_excl:
        notes.append(
            f"{n_excl} frames left out of the measurements (declared bad); their content was replaced by "
            "interpolation in time between the neighbouring good frames"
        )
    resampler = None if tb.is_identity else GridResampler(tb)
    return tb, resampler, cal


def recording_block(tb: Timebase | None, *, n_frames: int, calibration: Calibration) -> dict:
    """summary['recording']: the time grid, dropped frames, gaps and frames
    left out (grid indices; times in minutes from the first frame)."""
    if tb is None:
        return {
            "frame_interval_s": calibration.frame_interval_s,
            "times_origin": "nominal",
            "n_recorded_frames": int(n_frames),
            "n_grid_frames": int(n_frames),
            "dropped_frames": [],
            "gaps": [],
            "excluded_frames": [],
            "interpolated_frames": [],
            "invalid_frames": [],
            "gap_margin_frames": [],
            "gap_min_frames": GAP_MIN_FRAMES,
        }
    dt_min = tb.interval_s / 60.0
    return {
        "frame_interval_s": tb.interval_s,
        "times_origin": "times_s",  # analyse_file names the file's source or 'csv'
        "n_recorded_frames": tb.n_recorded,
        "n_grid_frames": tb.n_grid,
        "dropped_frames": tb.dropped.tolist(),
        "gaps": [{"start_min": a * dt_min, "stop_min": b * dt_min, "n_frames": b - a} for a, b in tb.gaps],
        "excluded_frames": np.flatnonzero(tb.excluded).tolist(),
        "interpolated_frames": tb.interpolated.tolist(),
        "invalid_frames": np.flatnonzero(~tb.valid).tolist(),
        "gap_margin_frames": [],  # filled once the period is known (margin_record)
        "gap_min_frames": GAP_MIN_FRAMES,
    }


def margin_record(recording: dict, margin: np.ndarray, *, calibration: Calibration, notes: list) -> None:
    """Put the recorded frames left unmeasured next to gaps (band-pass
    settling) into the recording block, with a note."""
    idx = np.flatnonzero(margin)
    recording["gap_margin_frames"] = idx.tolist()
    if idx.size:
        notes.append(
            f"{idx.size} recorded frames next to gaps are not measured either: the band-pass filter needs "
            "about a period to settle after the interpolated stretch"
        )
