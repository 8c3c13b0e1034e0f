"""Reading and writing time-lapse stacks, maps and small output files.

This is the only module that touches tifffile.  Everything it returns is
arrays plus metadata: a `Stack` holds the (t, y, x) pixel data, the
`Calibration` (pixel size in um, frame interval in s, and where each came from)
and a `StackInfo` describing the file.

Readable inputs
---------------
* ImageJ TIFF, including hyperstacks with channels (C) or z-slices (Z): pick one
  with ``channel=`` / ``zslice=``; an unselected axis of size > 1 is refused.
  A stack whose only non-spatial axis is labelled Z (ImageJ's default for a
  plain stack) or C is read as a time series, with a warning.
* OME-TIFF, plain multi-page TIFF, BigTIFF, zlib/LZW (any imagecodecs codec)
  compressed TIFF.
* A folder of single-frame TIFFs, or a glob pattern, in natural sort order
  (``frame2`` before ``frame10``).

Data types: uint8, uint16 and float32 are returned as stored.  Other types are
converted to float32 by this rule: int8, int16 and float16 always (exact);
int32, uint32, int64, uint64 when every value has magnitude <= 2**24 (exact),
otherwise refused; float64 always (rounded to float32's 24-bit mantissa, about
7 significant digits).  bool is read as uint8.  RGB/RGBA pixels are converted
to luminance with the ITU-R BT.709 weights Y = 0.2126 R + 0.7152 G + 0.0722 B
applied to the stored values (alpha ignored), as float32.

Calibration comes from ImageJ tags (XResolution/YResolution in pixels per
`unit`, `finterval` in `tunit`, default seconds), from OME-XML
(PhysicalSizeX/Y with their units, TimeIncrement, or the median difference of
per-plane DeltaT), or from the ``pixel_size_um=`` / ``frame_interval_s=``
options, which win.  A value found nowhere raises `CalibrationError` from
`read_stack`; `inspect_stack` records the problem instead.

Writing: calibrated ImageJ TIFFs (axes TYX for stacks, YX for maps, unit um,
finterval in s) with a JSON dict in the ImageJ 'Info' property, always written
atomically (temporary file in the target folder, then ``os.replace``).
"""

from __future__ import annotations

import glob as _glob
import hashlib
import json
import logging
import math
import numbers
import os
import pathlib
import re
import struct
import tempfile
import warnings
import weakref
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import IO, Any

import numpy as np
import tifffile

from waves.errors import CalibrationError, InputError, WavesError
from waves.preprocess import bin_frames
from waves.units import Calibration, check_positive, length_to_um, resolve_calibration, time_to_s

__all__ = [
    "StackInfo",
    "Stack",
    "MapImage",
    "inspect_stack",
    "read_stack",
    "iter_blocks",
    "write_stack",
    "write_map",
    "read_map",
    "StackWriter",
    "read_metadata",
    "atomic_output",
    "write_json",
    "file_sha256",
    "BT709_WEIGHTS",
    "BIGTIFF_THRESHOLD_BYTES",
]

#: ITU-R BT.709 luma coefficients for R, G, B.
BT709_WEIGHTS = (0.2126, 0.7152, 0.0722)

#: Stacks larger than this (about 3.9 GB) are written as BigTIFF.
BIGTIFF_THRESHOLD_BYTES = 3_900_000_000

# one tile of the tiled analysis (see StackInfo.analysis_memory_bytes)
_TILE_PX = 64
# budget for one block of frames converted to float64 while reading
_BLOCK_BYTES = 16 * 2**20
# relative difference between y and x pixel sizes tolerated (with a warning)
_NONSQUARE_TOLERANCE = 0.01
# largest integer magnitude float32 holds exactly
_FLOAT32_EXACT_INT = 2**24

