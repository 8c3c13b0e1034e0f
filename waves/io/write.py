"""Writing calibrated ImageJ TIFF stacks: `StackWriter` (frame by frame) and
`write_stack`."""

from __future__ import annotations

import numbers
import os
import pathlib
import sys
import warnings
import weakref
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np
import tifffile

from waves.errors import CalibrationError, InputError, WavesError
from waves.io.common import (
    _BLOCK_BYTES,
    _FLOAT32_EXACT_INT,
    _NATIVE_DTYPES,
    _WRITE_COMPRESSIONS,
    _nonfinite_frames,
)
from waves.io.files import _commit, _discard, _json_text, _tempfile_for, atomic_output
from waves.units import Calibration


def _bigtiff_threshold() -> int:
    """`waves.io.BIGTIFF_THRESHOLD_BYTES`, read from the package when a stack is
    written, so that the package's one setting is the one in force (the tests
    lower it)."""
    return sys.modules["waves.io"].BIGTIFF_THRESHOLD_BYTES


def _checked_cast(values: np.ndarray, dtype: np.dtype, *, allow_nonfinite: bool, what: str) -> np.ndarray:
    """Cast to dtype if no value changes (ints in range, floats integral/finite)."""
    src = values.dtype
    if src == dtype:
        if dtype.kind == "f" and not allow_nonfinite and not np.all(np.isfinite(values)):
            bad = _nonfinite_frames(values.reshape((-1,) + values.shape[-2:]))
            raise InputError(
                f"{what} hold NaN or infinite values in {len(bad)} frame(s); the simulation "
                "or processing went wrong before writing: fix it, or replace the values"
            )
        return values
    if src.kind not in "biuf":
        raise InputError(f"{what} have data type {src.name}; give real numbers")
    if dtype.kind == "f":
        out = values.astype(dtype)
        if src.kind in "iu" and src.itemsize >= 4 and values.size:
            if np.max(np.abs(values.astype(np.float64))) > _FLOAT32_EXACT_INT:
                raise InputError(f"{what} hold integers beyond +-2**24 that float32 cannot store exactly")
        if not allow_nonfinite and not np.all(np.isfinite(out)):
            raise InputError(
                f"{what} hold NaN or infinite values (or values too large for float32); "
                "fix them before writing"
            )
        return out
    info = np.iinfo(dtype)
    if values.size:
        if src.kind == "f":
            if not np.all(np.isfinite(values)):
                raise InputError(f"{what} hold NaN or infinite values and cannot be stored as {dtype.name}")
            if not np.array_equal(values, np.rint(values)):
                raise InputError(
                    f"{what} are fractional floats but the file stores {dtype.name}; round and clip "
                    f"them first, e.g. np.clip(np.rint(frame), {info.min}, {info.max}).astype(np.{dtype.name})"
                )
        lo, hi = values.min(), values.max()
        if lo < info.min or hi > info.max:
            raise InputError(
                f"{what} range {lo}..{hi} does not fit {dtype.name} ({info.min}..{info.max}); "
                "rescale or clip them first"
            )
    return values.astype(dtype)


def _stack_dtype(values: np.ndarray) -> np.dtype:
    name = values.dtype.name
    if name in _NATIVE_DTYPES:
        return np.dtype(name)
    if name == "bool":
        return np.dtype(np.uint8)
    if values.dtype.kind == "f":
        return np.dtype(np.float32)
    if values.dtype.kind in "iu":
        if values.size == 0 or (values.min() >= 0 and values.max() <= 65535):
            return np.dtype(np.uint16)
        return np.dtype(np.float32)
    raise InputError(f"cannot write data of type {name}; give uint8, uint16 or float32 arrays")


def _ij_metadata(calibration: Calibration | None, metadata: dict | None, axes: str) -> dict:
    md: dict[str, Any] = {"axes": axes, "unit": "um"}
    if calibration is not None:
        md["finterval"] = float(calibration.frame_interval_s)
    if metadata is not None:
        if not isinstance(metadata, dict):
            raise InputError(f"metadata must be a dict, got {type(metadata).__name__}")
        md["Info"] = _json_text(metadata, indent=None)
    return md


