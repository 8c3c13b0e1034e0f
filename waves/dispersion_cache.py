"""Cache of model predictions (dispersion curves, spiral predictions) as JSON files.

Key: SHA-256 of the model, every parameter, spacing, dt, D, the algorithm
version and the procedure's settings (`cache_key`).  Folder:
`default_cache_dir()`: $WAVES_CACHE_DIR, else $XDG_CACHE_HOME/waves, else
~/.cache/waves.  Files are written atomically; a damaged or foreign file
reads as a miss and is recomputed; a read-only cache only costs
recomputation.
"""

from __future__ import annotations

import hashlib
import json
import os
import pathlib

__all__ = ["default_cache_dir", "cache_key", "cache_read", "cache_write", "cache_path"]


def default_cache_dir() -> pathlib.Path:
    """$WAVES_CACHE_DIR, else $XDG_CACHE_HOME/waves, else ~/.cache/waves."""
    env = os.environ.get("WAVES_CACHE_DIR")
    if env:
        return pathlib.Path(env)
    xdg = os.environ.get("XDG_CACHE_HOME")
    base = pathlib.Path(xdg) if xdg else pathlib.Path.home() / ".cache"
    return base / "waves"


def cache_key(kind: str, num, settings: dict, *, algorithm_version: int) -> str:
    """SHA-256 (hex) of what determines a cached result (`num`: a waves.dispersion.Numerics)."""
    record = {
        "kind": kind,
        "algorithm_version": algorithm_version,
        "model": num.model,
        "params": {k: float(v) for k, v in sorted(num.params.items())},
        "spacing": repr(float(num.spacing)),
        "dt": repr(float(num.dt)),
        "diffusion": repr(float(num.diffusion)),
        "settings": settings,
    }
    text = json.dumps(record, sort_keys=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def cache_read(path: pathlib.Path, key: str) -> dict | None:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("key") != key:
        return None
    return data


def cache_write(path: pathlib.Path, data: dict) -> None:
    from waves import io as wio

    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        wio.write_json(path, data)
    except OSError:  # a read-only cache only costs recomputation
        pass


def cache_path(cache_dir, kind: str, model: str, key: str) -> pathlib.Path:
    base = default_cache_dir() if cache_dir is None else pathlib.Path(cache_dir)
    return base / f"{kind}-{model}-{key[:20]}.json"