_NATIVE_DTYPES = ("uint8", "uint16", "float32")
_ALWAYS_EXACT_TO_F32 = ("int8", "int16", "float16")
_WIDE_INTS = ("int32", "uint32", "int64", "uint64")
_NO_UNIT = ("", "pixel", "pixels", "pixel(s)", "none")
_COMPRESSION_NAMES = {
    "NONE": "none",
    "ADOBE_DEFLATE": "zlib",
    "DEFLATE": "zlib",
    "LZW": "lzw",
    "PACKBITS": "packbits",
    "ZSTD": "zstd",
    "LZMA": "lzma",
    "JPEG": "jpeg",
    "WEBP": "webp",
}
_WRITE_COMPRESSIONS = ("zlib", "lzw", "zstd", "packbits")
# tifffile log messages that mean the file is damaged or cut short
_DAMAGE_HINTS = (
    "invalid page offset",
    "invalid value offset",
    "corrupted",
    "failed to reshape",
    "truncated",
    "failed to read",
)
_TIFF_SUFFIXES = (".tif", ".tiff")
_GLOB_CHARS = re.compile(r"[*?\[]")


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class StackInfo:
    """What a stack holds, read from its headers (and a scan of float data).

    `shape_tyx` is after channel/z selection, before frame selection and
    binning.  `calibration` is the file's calibration with the user's options
    applied (None when incomplete; `calibration_problem` then says why).
    `analysis_memory_bytes` estimates the working set of a tiled analysis in
    which the raw frames stay memory-mapped:
    ``T * min(64, Y) * min(64, X) * (8 + 3 * 4) + Y * X * 4 * 8`` bytes, i.e.
    one 64 x 64-pixel tile over all T frames as complex64 plus three float32
    arrays, plus eight float32 maps of one frame.
    """

    path: str
    format: str
    axes: str
    shape_tyx: tuple[int, int, int]
    dtype: str
    nbytes: int
    compression: str
    bigtiff: bool
    memory_mapped: bool
    calibration: Calibration | None
    calibration_problem: str | None
    analysis_memory_bytes: int
    warnings: tuple[str, ...]


@dataclass(frozen=True, eq=False)
class Stack:
    """Pixel data (t, y, x) with its calibration.

    `data` is a numpy.memmap for uncompressed contiguous files read without
    binning or conversion, otherwise an in-memory array; its dtype is the
    file's (uint8, uint16, float32) unless binned, RGB or converted (float32).
    `calibration` is after frame-step subsampling and binning; `info`
    describes the whole file.  `first_frame`, `frame_step` and `bin` say how
    the frames were selected and binned: frame i of `data` is file frame
    ``first_frame + i * frame_step``, at ``first_frame * dt`` plus its own
    time (dt the file's frame interval), and binned pixel (r, c) is centred
    on file pixel ``(r * bin + (bin - 1) / 2, c * bin + (bin - 1) / 2)``.
    """

    data: np.ndarray
    calibration: Calibration
    info: StackInfo
    warnings: tuple[str, ...]
    first_frame: int = 0
    frame_step: int = 1
    bin: int = 1  # noqa: A003 - the name users know from ImageJ

    @property
    def start_min(self) -> float:
        """File time of the first selected frame, in minutes."""
        return self.first_frame * self.calibration.frame_interval_min / self.frame_step

    @property
    def origin_um(self) -> float:
        """File position (um, x and y alike) of the centre of pixel (0, 0) of `data`."""
        return 0.5 * (self.bin - 1) * self.calibration.pixel_size_um / self.bin

    @property
    def n_frames(self) -> int:
        return int(self.data.shape[0])

    @property
    def shape_tyx(self) -> tuple[int, int, int]:
        t, y, x = self.data.shape
        return int(t), int(y), int(x)

    @property
    def duration_min(self) -> float:
        """Time covered by the frames: n_frames x frame interval, in minutes."""
        return self.n_frames * self.calibration.frame_interval_min

    @property
    def times_min(self) -> np.ndarray:
        """Time of each frame in minutes, frame 0 at 0 (float64)."""
        return np.arange(self.n_frames, dtype=np.float64) * self.calibration.frame_interval_min

    @property
    def extent_um(self) -> tuple[float, float]:
        """Field size (height_um, width_um) = (rows, cols) x pixel size."""
        _, ny, nx = self.shape_tyx
        px = self.calibration.pixel_size_um
        return ny * px, nx * px