def _check_calibration(calibration: Any) -> Calibration:
    if not isinstance(calibration, Calibration):
        raise CalibrationError(
            f"calibration must be a waves.units.Calibration, got {type(calibration).__name__}"
        )
    return calibration


def _check_compression(compression: str | None) -> str | None:
    if compression is None or str(compression).lower() == "none":
        return None
    c = str(compression).lower()
    if c not in _WRITE_COMPRESSIONS:
        raise InputError(
            f"compression {compression!r} is not offered; use one of {', '.join(_WRITE_COMPRESSIONS)} or None"
        )
    return c


@contextmanager
def _quiet_bigtiff_imagej() -> Iterator[None]:
    # ImageJ itself cannot open BigTIFF (Fiji's Bio-Formats and tifffile can);
    # tifffile says so with a UserWarning that we document instead.
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*nonconformant BigTIFF ImageJ")
        yield


def _fix_imagej_description(tmp: pathlib.Path, n: int, ny: int, nx: int, dt_s: float) -> None:
    """Label the appended pages as frames (T), not channels, in the ImageJ header."""
    description = tifffile.imagej_description(
        (n, ny, nx), axes="TYX", unit="um", finterval=float(dt_s)
    )
    with tifffile.TiffFile(tmp, mode="r+b") as tif:
        tif.pages[0].tags["ImageDescription"].overwrite(description)


