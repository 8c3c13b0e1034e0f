"""A folder or glob pattern of single-frame TIFFs read as one stack."""

from __future__ import annotations

import pathlib

import numpy as np

from waves.errors import InputError
from waves.io.calibration import _imagej_calibration
from waves.io.common import (
    _compression_name,
    _damage_messages,
    _damaged,
    _last_ifd_end,
    _Layout,
    _open_tiff,
    _pages_end,
    _pages_nbytes,
    _tifffile_log,
)


def _sequence_layout(files: list[pathlib.Path], channel: int | None, zslice: int | None, label: str) -> _Layout:
    if channel is not None or zslice is not None:
        raise InputError(
            "channel= and zslice= select planes of a hyperstack; a sequence of single-frame "
            "files has none: leave them out"
        )
    first_shape: tuple[int, ...] | None = None
    first_dtype = None
    nbytes = 0
    compression = "none"
    px: tuple[float | None, str | None] = (None, None)
    origin = None
    notes: list[str] = []
    for k, f in enumerate(files):
        size = f.stat().st_size
        with _tifffile_log() as log:
            tif = _open_tiff(f)
            try:
                try:
                    series = tif.series[0]
                    shape = tuple(int(n) for n in series.shape)
                    axes = series.axes
                    dtype = np.dtype(series.dtype)
                    pages = list(series.pages)
                except Exception as exc:
                    raise _damaged(str(f), f"{type(exc).__name__}: {exc}") from None
                damage = _damage_messages(log)
                if damage:
                    raise _damaged(str(f), damage[0])
                end = max(_pages_end(pages), _last_ifd_end(tif))
                if end > size:
                    raise _damaged(str(f), f"the file should have {end} bytes but has {size}")
                planes = [n for ax, n in zip(axes, shape, strict=True) if ax not in "YXS"]
                if int(np.prod(planes, dtype=np.int64)) != 1:
                    raise InputError(
                        f"{f} holds {int(np.prod(planes))} images, but a folder or pattern must "
                        "list single-frame files; give the multi-page file itself instead"
                    )
                if first_shape is None:
                    first_shape, first_dtype = shape, dtype
                    compression = _compression_name(pages[0])
                    if tif.is_imagej:
                        (px_val, px_prob), _, cnotes = _imagej_calibration(tif, pages[0])
                        px = (px_val, px_prob)
                        origin = "imagej"
                        notes.extend(cnotes)
                    s_axis = axes.index("S") if "S" in axes else None
                    samples = shape[s_axis] if s_axis is not None else 1
                    sq_axes = axes
                elif shape != first_shape or dtype != first_dtype:
                    raise InputError(
                        f"frames differ: {files[0].name} is {first_shape} {first_dtype} but "
                        f"{f.name} (file {k + 1} of {len(files)}) is {shape} {dtype}; all frames "
                        "of a sequence must have the same size and type (remove or fix that file)"
                    )
                nbytes += _pages_nbytes(pages)
            finally:
                tif.close()
    assert first_shape is not None and first_dtype is not None  # files is non-empty
    if samples not in (1, 3, 4):
        raise InputError(f"{files[0]} has {samples} samples per pixel; use grayscale or RGB frames")
    ny, nx = first_shape[sq_axes.index("Y")], first_shape[sq_axes.index("X")]
    return _Layout(
        path=label,
        kind="sequence",
        format="sequence",
        axes="TYX" + ("S" if samples > 1 else ""),
        n_frames=len(files),
        ny=ny,
        nx=nx,
        samples=samples,
        dtype=first_dtype.name,
        nbytes=nbytes,
        compression=compression,
        bigtiff=False,
        memmap_offset=None,
        files=tuple(str(f) for f in files),
        warnings=tuple(notes),
        px=px,
        dt=(None, None),
        cal_origin=origin,
        extra={"sample_last": sq_axes.index("S") == len(sq_axes) - 1 if samples > 1 else True},
    )


def _read_sequence_frames(layout: _Layout, t_idx: np.ndarray) -> np.ndarray:
    out = []
    for t in t_idx:
        f = layout.files[int(t)]
        with _tifffile_log() as log:
            tif = _open_tiff(pathlib.Path(f))
            try:
                try:
                    arr = tif.series[0].asarray()
                    axes = tif.series[0].axes
                except Exception as exc:
                    raise _damaged(f, f"{type(exc).__name__}: {exc}") from None
                damage = _damage_messages(log)
                if damage:
                    raise _damaged(f, damage[0])
            finally:
                tif.close()
        if "S" in axes and axes.index("S") != arr.ndim - 1:
            arr = np.moveaxis(arr, axes.index("S"), -1)
        out.append(arr.reshape((layout.ny, layout.nx) + ((layout.samples,) if layout.samples > 1 else ())))
    return np.stack(out)
