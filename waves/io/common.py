"""Shared pieces of the readers and writers: limits and type rules, tifffile's
log and damage messages, opening a TIFF, resolving a path to a file or a
sequence, option checks, page sizes and the `_Layout` of a source."""

from __future__ import annotations

import glob as _glob
import logging
import numbers
import os
import pathlib
import re
import struct
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import tifffile

from waves.errors import CalibrationError, InputError
from waves.units import check_positive

#: ITU-R BT.709 luma coefficients for R, G, B.
BT709_WEIGHTS = (0.2126, 0.7152, 0.0722)
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
    # a Micro-Manager header tifffile cannot parse is metadata only (per-page
    # Micro-Manager tags without the file header): not damage of the images
    return [
        r for r in records
        if any(h in r.lower() for h in _DAMAGE_HINTS) and "micromanager" not in r.lower()
    ]


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
    # per-frame times of the file (s, frame 0 at 0) when it records them
    times_s: np.ndarray | None = field(default=None, compare=False)
    times_origin: str = "nominal"


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