class StackWriter:
    """Stream frames into a calibrated ImageJ TIFF (axes TYX), never holding the movie.

    Frames go to a temporary file in the target folder; `close` renames it
    onto `path`, `abort` removes it.  Used as a context manager, an exception
    inside the block aborts.  dtype is uint8, uint16 or float32; frames of
    another type are cast only when no value changes (NaN/inf refused).
    BigTIFF is chosen automatically when n_frames is given and the stack
    exceeds BIGTIFF_THRESHOLD_BYTES (ImageJ proper cannot open BigTIFF; Fiji
    with Bio-Formats and tifffile can); without n_frames, pass bigtiff=True
    for very large movies.
    """

    def __init__(
        self,
        path: Any,
        *,
        calibration: Calibration,
        shape_yx: tuple[int, int],
        dtype: Any,
        metadata: dict | None = None,
        bigtiff: bool | None = None,
        n_frames: int | None = None,
    ) -> None:
        self._calibration = _check_calibration(calibration)
        try:
            ny, nx = (int(v) for v in shape_yx)
        except (TypeError, ValueError):
            raise InputError(f"shape_yx must be (rows, cols), got {shape_yx!r}") from None
        if ny < 1 or nx < 1:
            raise InputError(f"shape_yx must be positive, got {shape_yx!r}")
        self._shape_yx = (ny, nx)
        try:
            self._dtype = np.dtype(dtype)
        except TypeError:
            raise InputError(f"dtype must be uint8, uint16 or float32, got {dtype!r}") from None
        if self._dtype.name not in _NATIVE_DTYPES:
            raise InputError(
                f"dtype must be uint8, uint16 or float32 (the types ImageJ reads), got {self._dtype.name}"
            )
        if n_frames is not None and (
            isinstance(n_frames, bool) or not isinstance(n_frames, numbers.Integral) or n_frames < 1
        ):
            raise InputError(f"n_frames must be a whole number >= 1 or None, got {n_frames!r}")
        self._n_frames = None if n_frames is None else int(n_frames)
        self._frame_bytes = ny * nx * self._dtype.itemsize
        if bigtiff is None:
            bigtiff = self._n_frames is not None and self._n_frames * self._frame_bytes > _bigtiff_threshold()
        self._bigtiff = bool(bigtiff)
        self._md = _ij_metadata(self._calibration, metadata, "TYX")
        del self._md["axes"]  # tifffile labels the appended pages; fixed on close
        self._resolution = (1.0 / self._calibration.pixel_size_um, 1.0 / self._calibration.pixel_size_um)
        self._path = pathlib.Path(os.fspath(path))
        self._tmp = _tempfile_for(self._path)
        try:
            with _quiet_bigtiff_imagej():
                self._tw = tifffile.TiffWriter(self._tmp, imagej=True, bigtiff=self._bigtiff)
        except BaseException:
            _discard(self._tmp)
            raise
        self._finalizer = weakref.finalize(self, StackWriter._cleanup, self._tw, self._tmp)
        self.frames_written = 0
        self._done = False

    @staticmethod
    def _cleanup(tw: Any, tmp: pathlib.Path) -> None:
        try:
            tw.filehandle.close()
        except Exception:  # best effort while discarding
            pass
        _discard(tmp)

    @property
    def path(self) -> pathlib.Path:
        return self._path

    def write(self, frames: Any) -> None:
        """Append one frame (y, x) or several (n, y, x)."""
        if self._done:
            raise WavesError(f"the writer for {self._path} is already closed")
        arr = np.asarray(frames)
        if arr.ndim == 2:
            arr = arr[np.newaxis]
        if arr.ndim != 3 or arr.shape[1:] != self._shape_yx:
            raise InputError(
                f"frames must have shape {self._shape_yx} or (n, {self._shape_yx[0]}, "
                f"{self._shape_yx[1]}), got {arr.shape}"
            )
        if self._n_frames is not None and self.frames_written + arr.shape[0] > self._n_frames:
            raise InputError(
                f"the writer for {self._path} was opened for {self._n_frames} frames; "
                f"{self.frames_written + arr.shape[0]} would be too many"
            )
        if not self._bigtiff and (self.frames_written + arr.shape[0]) * self._frame_bytes > _bigtiff_threshold():
            raise InputError(
                f"{self._path} would exceed {_bigtiff_threshold() / 1e9:.1f} GB, the limit of a "
                "classic TIFF; open the writer with n_frames= (or bigtiff=True)"
            )
        cast = _checked_cast(arr, self._dtype, allow_nonfinite=False, what="frames")
        with _quiet_bigtiff_imagej():
            for frame in cast:
                self._tw.write(
                    np.ascontiguousarray(frame), contiguous=True, resolution=self._resolution,
                    metadata=self._md,
                )
        self.frames_written += int(arr.shape[0])

    def close(self) -> pathlib.Path:
        """Finish the file and move it onto the target path; return the path."""
        if self._done:
            return self._path
        if self.frames_written == 0 or (
            self._n_frames is not None and self.frames_written != self._n_frames
        ):
            expected = f" of the {self._n_frames} announced" if self._n_frames is not None else ""
            self.abort()
            raise InputError(
                f"{self.frames_written} frames{expected} were written to {self._path}; nothing was "
                "saved (write every frame before closing)"
            )
        try:
            with _quiet_bigtiff_imagej():
                self._tw.close()
            ny, nx = self._shape_yx
            _fix_imagej_description(self._tmp, self.frames_written, ny, nx, self._calibration.frame_interval_s)
            _commit(self._tmp, self._path)
        except BaseException:
            self.abort()
            raise
        self._done = True
        self._finalizer.detach()
        return self._path

    def abort(self) -> None:
        """Discard everything written; an existing file at the target is untouched."""
        if self._done:
            return
        self._done = True
        self._finalizer.detach()
        StackWriter._cleanup(self._tw, self._tmp)

    def __enter__(self) -> StackWriter:
        return self

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> bool:
        if exc_type is not None:
            self.abort()
            return False
        self.close()
        return False