@dataclass(frozen=True, eq=False)
class MapImage:
    """A 2-D map read back by `read_map`: data (y, x), pixel size in um (None
    when the file has none) and the JSON metadata dict."""

    data: np.ndarray
    pixel_size_um: float | None
    metadata: dict


# --------------------------------------------------------------------------- helpers


def _natural_key(text: str) -> tuple:
    parts = re.split(r"(\d+)", text)
    return tuple((0, int(p), p) if p.isdigit() else (1, 0, p.casefold()) for p in parts if p)


class _ListHandler(logging.Handler):
    def __init__(self, records: list[str]) -> None:
        super().__init__(level=logging.DEBUG)
        self.records = records

    def emit(self, record: logging.LogRecord) -> None:
        if record.levelno >= logging.WARNING:
            self.records.append(record.getMessage())


@contextmanager
def _tifffile_log() -> Iterator[list[str]]:
    """Collect tifffile's log warnings instead of letting them reach stderr."""
    logger = logging.getLogger("tifffile")
    records: list[str] = []
    handler = _ListHandler(records)
    old_propagate = logger.propagate
    logger.addHandler(handler)
    logger.propagate = False
    try:
        yield records
    finally:
        logger.removeHandler(handler)
        logger.propagate = old_propagate


def _damage_messages(records: list[str]) -> list[str]:
    return [r for r in records if any(h in r.lower() for h in _DAMAGE_HINTS)]


def _damaged(path: str, detail: str) -> InputError:
    return InputError(
        f"{path} is damaged or truncated ({detail}); the file was probably cut short "
        "while copying or saving: copy it again from the original, or re-save it from "
        "the acquisition software"
    )


def _open_tiff(path: pathlib.Path, *, shaped: bool = True) -> tifffile.TiffFile:
    try:
        return tifffile.TiffFile(path) if shaped else tifffile.TiffFile(path, is_shaped=False)
    except tifffile.TiffFileError as exc:
        raise InputError(
            f"{path} is not a TIFF file ({exc}); waves reads TIFF stacks: "
            "export the movie as TIFF (e.g. ImageJ File > Save As > Tiff...)"
        ) from None
    except OSError as exc:
        raise InputError(f"cannot open {path}: {exc}; check the path and permissions") from None
    except Exception as exc:  # anything tifffile trips over in a broken header
        raise _damaged(str(path), f"{type(exc).__name__}: {exc}") from None


def _is_pattern(text: str) -> bool:
    return bool(_GLOB_CHARS.search(text))


def _resolve_source(path: Any) -> tuple[str, pathlib.Path | list[pathlib.Path]]:
    """('file', Path) or ('sequence', [Path, ...] in natural order)."""
    if isinstance(path, (list, tuple)):
        raise InputError(
            "give one path: a TIFF file, a folder of TIFF frames, or a glob pattern "
            "such as 'movie/frame*.tif'"
        )
    try:
        text = os.fspath(path)
    except TypeError:
        raise InputError(f"path must be a string or os.PathLike, got {type(path).__name__}") from None
    if not text:
        raise InputError("empty path; give a TIFF file, a folder of TIFF frames or a glob pattern")
    p = pathlib.Path(text)
    if p.is_file():
        return "file", p
    if p.is_dir():
        files = [
            f for f in p.iterdir() if f.is_file() and f.suffix.lower() in _TIFF_SUFFIXES
            and not f.name.startswith(".")
        ]
        if not files:
            raise InputError(
                f"folder {p} holds no .tif/.tiff files; point to the folder that holds the "
                "frames, or give a glob pattern such as 'folder/*.tif'"
            )
        return "sequence", sorted(files, key=lambda f: _natural_key(f.name))
    if _is_pattern(text):
        matches = [pathlib.Path(m) for m in _glob.glob(text) if pathlib.Path(m).is_file()]
        if not matches:
            raise InputError(
                f"the pattern {text!r} matches no files; check the folder and the pattern "
                "(quote it in the shell so that waves, not the shell, expands it)"
            )
        return "sequence", sorted(matches, key=lambda f: _natural_key(str(f)))
    if p.exists():
        raise InputError(f"{p} is neither a file nor a folder")
    raise InputError(f"no such file or folder: {p}; check the path (and the current folder)")


