"""Phase and processed signal of a few frames, recomputed for pictures.

A results folder holds maps and tables, not the phase movie.  The phase
snapshot, the kymograph and the movie need it, so this module recomputes
what they need from the original stack and the summary, the same way the
analysis does (DESIGN.md, waves/analyse/clean.py): the stack is binned to the
analysis grid (`summary['analysis']['grid']['bin']`), divided by the
illumination gain of the mean image (when the analysis flattened), smoothed
in space by the analysis's sigma, and turned into an analytic signal with the
analysis's band-pass (`summary['analysis']['passband_period_min']`: a period
band in minutes, i.e. frame_interval_min / period cycles per frame); frames
within `trimmed_frames_each_end` of either end are dropped (filter edges).
The phase is always the analytic-signal phase, and drift correction is not
repeated (a note says so when the analysis used it).

Work is done in row strips over all frames (the analytic signal needs each
pixel's whole time series), each with a halo of rows for the smoothing, so
memory is bounded by `memory_mb`; only the chosen frames and the kymograph
line are kept.
"""

from __future__ import annotations

import math
import pathlib
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from waves.errors import InputError
from waves.report.figures import MapGrid

__all__ = ["PhaseFrames", "recompute_phase", "default_line_um", "line_pixels"]


@dataclass(frozen=True, eq=False)
class PhaseFrames:
    """Phase and band-passed signal of chosen frames, and a kymograph.

    frames          (n,) int64 frame numbers in the analysed stack.
    t_min           (n,) float64 their times, minutes (frame 0 at 0).
    phase           (n, y, x) float32 radians in (-pi, pi], on `grid`.
    signal          (n, y, x) float32 band-passed signal (camera units / gain).
    grid            the analysis grid (pixel size and origin, um).
    line_um         (x0, y0, x1, y1) of the kymograph line, um.
    kymograph       (m, k) float32 band-passed signal along the line, for
                    every kept (untrimmed) frame; rows are times.
    kymograph_t_min (m,) float64 times of its rows, minutes.
    distance_um     (k,) float64 distance of its columns along the line, um.
    notes           what differs from the analysis, for the report.
    """

    frames: np.ndarray
    t_min: np.ndarray
    phase: np.ndarray
    signal: np.ndarray
    grid: MapGrid
    line_um: tuple[float, float, float, float]
    kymograph: np.ndarray
    kymograph_t_min: np.ndarray
    distance_um: np.ndarray
    notes: tuple[str, ...]


def default_line_um(summary: Mapping, shape_yx) -> tuple[float, float, float, float]:
    """A horizontal line across the whole analysis grid through the main
    centre: the first of summary['centres'], else the first persistent spiral
    core, else the middle of the field.  (x0, y0, x1, y1) in um."""
    grid = MapGrid.from_summary(summary)
    ny, nx = int(shape_yx[0]), int(shape_yx[1])
    anchor = None
    for key in ("centres", "spiral_cores"):
        items = summary.get(key) or []
        if items:
            anchor = items[0]
            break
    if anchor is not None:
        y = float(anchor["y_um"])
    else:
        y = grid.origin_y_um + 0.5 * (ny - 1) * grid.pixel_size_um
    x0 = grid.origin_x_um
    x1 = grid.origin_x_um + (nx - 1) * grid.pixel_size_um
    return x0, y, x1, y


