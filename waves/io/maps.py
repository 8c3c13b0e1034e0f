"""Calibrated 2-D maps: `write_map`, `read_map`, and `read_metadata` of any file
waves wrote."""

from __future__ import annotations

import json
import os
import pathlib
from typing import Any

import numpy as np
import tifffile

from waves.errors import InputError
from waves.io.common import _check_option, _open_tiff, _resolve_source, _tifffile_log
from waves.io.files import atomic_output
from waves.io.read import _read_frames
from waves.io.records import MapImage
from waves.io.tiff import _file_layout
from waves.io.write import _checked_cast, _ij_metadata, _stack_dtype


def write_map(path: Any, image: Any, *, pixel_size_um: float, metadata: dict | None = None) -> pathlib.Path:
    """Write a 2-D map (axes YX, unit um) as an ImageJ TIFF, atomically.

    Floats are stored as float32 (NaN allowed: it marks 'no value'); bool as
    uint8; uint8/uint16 as given; other integers (e.g. labels) as uint16 when
    they fit 0..65535, else float32 when exact (|v| <= 2**24), else refused.
    """
    px = _check_option(pixel_size_um, "pixel size (um)", "pixel_size_um=")
    arr = np.asarray(image)
    if arr.ndim != 2 or min(arr.shape) < 1:
        raise InputError(f"a map must be a non-empty 2-D (y, x) array, got shape {arr.shape}")
    if arr.dtype.kind == "f":
        out = _checked_cast(arr, np.dtype(np.float32), allow_nonfinite=True, what="map values")
    else:
        out = _checked_cast(arr, _stack_dtype(arr), allow_nonfinite=True, what="map values")
    md = _ij_metadata(None, metadata, "YX")
    target = pathlib.Path(os.fspath(path))
    with atomic_output(target, "wb") as fh:
        tifffile.imwrite(fh, out, imagej=True, resolution=(1.0 / px, 1.0 / px), metadata=md)
    return target


def _info_json(tif: tifffile.TiffFile) -> dict:
    ij = tif.imagej_metadata or {}
    text = ij.get("Info")
    if not isinstance(text, str):
        return {}
    try:
        value = json.loads(text)
    except ValueError:
        return {}
    return value if isinstance(value, dict) else {}


def read_metadata(path: Any) -> dict:
    """The JSON dict stored by write_stack / write_map / StackWriter ({} if none)."""
    kind, src = _resolve_source(path)
    if kind != "file":
        return {}
    assert isinstance(src, pathlib.Path)
    with _tifffile_log():
        tif = _open_tiff(src)
        try:
            return _info_json(tif)
        finally:
            tif.close()


def read_map(path: Any) -> MapImage:
    """Read a 2-D map written by `write_map` (or any single-image TIFF)."""
    kind, src = _resolve_source(path)
    if kind != "file":
        raise InputError(f"{path} is not a single file; give the map's TIFF file")
    assert isinstance(src, pathlib.Path)
    layout = _file_layout(src, None, None)
    if layout.n_frames != 1 or layout.samples != 1:
        raise InputError(f"{src} holds {layout.n_frames} images; a map is a single grayscale image")
    data = _read_frames(layout, np.array([0]))[0]
    with _tifffile_log():
        tif = _open_tiff(src)
        try:
            md = _info_json(tif)
        finally:
            tif.close()
    return MapImage(data=data, pixel_size_um=layout.px[0], metadata=md)