def _check_option(value: float | None, name: str, flag: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool):
        raise CalibrationError(f"{name} must be a number, got {value!r}; give it with {flag}")
    return check_positive(name, value, flag)


def _check_index(value: int | None, name: str) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise InputError(f"{name} must be a whole number (0-based), got {value!r}")
    if value < 0:
        raise InputError(f"{name} must be >= 0 (indices are 0-based), got {value}")
    return int(value)


def _output_dtype(dtype: np.dtype, samples: int) -> str:
    name = np.dtype(dtype).name
    if samples > 1:
        return "float32"
    if name == "bool":
        return "uint8"
    if name in _NATIVE_DTYPES:
        return name
    if name in _ALWAYS_EXACT_TO_F32 or name in _WIDE_INTS or name == "float64":
        return "float32"
    raise InputError(
        f"pixel data type {name} is not supported; convert the stack to 8-bit, 16-bit "
        "or 32-bit float (e.g. ImageJ Image > Type)"
    )


def _compression_name(page: Any) -> str:
    comp = getattr(page, "compression", 1)
    name = getattr(comp, "name", str(comp))
    return _COMPRESSION_NAMES.get(name, name.lower())


def _pages_end(pages: Any) -> int:
    end = 0
    for p in pages:
        if p is None:
            continue
        for off, cnt in zip(p.dataoffsets, p.databytecounts, strict=True):
            end = max(end, int(off) + int(cnt))
    return end


def _last_ifd_end(tif: tifffile.TiffFile) -> int:
    """Byte just past the last image file directory (count, entries, next offset)."""
    fmt = tif.tiff
    offset = int(tif.pages[-1].offset)
    fh = tif.filehandle
    fh.seek(offset)
    raw = fh.read(fmt.tagnosize)
    if len(raw) < fmt.tagnosize:
        return offset + fmt.tagnosize + 1  # beyond the end: the count itself is cut
    (count,) = struct.unpack(fmt.tagnoformat, raw)
    return offset + fmt.tagnosize + int(count) * fmt.tagsize + fmt.offsetsize


def _pages_nbytes(pages: Any) -> int:
    return int(sum(sum(int(c) for c in p.databytecounts) for p in pages if p is not None))


# --------------------------------------------------------------------------- layout


@dataclass(frozen=True)
class _Layout:
    """How to fetch the selected (t, y, x[, s]) frames of a source."""

    path: str
    kind: str  # 'file' | 'sequence'
    format: str
    axes: str
    n_frames: int
    ny: int
    nx: int
    samples: int  # 1 grayscale, 3/4 RGB(A)
    dtype: str  # numpy dtype name as stored
    nbytes: int
    compression: str
    bigtiff: bool
    memmap_offset: int | None  # offset of contiguous native-order data, else None
    series_shape: tuple[int, ...] = ()
    time_axis: int | None = None
    fixed: tuple[tuple[int, int], ...] = ()  # (axis index, selected index)
    plane_axes: tuple[int, ...] = ()  # axes of series_shape that are planes (not Y, X, S)
    sample_axis: int | None = None
    files: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    px: tuple[float | None, str | None] = (None, None)  # (pixel size um, problem)
    dt: tuple[float | None, str | None] = (None, None)  # (frame interval s, problem)
    cal_origin: str | None = None
    extra: dict = field(default_factory=dict)


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


