"""`inspect_stack`, `read_stack` and `iter_blocks`: frame selection, binning,
type conversion and the non-finite scan, on any source layout."""

from __future__ import annotations

import numbers
import os
import pathlib
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np

from waves.errors import CalibrationError, InputError, WavesError
from waves.io.common import (
    _BLOCK_BYTES,
    _FLOAT32_EXACT_INT,
    _TILE_PX,
    _WIDE_INTS,
    BT709_WEIGHTS,
    _check_index,
    _check_option,
    _damage_messages,
    _damaged,
    _Layout,
    _nonfinite_error,
    _nonfinite_frames,
    _open_tiff,
    _output_dtype,
    _resolve_source,
    _tifffile_log,
)
from waves.io.records import Stack, StackInfo
from waves.io.sequence import _read_sequence_frames, _sequence_layout
from waves.io.tiff import _file_frames, _file_layout, _memmap
from waves.io.timestamps import csv_times, irregular_note, nominal_step_s
from waves.preprocess import bin_frames
from waves.units import Calibration, resolve_calibration


def _layout(path: Any, channel: int | None, zslice: int | None) -> _Layout:
    channel = _check_index(channel, "channel")
    zslice = _check_index(zslice, "zslice")
    kind, src = _resolve_source(path)
    if kind == "file":
        assert isinstance(src, pathlib.Path)
        return _file_layout(src, channel, zslice)
    assert isinstance(src, list)
    return _sequence_layout(src, channel, zslice, os.fspath(path))


@contextmanager
def _frame_reader(layout: _Layout) -> Iterator[Any]:
    """Yield read(t_idx) -> (n, y, x[, s]) frames; a file stays open for the whole pass."""
    if layout.kind == "sequence":
        yield lambda t_idx: _read_sequence_frames(layout, t_idx)
        return
    with _tifffile_log() as log:
        tif = _open_tiff(pathlib.Path(layout.path), shaped=layout.extra.get("shaped", True))
        try:

            def read(t_idx: np.ndarray) -> np.ndarray:
                try:
                    arr = _file_frames(layout, tif, t_idx)
                except WavesError:
                    raise
                except Exception as exc:
                    raise _damaged(layout.path, f"{type(exc).__name__}: {exc}") from None
                damage = _damage_messages(log)
                if damage:
                    raise _damaged(layout.path, damage[0])
                return arr

            yield read
        finally:
            tif.close()


def _read_frames(layout: _Layout, t_idx: np.ndarray) -> np.ndarray:
    with _frame_reader(layout) as read:
        return read(t_idx)


def _luminance(rgb: np.ndarray) -> np.ndarray:
    """ITU-R BT.709 luma from the first three samples (alpha ignored), float64."""
    r, g, b = BT709_WEIGHTS
    x = rgb.astype(np.float64, copy=False)
    return r * x[..., 0] + g * x[..., 1] + b * x[..., 2]


