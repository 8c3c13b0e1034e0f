"""Calibration from file metadata: ImageJ tags and OME-XML."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from typing import Any

import numpy as np
import tifffile

from waves.errors import CalibrationError
from waves.io.common import _NO_UNIT, _NONSQUARE_TOLERANCE
from waves.units import length_to_um, time_to_s


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
                    # the nominal interval; the per-plane times themselves are read by
                    # waves.io.timestamps, which also notes irregular steps
                    dt = (step, None)
    except CalibrationError as exc:
        dt = (None, str(exc))
    except ValueError:
        dt = (None, None)
    return px, dt, notes