def _imagej_calibration(
    tif: tifffile.TiffFile, page: Any
) -> tuple[tuple[float | None, str | None], tuple[float | None, str | None], list[str]]:
    ij = tif.imagej_metadata or {}
    notes: list[str] = []
    px: tuple[float | None, str | None] = (None, None)
    unit = ij.get("unit")
    xres = page.tags.get("XResolution")
    yres = page.tags.get("YResolution")

    def per_unit(tag: Any) -> float | None:
        if tag is None:
            return None
        num, den = tag.value
        if num <= 0 or den <= 0:
            return None
        return float(num) / float(den)

    xppu, yppu = per_unit(xres), per_unit(yres)
    if unit is None or str(unit).strip().lower() in _NO_UNIT:
        if xppu is not None and xppu != 1.0:
            px = (None, "the file has resolution tags but no length unit (ImageJ unit "
                  f"{unit!r}), so its pixel size is unknown; set it in ImageJ "
                  "(Image > Properties) or give --pixel-size UM")
    elif xppu is None:
        px = (None, None)
    else:
        try:
            sx = length_to_um(1.0 / xppu, str(unit))
            sy = length_to_um(1.0 / yppu, str(unit)) if yppu is not None else sx
        except CalibrationError as exc:
            px = (None, str(exc))
        else:
            px = _square(sx, sy, notes)
    dt: tuple[float | None, str | None] = (None, None)
    finterval = ij.get("finterval")
    if finterval is not None:
        try:
            fi = float(finterval)
        except (TypeError, ValueError):
            fi = 0.0
        if fi > 0 and math.isfinite(fi):
            try:
                dt = (time_to_s(fi, str(ij.get("tunit") or "s")), None)
            except CalibrationError as exc:
                dt = (None, str(exc))
    return px, dt, notes


def _square(sx: float, sy: float, notes: list[str]) -> tuple[float | None, str | None]:
    rel = abs(sy - sx) / max(sx, sy)
    if rel > _NONSQUARE_TOLERANCE:
        return None, (
            f"pixels are not square (x {sx:g} um, y {sy:g} um, {100 * rel:.1f} % apart) but the "
            "analysis needs square pixels: resample the stack to square pixels (e.g. ImageJ "
            "Image > Scale), or pass --pixel-size UM to declare them square"
        )
    if rel > 1e-6:
        notes.append(
            f"pixel sizes differ slightly (x {sx:g} um, y {sy:g} um); using the x size"
        )
    return sx, None


def _ome_calibration(
    tif: tifffile.TiffFile, c_index: int, z_index: int
) -> tuple[tuple[float | None, str | None], tuple[float | None, str | None], list[str]]:
    notes: list[str] = []
    px: tuple[float | None, str | None] = (None, None)
    dt: tuple[float | None, str | None] = (None, None)
    try:
        root = ET.fromstring(tif.ome_metadata)
    except (ET.ParseError, TypeError) as exc:
        notes.append(f"OME-XML could not be parsed ({exc}); calibration ignored")
        return px, dt, notes
    pixels = next((el for el in root.iter() if el.tag.rsplit("}", 1)[-1] == "Pixels"), None)
    if pixels is None:
        return px, dt, notes
    a = pixels.attrib
    try:
        if "PhysicalSizeX" in a:
            sx = length_to_um(float(a["PhysicalSizeX"]), a.get("PhysicalSizeXUnit", "µm"))
            if "PhysicalSizeY" in a:
                sy = length_to_um(float(a["PhysicalSizeY"]), a.get("PhysicalSizeYUnit", "µm"))
            else:
                sy = sx
            px = _square(sx, sy, notes) if sx > 0 and sy > 0 else (None, None)
    except CalibrationError as exc:
        px = (None, str(exc))
    except ValueError:
        px = (None, None)
    try:
        if "TimeIncrement" in a and float(a["TimeIncrement"]) > 0:
            dt = (time_to_s(float(a["TimeIncrement"]), a.get("TimeIncrementUnit", "s")), None)
        else:
            times: dict[int, float] = {}
            for el in pixels:
                if el.tag.rsplit("}", 1)[-1] != "Plane" or "DeltaT" not in el.attrib:
                    continue
                pa = el.attrib
                if int(pa.get("TheC", 0)) != c_index or int(pa.get("TheZ", 0)) != z_index:
                    continue
                times[int(pa.get("TheT", 0))] = time_to_s(
                    float(pa["DeltaT"]), pa.get("DeltaTUnit", "s")
                )
            if len(times) >= 2:
                ordered = np.array([times[k] for k in sorted(times)], dtype=np.float64)
                step = float(np.median(np.diff(ordered)))
                if step > 0:
                    dt = (step, None)
                    spread = np.diff(ordered)
                    if np.max(np.abs(spread - step)) > 0.05 * step:
                        notes.append(
                            "plane times (DeltaT) are irregular; using the median interval "
                            f"{step:g} s"
                        )
    except CalibrationError as exc:
        dt = (None, str(exc))
    except ValueError:
        dt = (None, None)
    return px, dt, notes


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
            byteorder = tif.byteorder
            compression = _compression_name(page)
            native = "<" if np.little_endian else ">"
            memmap_ok = (
                dataoffset is not None
                and compression == "none"
                and (byteorder in (native, "=") or np.dtype(series.dtype).itemsize == 1)
            )
            one_page_per_plane = len(series.pages) == n_planes
            if not memmap_ok and not one_page_per_plane:
                notes.append("pages do not map one-to-one to planes; the whole series is read at once")
            if n_series > 1:
                notes.append(f"the file holds {n_series} image series; reading the first")
            notes.extend(f"tifffile: {r}" for r in log)
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
                extra={"one_page_per_plane": one_page_per_plane, "shaped": shaped},
            )
        finally:
            tif.close()


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


