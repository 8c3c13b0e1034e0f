"""Atomic output (temporary file, then `os.replace`), JSON and file digests."""

from __future__ import annotations

import hashlib
import json
import math
import numbers
import os
import pathlib
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from typing import IO, Any

import numpy as np

from waves.errors import InputError, WavesError
from waves.io.common import _resolve_source


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
