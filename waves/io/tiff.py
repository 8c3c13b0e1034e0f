"""One TIFF file (ImageJ, OME, plain multi-page, BigTIFF, compressed): its axes,
layout and frames."""

from __future__ import annotations

import pathlib
from typing import Any

import numpy as np
import tifffile

from waves.errors import InputError
from waves.io.calibration import _imagej_calibration, _ome_calibration
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
from waves.io.timestamps import file_times, irregular_note, nominal_step_s


def _plan_axes(
    path: str, axes: str, shape: tuple[int, ...], channel: int | None, zslice: int | None
) -> tuple[int | None, list[tuple[int, int]], list[str]]:
    """Decide which axis is time and which index to take on every other plane axis."""
    notes: list[str] = []
    plane = [(i, ax, n) for i, (ax, n) in enumerate(zip(axes, shape, strict=True)) if ax not in "YXS"]
    big = [(i, ax, n) for i, ax, n in plane if n > 1]
    letters = [ax for _, ax, _ in big]
    described = ", ".join(f"{ax}={n}" for ax, n in zip(axes, shape, strict=True))
    time: int | None = None
    timelike = [b for b in big if b[1] not in "ZC"]
    if len(timelike) > 1:
        raise InputError(
            f"{path} has several time-like axes ({described}); waves needs one time axis: "
            "re-save the stack with only frames over time (e.g. ImageJ Image > Hyperstacks > "
            "Re-order Hyperstack)"
        )
    if timelike:
        time = timelike[0][0]
    elif letters == ["Z"] and zslice is None:
        time = big[0][0]
        notes.append(
            f"the file labels its {big[0][2]} images as z-slices, not frames; they are read as "
            "time frames (fix the labels with ImageJ Image > Properties if they are frames)"
        )
    elif letters == ["C"] and channel is None:
        time = big[0][0]
        notes.append(
            f"the file labels its {big[0][2]} images as channels, not frames; they are read as "
            "time frames (fix the labels with ImageJ Image > Properties if they are frames)"
        )
    fixed: list[tuple[int, int]] = []
    need: list[str] = []
    for letter, value, name, flag in (
        ("C", channel, "channel", "--channel"),
        ("Z", zslice, "zslice", "--zslice"),
    ):
        hits = [(i, n) for i, ax, n in plane if ax == letter and i != time]
        size = hits[0][1] if hits else 1
        if value is None:
            if size > 1:
                need.append(f"one {'z-slice' if letter == 'Z' else 'channel'} with {name}=0..{size - 1} ({flag} N)")
            elif hits:
                fixed.append((hits[0][0], 0))
            continue
        if value >= size:
            raise InputError(
                f"{name}={value} is out of range: {path} has {size} "
                f"{'z-slice' if letter == 'Z' else 'channel'}{'s' if size != 1 else ''} ({described}); "
                f"use {name}=0..{size - 1}" + (" or leave it out" if size == 1 else "")
            )
        if hits:
            fixed.append((hits[0][0], value))
    if need:
        raise InputError(
            f"{path} is a hyperstack with axes {axes} ({described}); choose " + " and ".join(need)
        )
    for i, ax, n in plane:
        if i != time and all(i != f for f, _ in fixed):
            if n > 1:
                raise InputError(
                    f"{path} has an axis {ax} of size {n} ({described}) that waves cannot "
                    "select; re-save the stack with only frames over time"
                )
            fixed.append((i, 0))
    return time, fixed, notes