def _layout(path: Any, channel: int | None, zslice: int | None) -> _Layout:
    channel = _check_index(channel, "channel")
    zslice = _check_index(zslice, "zslice")
    kind, src = _resolve_source(path)
    if kind == "file":
        assert isinstance(src, pathlib.Path)
        return _file_layout(src, channel, zslice)
    assert isinstance(src, list)
    return _sequence_layout(src, channel, zslice, os.fspath(path))


# --------------------------------------------------------------------------- frames


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


def _nonfinite_frames(block: np.ndarray) -> np.ndarray:
    bad = ~np.isfinite(block)
    return np.flatnonzero(bad.reshape(bad.shape[0], -1).any(axis=1))


def _nonfinite_error(source: str, bad: list[int], n: int) -> InputError:
    shown = ", ".join(str(b) for b in bad[:5]) + (", ..." if len(bad) > 5 else "")
    return InputError(
        f"{source} holds NaN or infinite values in {len(bad)} of {n} frames (frames {shown}); "
        "replace them (e.g. ImageJ Process > Math > Remove NaNs) or leave those frames out "
        "with frames=(start, stop)"
    )


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


# --------------------------------------------------------------------------- public reading


def _info_from_layout(
    layout: _Layout, pixel_size_um: float | None, frame_interval_s: float | None
) -> tuple[StackInfo, CalibrationError | None]:
    problem_exc: CalibrationError | None = None
    cal: Calibration | None = None
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
        warnings=layout.warnings,
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
) -> StackInfo:
    """Describe a stack without loading it: shape, type, calibration, memory needs.

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
    info, _ = _info_from_layout(layout, pixel_size_um, frame_interval_s)
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
) -> Stack:
    """Read a calibrated (t, y, x) stack.

    frames: slice or (start, stop[, step]) of frame numbers (stop exclusive).
    bin: integer block-mean binning of y and x (float32 result; ragged edges
    are trimmed with a warning).  pixel_size_um / frame_interval_s override
    the file's calibration.  The data is memory-mapped when the file is
    uncompressed and contiguous and no binning or conversion is needed.
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
    info, problem = _info_from_layout(layout, pixel_size_um, frame_interval_s)
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
    return Stack(data=data, calibration=cal, info=info, warnings=tuple(notes), first_frame=int(start),
                 frame_step=int(step), bin=factor)


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


# --------------------------------------------------------------------------- atomic output