def write_stack(
    path: Any,
    data: Any,
    *,
    calibration: Calibration,
    metadata: dict | None = None,
    compression: str | None = None,
) -> pathlib.Path:
    """Write a (t, y, x) stack as a calibrated ImageJ TIFF, atomically.

    uint8, uint16 and float32 are stored as given; bool as uint8; other
    integers as uint16 when they fit 0..65535, else float32; other floats as
    float32.  NaN/inf are refused.  `metadata` is stored as JSON in the ImageJ
    'Info' property (see `read_metadata`).  compression: None, 'zlib', 'lzw',
    'zstd' or 'packbits'.
    """
    _check_calibration(calibration)
    comp = _check_compression(compression)
    arr = np.asanyarray(data)
    if arr.ndim != 3 or min(arr.shape) < 1:
        raise InputError(
            f"a stack must be a non-empty (t, y, x) array, got shape {arr.shape}; "
            "use write_map for a single 2-D image"
        )
    dtype = _stack_dtype(arr)
    n, ny, nx = arr.shape
    per = max(1, _BLOCK_BYTES // max(1, ny * nx * 8))
    if comp is None:
        with StackWriter(
            path, calibration=calibration, shape_yx=(ny, nx), dtype=dtype,
            metadata=metadata, n_frames=n,
        ) as w:
            for t0 in range(0, n, per):
                w.write(np.asarray(arr[t0 : t0 + per]))
        return w.path
    target = pathlib.Path(os.fspath(path))
    md = _ij_metadata(calibration, metadata, "TYX")

    def frames() -> Iterator[np.ndarray]:
        for t0 in range(0, n, per):
            block = _checked_cast(np.asarray(arr[t0 : t0 + per]), dtype, allow_nonfinite=False, what="frames")
            yield from block

    bigtiff = n * ny * nx * dtype.itemsize > _bigtiff_threshold()
    with atomic_output(target, "wb") as fh, _quiet_bigtiff_imagej():
        tifffile.imwrite(
            fh, frames(), shape=(n, ny, nx), dtype=dtype, imagej=True, bigtiff=bigtiff,
            resolution=(1.0 / calibration.pixel_size_um, 1.0 / calibration.pixel_size_um),
            metadata=md, compression=comp,
        )
    return target


def write_ome_stack(
    path: Any,
    data: Any,
    *,
    calibration: Calibration,
    times_s: Any = None,
    time_increment: bool = True,
) -> pathlib.Path:
    """Write a (t, y, x) stack as an OME-TIFF (axes TYX), atomically, with
    PhysicalSizeX/Y and, when `times_s` is given, one Plane per frame whose
    DeltaT (s) is that frame's acquisition time (how microscopes record
    dropped frames and irregular intervals).  With `time_increment` the
    calibration's frame interval is written as TimeIncrement too.

    The path must end in .ome.tif or .ome.tiff; uint8, uint16 and float32
    are stored as given."""
    _check_calibration(calibration)
    target = pathlib.Path(os.fspath(path))
    if not target.name.lower().endswith((".ome.tif", ".ome.tiff")):
        raise InputError(f"an OME-TIFF path must end in .ome.tif or .ome.tiff, got {str(target)!r}")
    arr = np.asanyarray(data)
    if arr.ndim != 3 or min(arr.shape) < 1:
        raise InputError(f"a stack must be a non-empty (t, y, x) array, got shape {arr.shape}")
    if arr.dtype not in (np.uint8, np.uint16, np.float32):
        raise InputError(f"an OME stack is written as uint8, uint16 or float32, got {arr.dtype}")
    px = calibration.pixel_size_um
    md: dict = {
        "axes": "TYX",
        "PhysicalSizeX": px, "PhysicalSizeXUnit": "µm",
        "PhysicalSizeY": px, "PhysicalSizeYUnit": "µm",
    }
    if times_s is not None:
        t = np.asarray(times_s, dtype=np.float64)
        if t.shape != (arr.shape[0],) or not np.isfinite(t).all():
            raise InputError(f"times_s must hold one finite time per frame ({arr.shape[0]}), got shape {t.shape}")
        md["Plane"] = {"DeltaT": [float(v) for v in t], "DeltaTUnit": ["s"] * len(t)}
    if time_increment:
        md["TimeIncrement"] = calibration.frame_interval_s
        md["TimeIncrementUnit"] = "s"
    with atomic_output(target, "wb") as fh:
        tifffile.imwrite(fh, np.asarray(arr), ome=True, metadata=md, photometric="minisblack")
    return target