def _file_layout(path: pathlib.Path, channel: int | None, zslice: int | None) -> _Layout:
    spath = str(path)
    size = path.stat().st_size
    with _tifffile_log() as log:
        tif = _open_tiff(path)
        shaped = True
        try:
            try:
                len(tif.pages)  # parses every page header: finds a cut-off chain
                if (
                    len(tif.series) > 1
                    and tif.series[0].kind == "shaped"
                    and len({(tuple(x.shape), x.dtype, len(x.pages)) for x in tif.series}) == 1
                    and len(tif.series[0].pages) == 1
                ):
                    # pages written one by one by tifffile: one series per page; read them as one
                    tif.close()
                    tif = _open_tiff(path, shaped=False)
                    shaped = False
                    len(tif.pages)
                n_series = len(tif.series)
                series = tif.series[0]
                page = series.pages[0] if len(series.pages) else tif.pages[0]
                axes = series.axes
                shape = tuple(int(n) for n in series.shape)
                kind = getattr(series, "kind", "") or ""
                dataoffset = series.dataoffset
                nbytes_series = int(series.nbytes)
            except Exception as exc:
                raise _damaged(spath, f"{type(exc).__name__}: {exc}") from None
            damage = _damage_messages(log)
            if damage:
                raise _damaged(spath, damage[0])
            if page is None:
                raise _damaged(spath, "first image missing")
            # every strip or tile the headers promise must lie inside the file
            if dataoffset is not None:
                end = int(dataoffset) + nbytes_series
                nbytes = nbytes_series
            else:
                end = _pages_end(series.pages)
                nbytes = _pages_nbytes(series.pages)
            if end > size:
                raise _damaged(spath, f"pixel data should end at byte {end} but the file has {size} bytes")
            ifd_end = _last_ifd_end(tif)
            if ifd_end > size:
                raise _damaged(spath, f"the last image header should end at byte {ifd_end} but the file has {size} bytes")
            n_planes = int(np.prod([n for ax, n in zip(axes, shape, strict=True) if ax not in "YXS"], dtype=np.int64))
            fmt = "ome" if kind == "ome" else "imagej" if kind == "imagej" else "tiff"
            if "Y" not in axes or "X" not in axes:
                raise InputError(f"{spath} has no image plane (axes {axes}); it is not an image stack")
            s_axis = axes.index("S") if "S" in axes else None
            samples = shape[s_axis] if s_axis is not None else 1
            if samples not in (1, 3, 4):
                raise InputError(
                    f"{spath} has {samples} samples per pixel; waves reads grayscale or RGB(A) "
                    "images: split or convert the channels first"
                )
            time, fixed, notes = _plan_axes(spath, axes, shape, channel, zslice)
            n_frames = shape[time] if time is not None else 1
            sel = dict(fixed)
            c_idx = next((sel[i] for i, ax in enumerate(axes) if ax == "C" and i in sel), 0)
            z_idx = next((sel[i] for i, ax in enumerate(axes) if ax == "Z" and i in sel), 0)
            if fmt == "imagej":
                px, dt, cnotes = _imagej_calibration(tif, page)
            elif fmt == "ome":
                px, dt, cnotes = _ome_calibration(tif, c_idx, z_idx)
            else:
                px, dt, cnotes = (None, None), (None, None), []
            notes.extend(cnotes)
            one_page_per_plane = len(series.pages) == n_planes
            page_keys = _plane_keys(axes, shape, time, fixed, n_frames) if one_page_per_plane else None
            times, times_origin, tnotes = file_times(
                tif, fmt, n_frames, c_index=c_idx, z_index=z_idx, page_keys=page_keys
            )
            notes.extend(tnotes)
            times_notes: list[str] = []  # reported only when these times are used
            if times is not None:
                if dt[0] is None and dt[1] is None:
                    dt = (nominal_step_s(times), None)
                if dt[0] is not None:
                    irregular = irregular_note(times, dt[0], times_origin)
                    if irregular:
                        times_notes.append(irregular)
            byteorder = tif.byteorder
            compression = _compression_name(page)
            native = "<" if np.little_endian else ">"
            memmap_ok = (
                dataoffset is not None
                and compression == "none"
                and (byteorder in (native, "=") or np.dtype(series.dtype).itemsize == 1)
            )
            if not memmap_ok and not one_page_per_plane:
                notes.append("pages do not map one-to-one to planes; the whole series is read at once")
            if n_series > 1:
                notes.append(f"the file holds {n_series} image series; reading the first")
            mm_log = [r for r in log if "micromanager" in r.lower()]
            notes.extend(f"tifffile: {r}" for r in log if r not in mm_log)
            if mm_log:
                notes.append(
                    "the file has Micro-Manager tags but no readable Micro-Manager header "
                    "(tifffile: " + mm_log[0] + "); the per-image metadata is still used"
                )
            return _Layout(
                path=spath,
                kind="file",
                format=fmt,
                axes=axes,
                n_frames=n_frames,
                ny=shape[axes.index("Y")],
                nx=shape[axes.index("X")],
                samples=samples,
                dtype=np.dtype(series.dtype).name,
                nbytes=nbytes,
                compression=compression,
                bigtiff=bool(tif.is_bigtiff),
                memmap_offset=int(dataoffset) if memmap_ok else None,
                series_shape=shape,
                time_axis=time,
                fixed=tuple(fixed),
                plane_axes=tuple(i for i, ax in enumerate(axes) if ax not in "YXS"),
                sample_axis=s_axis,
                warnings=tuple(notes),
                px=px,
                dt=dt,
                cal_origin=fmt if fmt in ("imagej", "ome") else None,
                extra={"one_page_per_plane": one_page_per_plane, "shaped": shaped,
                       "times_notes": tuple(times_notes)},
                times_s=times,
                times_origin=times_origin,
            )
        finally:
            tif.close()


