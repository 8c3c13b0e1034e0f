"""Shared test fixtures: a seeded RNG and a factory of small TIFF files.

Files are written with tifffile directly (the reference writer), never with
waves.io, so that reading tests check our code against an independent writer.
"""

from __future__ import annotations

import os

os.environ.setdefault("MPLBACKEND", "Agg")

import pathlib  # noqa: E402
from collections.abc import Callable  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator: every test that draws numbers is reproducible."""
    return np.random.default_rng(20261202)


@pytest.fixture
def tiff_factory(tmp_path: pathlib.Path) -> Callable[..., pathlib.Path]:
    """make(name, data, **tifffile_imwrite_kwargs) -> path of the written file."""
    import tifffile

    def make(name: str, data: Any, **kwargs: Any) -> pathlib.Path:
        # say grayscale explicitly unless told otherwise: tifffile guesses RGB for
        # shapes like (t, y, 3) or (3, y, x) and warns that the guess will change
        if not kwargs.get("imagej") and not kwargs.get("ome"):
            kwargs.setdefault("photometric", "minisblack")
        path = tmp_path / name
        path.parent.mkdir(parents=True, exist_ok=True)
        tifffile.imwrite(path, np.asarray(data), **kwargs)
        return path

    return make


@pytest.fixture
def imagej_stack(tiff_factory: Callable[..., pathlib.Path]) -> Callable[..., pathlib.Path]:
    """make(name, data, pixel_size_um=None, frame_interval_s=None, axes='TYX') ->
    an ImageJ TIFF written by tifffile, calibrated in um and s when given."""

    def make(
        name: str,
        data: Any,
        *,
        pixel_size_um: float | None = None,
        frame_interval_s: float | None = None,
        axes: str = "TYX",
        **kwargs: Any,
    ) -> pathlib.Path:
        metadata: dict[str, Any] = {"axes": axes}
        extra: dict[str, Any] = {}
        if pixel_size_um is not None:
            metadata["unit"] = "um"
            extra["resolution"] = (1.0 / pixel_size_um, 1.0 / pixel_size_um)
        if frame_interval_s is not None:
            metadata["finterval"] = frame_interval_s
        return tiff_factory(name, data, imagej=True, metadata=metadata, **extra, **kwargs)

    return make