def line_pixels(line_um, grid: MapGrid, shape_yx) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Nearest grid pixels (rows, cols) along a line, one per grid pixel of
    length, and their distance from the line's start (um).  Points outside
    the grid are dropped; a line that misses the grid is refused."""
    x0, y0, x1, y1 = (float(v) for v in line_um)
    ny, nx = int(shape_yx[0]), int(shape_yx[1])
    px = grid.pixel_size_um
    length = math.hypot(x1 - x0, y1 - y0)
    n = max(2, int(math.ceil(length / px)) + 1)
    s = np.linspace(0.0, 1.0, n)
    cols = np.rint((x0 + s * (x1 - x0) - grid.origin_x_um) / px).astype(np.int64)
    rows = np.rint((y0 + s * (y1 - y0) - grid.origin_y_um) / px).astype(np.int64)
    inside = (rows >= 0) & (rows < ny) & (cols >= 0) & (cols < nx)
    if inside.sum() < 2:
        raise InputError(
            f"the kymograph line from ({x0:g}, {y0:g}) um to ({x1:g}, {y1:g}) um misses the field; "
            f"give a line inside 0..{nx * px:g} um (x) and 0..{ny * px:g} um (y)"
        )
    return rows[inside], cols[inside], s[inside] * length


def _read_plan(stack_path, summary: Mapping):
    """Open the stack as the analysis read it, with the summary's calibration
    (which already includes any binning on read).  How it was read (frames,
    bin, channel, zslice) comes from summary['analysis']['read'] when the
    analysis recorded it; otherwise a binning on read is inferred from the
    shapes, and a different frame count is refused."""
    from waves import io

    src = summary.get("source") or {}
    cal = summary["calibration"]
    want = src.get("shape_tyx")
    read = (summary.get("analysis") or {}).get("read") or {}
    channel, zslice = read.get("channel"), read.get("zslice")
    info = io.inspect_stack(stack_path, channel=channel, zslice=zslice, pixel_size_um=cal["pixel_size_um"],
                            frame_interval_s=cal["frame_interval_s"])
    bin_read = int(read.get("bin", 1))
    if "bin" not in read and want and info.shape_tyx[1] != want[1]:
        ratio = info.shape_tyx[1] // int(want[1])
        if ratio >= 1 and info.shape_tyx[2] // ratio == int(want[2]) and info.shape_tyx[1] // ratio == int(want[1]):
            bin_read = ratio
    frames = read.get("frames")
    frames = slice(*frames) if frames else None
    stack = io.read_stack(
        stack_path, frames=frames, bin=bin_read, channel=channel, zslice=zslice,
        pixel_size_um=float(cal["pixel_size_um"]) / bin_read, frame_interval_s=float(cal["frame_interval_s"]),
    )
    if want and list(stack.shape_tyx) != [int(v) for v in want]:
        raise InputError(
            f"{stack_path} holds {tuple(stack.shape_tyx)} frames x rows x columns after binning by "
            f"{bin_read}, but the analysis was of {tuple(want)}; give the stack (and frame range) "
            "that was analysed"
        )
    return stack


def recompute_phase(
    stack_path,
    summary: Mapping,
    *,
    mean_image=None,
    frames=None,
    max_frames: int = 120,
    line_um=None,
    memory_mb: float = 200.0,
    check_hash: bool = True,
    progress: bool = False,
) -> PhaseFrames:
    """Phase and band-passed signal of up to `max_frames` frames of the
    analysed stack, and a kymograph along `line_um` ((x0, y0, x1, y1) um;
    default `default_line_um`), recomputed as the analysis computed them.

    summary     the analysis summary (summary.json as a dict); needs
                'calibration', 'analysis' (grid, passband_period_min,
                trimmed_frames_each_end, smoothing_sigma_um) and 'source'.
    mean_image  the analysis grid's mean image (mean_image.tif), for the
                illumination gain; None skips the flattening (the phase hardly
                changes: a gain constant in time only rescales a pixel).
    frames      frame numbers of the stack to keep (default: evenly spaced over
                the frames the analysis kept, at most `max_frames`).
    check_hash  refuse a stack whose sha256 differs from summary['source'].
    """
    from tqdm.auto import tqdm

    from waves import io, preprocess
    from waves.phase.analytic import analytic_signal
    from waves.preprocess.timebase import grid_from_record, resample

    an = summary.get("analysis") or {}
    if "passband_period_min" not in an or "grid" not in an:
        raise InputError(
            "the summary holds no passband or analysis grid (the analysis found no waves, or the folder is "
            "older than this version): there is no phase to show"
        )
    path = pathlib.Path(stack_path)
    if not path.exists() and not any(ch in str(stack_path) for ch in "*?["):
        raise InputError(f"the analysed stack {stack_path} is not there; pass its path (stack_path=...)")
    want_hash = (summary.get("source") or {}).get("sha256")
    if check_hash and want_hash and io.file_sha256(stack_path) != want_hash:
        raise InputError(
            f"{stack_path} is not the stack that was analysed (its sha256 differs from summary.json's); "
            "pass the analysed stack"
        )
    stack = _read_plan(stack_path, summary)
    data = stack.data
    nt, ny_r, nx_r = stack.shape_tyx
    # the analysis's uniform time grid (dropped frames interpolated), when it had one
    timebase = grid_from_record(summary.get("recording") or {})
    if timebase is not None:
        if timebase.n_recorded != nt:
            raise InputError(f"the stack holds {nt} frames, the analysis's time grid {timebase.n_recorded}")
        nt = timebase.n_grid
    grid_d = an["grid"]
    f = int(grid_d.get("bin", 1))
    grid = MapGrid.from_summary(summary)
    nyb, nxb = ny_r // f, nx_r // f
    dt_min = stack.calibration.frame_interval_min
    lo_min, hi_min = (float(v) for v in an["passband_period_min"])
    passband = (dt_min / hi_min, dt_min / lo_min)
    trim = int(an.get("trimmed_frames_each_end", 0))
    kept = np.arange(trim, nt - trim)
    if kept.size < 2:
        raise InputError(f"the stack has {nt} frames, too few once {trim} are trimmed at each end")
    if frames is None:
        n_show = min(kept.size, max(1, int(max_frames)))
        chosen = kept[np.unique(np.rint(np.linspace(0, kept.size - 1, n_show)).astype(np.int64))]
    else:
        chosen = np.unique(np.asarray(frames, dtype=np.int64))
        if chosen.size == 0 or chosen.min() < trim or chosen.max() >= nt - trim:
            raise InputError(
                f"frames to show must lie in {trim}..{nt - trim - 1} (the frames the analysis kept), "
                f"got {frames!r}"
            )
    sigma_px = float(an.get("smoothing_sigma_um", 0.0) or 0.0) / grid.pixel_size_um
    halo = preprocess.halo_px(sigma_px) if sigma_px > 0.3 else 0
    notes = []
    gain = None
    flatten = bool((an.get("options") or {}).get("flatten", True))
    if flatten and mean_image is not None:
        mean_b = np.asarray(mean_image, dtype=np.float32)
        if mean_b.shape != (nyb, nxb):
            raise InputError(f"mean image {mean_b.shape} is not on the analysis grid {(nyb, nxb)}")
        if float(np.nanmax(mean_b)) > 0:
            dish = preprocess.dish_mask(mean_b)
            gain = preprocess.illumination_gain(mean_b, sigma_px=max(mean_b.shape) / 8.0, mask=dish)
            gain = np.maximum(gain, 1e-3 * float(gain.max())).astype(np.float32)
    elif flatten:
        notes.append("illumination not flattened (no mean image given)")
    if (an.get("options") or {}).get("register") is True or (summary.get("drift") or {}).get("corrected"):
        notes.append("drift correction of the analysis is not repeated in these pictures")
    if an.get("phase_method", "hilbert") != "hilbert":
        notes.append("pictures show the analytic-signal phase; the analysis used delay embedding")

    line = tuple(float(v) for v in (line_um if line_um is not None else default_line_um(summary, (nyb, nxb))))
    if len(line) != 4:
        raise InputError(f"a kymograph line is (x0, y0, x1, y1) in um, got {line_um!r}")
    lr, lc, dist = line_pixels(line, grid, (nyb, nxb))

    rows_per = int(memory_mb * 1e6 // (nt * nxb * 24.0)) - 2 * halo
    rows_per = max(1, min(nyb, rows_per))
    phase = np.empty((chosen.size, nyb, nxb), dtype=np.float32)
    signal = np.empty((chosen.size, nyb, nxb), dtype=np.float32)
    kymo = np.empty((kept.size, lr.size), dtype=np.float32)
    starts = list(range(0, nyb, rows_per))
    bar = tqdm(total=len(starts), desc="phase for pictures", unit="strip", disable=not progress, leave=False)
    for r0 in starts:
        r1 = min(nyb, r0 + rows_per)
        a0, a1 = max(0, r0 - halo), min(nyb, r1 + halo)
        raw = np.asarray(data[:, a0 * f : a1 * f, : nxb * f])
        b = preprocess.bin_frames(raw, f) if f > 1 else raw.astype(np.float32)
        del raw
        if timebase is not None:
            b = resample(b, timebase)
        if gain is not None:
            b /= gain[a0:a1]
        b -= b.mean(axis=0, keepdims=True)
        if sigma_px > 0.3:
            b = preprocess.smooth_space(b, sigma_px=sigma_px)
        z = analytic_signal(b[:, r0 - a0 : r1 - a0], passband=passband)
        del b
        phase[:, r0:r1] = np.angle(z[chosen]).astype(np.float32)
        signal[:, r0:r1] = z.real[chosen]
        on = (lr >= r0) & (lr < r1)
        if on.any():
            kymo[:, on] = z.real[kept][:, lr[on] - r0, lc[on]]
        del z
        bar.update(1)
    bar.close()
    return PhaseFrames(
        frames=chosen.astype(np.int64),
        t_min=chosen * dt_min,
        phase=phase,
        signal=signal,
        grid=grid,
        line_um=line,
        kymograph=kymo,
        kymograph_t_min=kept * dt_min,
        distance_um=dist,
        notes=tuple(notes),
    )