def _plane_keys(
    axes: str, shape: tuple[int, ...], time: int | None, fixed: list[tuple[int, int]], n_frames: int
) -> list[int]:
    """Page index of every frame at the selected channel and z-slice (one page per
    plane, pages in the file's plane order as in `_file_frames`)."""
    plane_axes = [i for i, ax in enumerate(axes) if ax not in "YXS"]
    plane_shape = [shape[i] for i in plane_axes]
    sel = dict(fixed)
    keys = []
    for t in range(n_frames):
        multi = [t if i == time else sel.get(i, 0) for i in plane_axes]
        keys.append(int(np.ravel_multi_index(multi, plane_shape)) if multi else 0)
    return keys


def _memmap(layout: _Layout) -> np.memmap:
    """Memory map of the whole series, then the (t, y, x[, s]) selection as a view."""
    assert layout.memmap_offset is not None
    mm = np.memmap(
        layout.path, dtype=np.dtype(layout.dtype), mode="r",
        offset=layout.memmap_offset, shape=layout.series_shape,
    )
    index: list[Any] = [slice(None)] * len(layout.series_shape)
    for axis, k in layout.fixed:
        index[axis] = k
    view = mm[tuple(index)]
    # remaining axes keep the file's order: time (if any), Y, X, S in some order
    rest = [ax for i, ax in enumerate(layout.axes) if i == layout.time_axis or ax in "YXS"]
    if "S" in rest and rest.index("S") != len(rest) - 1:
        view = np.moveaxis(view, rest.index("S"), -1)
    return view if layout.time_axis is not None else view[np.newaxis]


def _file_frames(layout: _Layout, tif: tifffile.TiffFile, t_idx: np.ndarray) -> np.ndarray:
    """Frames t_idx as (n, y, x[, s]) in the stored dtype (native byte order)."""
    shape = layout.series_shape
    plane_shape = [shape[i] for i in layout.plane_axes]
    if layout.extra.get("one_page_per_plane", True):
        sel = dict(layout.fixed)
        keys = []
        for t in t_idx:
            multi = [int(t) if i == layout.time_axis else sel.get(i, 0) for i in layout.plane_axes]
            keys.append(int(np.ravel_multi_index(multi, plane_shape)) if multi else 0)
        arr = tif.asarray(key=keys, series=0, squeeze=False)
        page = tif.series[0].pages[0]
        arr = arr.reshape((len(keys),) + tuple(page.shape))
        page_axes = page.axes
        if "S" in page_axes and page_axes.index("S") != len(page_axes) - 1:
            arr = np.moveaxis(arr, 1 + page_axes.index("S"), -1)
    else:
        whole = tif.series[0].asarray()
        index: list[Any] = [slice(None)] * len(shape)
        for axis, k in layout.fixed:
            index[axis] = k
        if layout.time_axis is not None:
            index[layout.time_axis] = np.asarray(t_idx)
        arr = whole[tuple(index)]
        if layout.time_axis is None:
            arr = arr[np.newaxis]
        if layout.sample_axis is not None:
            rest = [ax for i, ax in enumerate(layout.axes) if i == layout.time_axis or ax in "YXS"]
            if rest.index("S") != len(rest) - 1:
                arr = np.moveaxis(arr, rest.index("S"), -1)
    if layout.samples == 1 and arr.ndim == 4:
        arr = arr[..., 0]
    return np.ascontiguousarray(arr)