def _frames_per_block(layout: _Layout) -> int:
    per_frame = layout.ny * layout.nx * max(1, layout.samples) * 8
    return max(1, _BLOCK_BYTES // max(1, per_frame))


def _frame_range(frames: Any, n: int, source: str) -> tuple[int, int, int]:
    if frames is None:
        return 0, n, 1
    if isinstance(frames, slice):
        start, stop, step = frames.start, frames.stop, frames.step
    elif isinstance(frames, (tuple, list)) and len(frames) in (2, 3):
        start, stop = frames[0], frames[1]
        step = frames[2] if len(frames) == 3 else 1
    else:
        raise InputError(
            f"frames must be a slice or (start, stop[, step]), got {frames!r}; "
            "e.g. frames=(0, 100) for the first 100 frames"
        )
    for name, v in (("start", start), ("stop", stop), ("step", step)):
        if v is not None and (isinstance(v, bool) or not isinstance(v, numbers.Integral)):
            raise InputError(f"frames {name} must be a whole number, got {v!r}")
    step = 1 if step is None else int(step)
    if step < 1:
        raise InputError(f"frames step must be >= 1, got {step}; reversed movies are not supported")
    start = 0 if start is None else int(start)
    stop = n if stop is None else int(stop)
    start = start + n if start < 0 else start
    stop = stop + n if stop < 0 else stop
    if not 0 <= start < n:
        raise InputError(
            f"frames start {start} is out of range: {source} has {n} frames (0..{n - 1})"
        )
    if not start < stop <= n:
        raise InputError(
            f"frames stop {stop} is out of range: {source} has {n} frames, so stop must be "
            f"in {start + 1}..{n} (stop is exclusive)"
        )
    return start, stop, step


def _scan_nonfinite(layout: _Layout, src: np.ndarray | None, t_idx: np.ndarray) -> list[int]:
    """Frame numbers (file indices) holding NaN/inf, checked block by block."""
    bad: list[int] = []
    per = _frames_per_block(layout)
    with _frame_reader(layout) as read:
        for k in range(0, len(t_idx), per):
            idx = t_idx[k : k + per]
            block = src[k : k + per] if src is not None else read(idx)
            bad.extend(int(idx[j]) for j in _nonfinite_frames(np.asarray(block)))
    return bad


def _times(
    layout: _Layout, frame_interval_s: float | None, times_csv: Any
) -> tuple[np.ndarray | None, str, float | None, list[str]]:
    """(times_s of the file or None, origin, frame interval option, notes)."""
    notes: list[str] = []
    if times_csv is not None:
        times = csv_times(times_csv, layout.n_frames)
        step = nominal_step_s(times)
        if frame_interval_s is None:
            frame_interval_s = step
        elif abs(frame_interval_s - step) > 0.05 * step:
            notes.append(
                f"the frame interval given ({frame_interval_s:g} s) differs from the median step "
                f"of the times file ({step:g} s) by more than 5 %; the times file is used for "
                "the time of each frame"
            )
        note = irregular_note(times, frame_interval_s, "csv")
        if note:
            notes.append(note)
        return times, "csv", frame_interval_s, notes
    if layout.times_s is not None and frame_interval_s is not None:
        notes.append(
            f"the file's per-frame times ({layout.times_origin}) are replaced by nominal times "
            f"(frame number x {frame_interval_s:g} s) because a frame interval was given; give "
            "true times with a times file (--times FILE.csv) instead"
        )
        return None, "nominal", frame_interval_s, notes
    notes.extend(layout.extra.get("times_notes", ()))
    return layout.times_s, layout.times_origin, frame_interval_s, notes


def _info_from_layout(
    layout: _Layout, pixel_size_um: float | None, frame_interval_s: float | None,
    times_csv: Any = None,
) -> tuple[StackInfo, CalibrationError | None]:
    problem_exc: CalibrationError | None = None
    cal: Calibration | None = None
    times, times_origin, frame_interval_s, tnotes = _times(layout, frame_interval_s, times_csv)
    problems = []
    if pixel_size_um is None and layout.px[1]:
        problems.append(layout.px[1])
    if frame_interval_s is None and layout.dt[1]:
        problems.append(layout.dt[1])
    try:
        if problems:
            raise CalibrationError(f"{layout.path}: " + "; ".join(problems))
        cal = resolve_calibration(
            file_pixel_size_um=layout.px[0],
            file_frame_interval_s=layout.dt[0],
            file_origin=layout.cal_origin,
            pixel_size_um=pixel_size_um,
            frame_interval_s=frame_interval_s,
            source=layout.path,
        )
    except CalibrationError as exc:
        problem_exc = exc
    t, ny, nx = layout.n_frames, layout.ny, layout.nx
    tile = min(_TILE_PX, ny) * min(_TILE_PX, nx)
    analysis = t * tile * (8 + 3 * 4) + ny * nx * 4 * 8
    out_dtype = _output_dtype(np.dtype(layout.dtype), layout.samples)
    if times is None and cal is not None:
        times = np.arange(t, dtype=np.float64) * cal.frame_interval_s
    info = StackInfo(
        path=layout.path,
        format=layout.format,
        axes=layout.axes,
        shape_tyx=(t, ny, nx),
        dtype=out_dtype,
        nbytes=int(layout.nbytes),
        compression=layout.compression,
        bigtiff=layout.bigtiff,
        memory_mapped=layout.memmap_offset is not None and out_dtype == layout.dtype,
        calibration=cal,
        calibration_problem=None if problem_exc is None else str(problem_exc),
        analysis_memory_bytes=int(analysis),
        warnings=layout.warnings + tuple(tnotes),
        times_origin=times_origin,
        times_s=times,
    )
    return info, problem_exc


def _single_image_error(layout: _Layout) -> InputError:
    return InputError(
        f"{layout.path} holds a single 2-D image ({layout.ny} x {layout.nx}), not a time series; "
        "waves needs a stack of frames over time (an ImageJ stack, an OME-TIFF with SizeT > 1, "
        "a multi-page TIFF, or a folder of frames)"
    )


def inspect_stack(
    path: Any,
    *,
    channel: int | None = None,
    zslice: int | None = None,
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
    times_csv: Any = None,
) -> StackInfo:
    """Describe a stack without loading it: shape, type, calibration, memory needs.

    times_csv: a CSV of per-frame times in seconds (see `waves.io.timestamps`),
    one per frame of the file; it replaces the file's times.
    Missing calibration is recorded in `calibration_problem`, never raised.
    Raises InputError for files that cannot be read as a time series (missing,
    not a TIFF, truncated, a single image, NaN/inf in float data) and
    CalibrationError for invalid option values.
    """
    pixel_size_um = _check_option(pixel_size_um, "pixel size (um)", "--pixel-size UM")
    frame_interval_s = _check_option(frame_interval_s, "frame interval (s)", "--frame-interval S")
    layout = _layout(path, channel, zslice)
    if layout.n_frames < 2:
        raise _single_image_error(layout)
    info, _ = _info_from_layout(layout, pixel_size_um, frame_interval_s, times_csv)
    if np.dtype(layout.dtype).kind == "f":
        t_idx = np.arange(layout.n_frames)
        src = _memmap(layout) if layout.memmap_offset is not None and layout.samples == 1 else None
        bad = _scan_nonfinite(layout, src, t_idx)
        if bad:
            raise _nonfinite_error(layout.path, bad, layout.n_frames)
    return info


def read_stack(
    path: Any,
    *,
    frames: Any = None,
    bin: int = 1,  # noqa: A002 - the name users know from ImageJ
    channel: int | None = None,
    zslice: int | None = None,
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
    min_frames: int = 2,
    times_csv: Any = None,
) -> Stack:
    """Read a calibrated (t, y, x) stack.

    frames: slice or (start, stop[, step]) of frame numbers (stop exclusive).
    bin: integer block-mean binning of y and x (float32 result; ragged edges
    are trimmed with a warning).  pixel_size_um / frame_interval_s override
    the file's calibration.  The data is memory-mapped when the file is
    uncompressed and contiguous and no binning or conversion is needed.
    times_csv: a CSV file of per-frame times in seconds, one per frame of the
    whole file (InputError on a wrong count, non-finite or non-increasing
    times); it replaces the file's own per-plane times.  The result's
    `times_s` holds the time of each selected frame from the file's first
    frame, `times_origin` where it came from (see `waves.io.timestamps`).
    """
    pixel_size_um = _check_option(pixel_size_um, "pixel size (um)", "--pixel-size UM")
    frame_interval_s = _check_option(frame_interval_s, "frame interval (s)", "--frame-interval S")
    if isinstance(min_frames, bool) or not isinstance(min_frames, numbers.Integral) or min_frames < 1:
        raise InputError(f"min_frames must be a whole number >= 1, got {min_frames!r}")
    if isinstance(bin, bool) or not isinstance(bin, numbers.Integral) or bin < 1:
        raise InputError(f"bin must be a whole number >= 1 (pixels per block side), got {bin!r}")
    factor = int(bin)
    layout = _layout(path, channel, zslice)
    if layout.n_frames == 1 and min_frames >= 2:
        raise _single_image_error(layout)
    info, problem = _info_from_layout(layout, pixel_size_um, frame_interval_s, times_csv)
    if problem is not None:
        raise problem
    assert info.calibration is not None
    start, stop, step = _frame_range(frames, layout.n_frames, layout.path)
    t_idx = np.arange(start, stop, step)
    if len(t_idx) < min_frames:
        raise InputError(
            f"{layout.path}: {len(t_idx)} frame{'s' if len(t_idx) != 1 else ''} selected but at "
            f"least {min_frames} are needed; select more frames (the file has {layout.n_frames})"
        )
    notes = list(info.warnings)
    if factor > min(layout.ny, layout.nx):
        raise InputError(
            f"bin={factor} is larger than the image ({layout.ny} x {layout.nx}); use a smaller bin"
        )
    ny_out, nx_out = layout.ny // factor, layout.nx // factor
    if factor > 1 and (layout.ny % factor or layout.nx % factor):
        notes.append(
            f"binning by {factor} trims {layout.ny % factor} row(s) at the bottom and "
            f"{layout.nx % factor} column(s) at the right"
        )
    stored = np.dtype(layout.dtype)
    out_dtype = np.dtype(np.float32) if factor > 1 else np.dtype(info.dtype)
    if out_dtype != stored and layout.samples == 1 and stored.name != "bool":
        notes.append(f"pixel data converted from {stored.name} to {out_dtype.name}")
    n = len(t_idx)
    if layout.memmap_offset is not None and factor == 1 and out_dtype == stored and layout.samples == 1:
        data = _memmap(layout)[start:stop:step]
        if stored.kind == "f":
            bad = _scan_nonfinite(layout, data, t_idx)
            if bad:
                raise _nonfinite_error(layout.path, bad, layout.n_frames)
    else:
        mm = _memmap(layout) if layout.memmap_offset is not None else None
        data = np.empty((n, ny_out, nx_out), dtype=out_dtype)
        per = _frames_per_block(layout)
        bad: list[int] = []
        with _frame_reader(layout) as read:
            for k in range(0, n, per):
                idx = t_idx[k : k + per]
                raw = np.asarray(mm[idx[0] : idx[-1] + 1 : step]) if mm is not None else read(idx)
                if layout.samples > 1:
                    block = _luminance(raw)
                else:
                    block = raw
                if block.dtype.kind == "f":
                    bad.extend(int(idx[j]) for j in _nonfinite_frames(block))
                    if bad:
                        continue
                if stored.name in _WIDE_INTS and block.size and np.max(np.abs(block.astype(np.float64))) > _FLOAT32_EXACT_INT:
                    raise InputError(
                        f"{layout.path} holds {stored.name} values beyond +-2**24 that float32 cannot "
                        "hold exactly; rescale the stack to 16-bit first (e.g. ImageJ Image > Type > 16-bit)"
                    )
                if factor > 1:
                    block = bin_frames(block, factor)
                data[k : k + len(idx)] = block
        if bad:
            raise _nonfinite_error(layout.path, bad, layout.n_frames)
    cal = info.calibration
    if step > 1:
        cal = cal.subsampled(step)
    if factor > 1:
        cal = cal.binned(factor)
    assert info.times_s is not None
    return Stack(data=data, calibration=cal, info=info, warnings=tuple(notes), first_frame=int(start),
                 frame_step=int(step), bin=factor, times_s=np.array(info.times_s[t_idx]),
                 times_origin=info.times_origin)


def iter_blocks(stack: Stack, *, frames_per_block: int) -> Iterator[tuple[int, np.ndarray]]:
    """Yield (t0, block) with block = float32 copy of frames t0 .. t0 + frames_per_block."""
    if (
        isinstance(frames_per_block, bool)
        or not isinstance(frames_per_block, numbers.Integral)
        or frames_per_block < 1
    ):
        raise InputError(f"frames_per_block must be a whole number >= 1, got {frames_per_block!r}")
    n = stack.n_frames
    for t0 in range(0, n, int(frames_per_block)):
        yield t0, np.array(stack.data[t0 : t0 + int(frames_per_block)], dtype=np.float32, copy=True)