def _tempfile_for(path: pathlib.Path) -> pathlib.Path:
    parent = path.parent if str(path.parent) else pathlib.Path(".")
    if not parent.is_dir():
        raise InputError(f"cannot write {path}: folder {parent} does not exist; create it first")
    if path.is_dir():
        raise InputError(f"cannot write {path}: it is a folder; give a file name")
    fd, name = tempfile.mkstemp(dir=parent, prefix=f".{path.name}.", suffix=".part")
    os.close(fd)
    return pathlib.Path(name)


def _commit(tmp: pathlib.Path, path: pathlib.Path) -> None:
    try:
        mode = path.stat().st_mode & 0o777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        mode = 0o666 & ~umask
    os.chmod(tmp, mode)
    os.replace(tmp, path)


def _discard(tmp: pathlib.Path) -> None:
    try:
        tmp.unlink()
    except FileNotFoundError:
        pass


@contextmanager
def atomic_output(path: Any, mode: str = "wb") -> Iterator[IO]:
    """Open a temporary file beside `path`; on success it replaces `path`.

    mode is 'wb' (binary) or 'w' (UTF-8 text).  On any exception the
    temporary file is removed and an existing file at `path` is untouched.
    """
    if mode not in ("wb", "w"):
        raise WavesError(f"atomic_output mode must be 'wb' or 'w', got {mode!r}")
    target = pathlib.Path(os.fspath(path))
    tmp = _tempfile_for(target)
    try:
        with open(tmp, mode, **({"encoding": "utf-8"} if mode == "w" else {})) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        _commit(tmp, target)
    except BaseException:
        _discard(tmp)
        raise


def _jsonable(obj: Any, where: str = "value") -> Any:
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, numbers.Integral):
        return int(obj)
    if isinstance(obj, numbers.Real):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, dict):
        return {str(k): _jsonable(v, f"{where}[{k!r}]") for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v, where) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist(), where)
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    raise InputError(
        f"cannot store {where} of type {type(obj).__name__} as JSON; use numbers, strings, "
        "lists and dicts"
    )


def _json_text(obj: Any, *, indent: int | None) -> str:
    return json.dumps(_jsonable(obj), indent=indent, allow_nan=False, ensure_ascii=False)


def write_json(path: Any, obj: Any) -> pathlib.Path:
    """Write `obj` as JSON (indent 2, keys in insertion order) atomically.

    numpy scalars and arrays become numbers and lists; NaN and infinities
    become null (standard JSON has no NaN).
    """
    text = _json_text(obj, indent=2) + "\n"
    target = pathlib.Path(os.fspath(path))
    with atomic_output(target, "w") as fh:
        fh.write(text)
    return target


def file_sha256(path: Any) -> str:
    """SHA-256 hex digest of a file, streamed; for a folder or glob of frames,
    of the files' bytes concatenated in natural sort order."""
    kind, src = _resolve_source(path)
    files = [src] if kind == "file" else list(src)  # type: ignore[list-item]
    h = hashlib.sha256()
    for f in files:
        with open(f, "rb") as fh:
            for chunk in iter(lambda: fh.read(2**20), b""):
                h.update(chunk)
    return h.hexdigest()


# --------------------------------------------------------------------------- writing


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
            bigtiff = self._n_frames is not None and self._n_frames * self._frame_bytes > BIGTIFF_THRESHOLD_BYTES
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
        if not self._bigtiff and (self.frames_written + arr.shape[0]) * self._frame_bytes > BIGTIFF_THRESHOLD_BYTES:
            raise InputError(
                f"{self._path} would exceed {BIGTIFF_THRESHOLD_BYTES / 1e9:.1f} GB, the limit of a "
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

    bigtiff = n * ny * nx * dtype.itemsize > BIGTIFF_THRESHOLD_BYTES
    with atomic_output(target, "wb") as fh, _quiet_bigtiff_imagej():
        tifffile.imwrite(
            fh, frames(), shape=(n, ny, nx), dtype=dtype, imagej=True, bigtiff=bigtiff,
            resolution=(1.0 / calibration.pixel_size_um, 1.0 / calibration.pixel_size_um),
            metadata=md, compression=comp,
        )
    return target


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
