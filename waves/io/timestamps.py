"""Per-frame acquisition times: from the file's metadata or from a CSV of times.

Where a file records when each plane was taken, that time is the truth of the
time axis; the frame interval of the calibration is then only the nominal step
(the median of the recorded steps).  Sources, in the order they are tried:

* ``"ome"``: OME-XML ``Plane`` elements with ``DeltaT`` (unit ``DeltaTUnit``,
  default s) for the selected channel and z-slice, one per ``TheT``.
* ``"micromanager"``: Micro-Manager per-image metadata, a JSON dict per page
  (TIFF tag 51123, which tifffile decodes) with ``ElapsedTime-ms``; or a
  summary dict (tifffile's ``micromanager_metadata`` or JSON in the ImageJ
  ``Info`` property) with ``FrameKey-T-C-Z`` entries holding ``ElapsedTime-ms``.
* ``"imagej"``: ImageJ slice labels that each hold one time with its unit
  (``"t=12.5 s"``, ``"0.5 min"``, ``"00:01:02.5"``), or lines of the ImageJ
  ``Info`` property of the form ``time #K = VALUE UNIT`` (also ``t[K]``,
  ``timestamp K``, ``ElapsedTime-ms K``; the unit may be in the key), one for
  every frame.
* ``"csv"``: a file given by the user (``times_csv=``, ``--times FILE.csv``):
  one time in seconds per frame of the file, in a single column (an optional
  header line; with several columns the header must name one time column).

Times found in a file that are incomplete, not strictly increasing or not
finite are ignored with a note (times become ``"nominal"``, frame number x
frame interval); the same faults in a CSV raise `InputError`.  All times are
returned relative to the first frame of the file.
"""

from __future__ import annotations

import csv
import json
import os
import pathlib
import re
import xml.etree.ElementTree as ET
from typing import Any

import numpy as np
import tifffile

from waves.errors import CalibrationError, InputError
from waves.units import time_to_s

#: times_origin values, in the order a file's sources are tried
TIME_ORIGINS = ("ome", "micromanager", "imagej", "csv", "nominal")
# steps further than this fraction from the median step make the times irregular
IRREGULAR_TOLERANCE = 0.05

_NUMBER = r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?"
_UNIT = r"ms|msec|milliseconds?|s|sec|secs|seconds?|min|mins|minutes?|h|hr|hrs|hours?"
_VALUE_UNIT = re.compile(rf"(?<![\w.])({_NUMBER})\s*({_UNIT})(?![\w])", re.IGNORECASE)
_CLOCK = re.compile(r"(?<![\w.:])(\d+):([0-5]?\d):([0-5]?\d(?:\.\d*)?)(?![\w:])")
_INFO_LINE = re.compile(
    rf"^\s*(?:time|t|timestamp|elapsed[ _]?time)(?:[-_ ]?(?P<kunit>ms|s|min|h)\b|\s*\((?P<punit>{_UNIT})\))?"
    rf"\s*(?:#|\[|\s)\s*(?P<idx>\d+)\]?\s*[=:]\s*(?P<val>{_NUMBER})\s*(?P<vunit>{_UNIT})?\s*$",
    re.IGNORECASE,
)
_FRAMEKEY = re.compile(r"^FrameKey-(\d+)-(\d+)-(\d+)$")


def _check_times(times: Any, n: int) -> tuple[np.ndarray | None, str | None]:
    """(times as float64 relative to the first, None) or (None, what is wrong)."""
    try:
        t = np.asarray(times, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        return None, "times are not numbers"
    if t.size != n:
        return None, f"{t.size} times for {n} frames"
    if not np.all(np.isfinite(t)):
        bad = np.flatnonzero(~np.isfinite(t))
        return None, f"time of frame {int(bad[0])} is not finite ({t[bad[0]]!r})"
    steps = np.diff(t)
    if np.any(steps <= 0):
        k = int(np.flatnonzero(steps <= 0)[0])
        return None, (
            f"times are not strictly increasing: frame {k + 1} at {t[k + 1]:g} s is not after "
            f"frame {k} at {t[k]:g} s"
        )
    return t - t[0], None


def nominal_step_s(times_s: np.ndarray) -> float:
    """The regular step of `times_s`: the median of its differences (s)."""
    return float(np.median(np.diff(np.asarray(times_s, dtype=np.float64))))


def irregular_steps(times_s: np.ndarray, step_s: float) -> int:
    """How many steps differ from `step_s` by more than `IRREGULAR_TOLERANCE`."""
    steps = np.diff(np.asarray(times_s, dtype=np.float64))
    return int(np.count_nonzero(np.abs(steps - step_s) > IRREGULAR_TOLERANCE * step_s))


def _unit_s(unit: str) -> float | None:
    try:
        return time_to_s(1.0, unit)
    except (CalibrationError, KeyError):
        return None


def _label_time_s(label: Any) -> float | None:
    """The one time written in an ImageJ slice label, in s, or None."""
    if not isinstance(label, str):
        return None
    clocks = _CLOCK.findall(label)
    values = _VALUE_UNIT.findall(label)
    if len(clocks) + len(values) != 1:
        return None
    if clocks:
        h, m, s = clocks[0]
        return 3600.0 * int(h) + 60.0 * int(m) + float(s)
    value, unit = values[0]
    factor = _unit_s(unit)
    return None if factor is None else float(value) * factor


def _ome_times(tif: tifffile.TiffFile, n: int, c_index: int, z_index: int) -> tuple[Any, str | None]:
    """(times or None, problem) from OME Plane DeltaT of the selected C and Z."""
    try:
        root = ET.fromstring(tif.ome_metadata)
    except (ET.ParseError, TypeError):
        return None, None
    pixels = next((el for el in root.iter() if el.tag.rsplit("}", 1)[-1] == "Pixels"), None)
    if pixels is None:
        return None, None
    times: dict[int, float] = {}
    try:
        for el in pixels:
            if el.tag.rsplit("}", 1)[-1] != "Plane" or "DeltaT" not in el.attrib:
                continue
            pa = el.attrib
            if int(pa.get("TheC", 0)) != c_index or int(pa.get("TheZ", 0)) != z_index:
                continue
            times[int(pa.get("TheT", 0))] = time_to_s(float(pa["DeltaT"]), pa.get("DeltaTUnit", "s"))
    except (ValueError, CalibrationError) as exc:
        return None, f"OME plane times (DeltaT) could not be read ({exc})"
    if not times:
        return None, None
    if sorted(times) != list(range(n)):
        return None, f"OME plane times (DeltaT) are given for {len(times)} of {n} frames"
    return [times[k] for k in range(n)], None


def _elapsed_ms(entry: Any) -> float | None:
    if not isinstance(entry, dict):
        return None
    value = entry.get("ElapsedTime-ms")
    if value is None:
        return None
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def _mm_page_times(tif: tifffile.TiffFile, page_keys: list[int] | None) -> list[float] | None:
    """ElapsedTime-ms of the per-page Micro-Manager metadata, in s, or None."""
    if page_keys is None or not page_keys:
        return None
    out = []
    for k in page_keys:
        try:
            page = tif.pages.get(k, aspage=True)
            tag = page.tags.get(51123)
        except Exception:
            return None
        ms = _elapsed_ms(tag.value if tag is not None else None)
        if ms is None:
            return None
        out.append(ms / 1000.0)
    return out


def _mm_summary_times(meta: Any, n: int, c_index: int, z_index: int) -> list[float] | None:
    """ElapsedTime-ms of FrameKey-T-C-Z entries of a Micro-Manager summary dict, in s."""
    if not isinstance(meta, dict):
        return None
    times: dict[int, float] = {}
    for key, entry in meta.items():
        m = _FRAMEKEY.match(str(key))
        if m is None:
            continue
        t, c, z = (int(g) for g in m.groups())
        ms = _elapsed_ms(entry)
        if c == c_index and z == z_index and ms is not None:
            times[t] = ms / 1000.0
    if not times:
        return None
    if sorted(times) != list(range(n)):
        return None
    return [times[k] for k in range(n)]


def _info_json(ij: dict) -> Any:
    info = ij.get("Info")
    if not isinstance(info, str) or not info.lstrip().startswith("{"):
        return None
    try:
        return json.loads(info)
    except ValueError:
        return None


def _info_line_times(ij: dict, n: int) -> list[float] | None:
    """Times from Info lines 'time #K = VALUE UNIT' (K 0- or 1-based, one per frame)."""
    info = ij.get("Info")
    if not isinstance(info, str):
        return None
    found: dict[int, float] = {}
    for line in info.splitlines():
        m = _INFO_LINE.match(line)
        if m is None:
            continue
        unit = m.group("kunit") or m.group("punit") or m.group("vunit")
        factor = _unit_s(unit) if unit else None
        if factor is None:
            continue
        found[int(m.group("idx"))] = float(m.group("val")) * factor
    if not found:
        return None
    keys = sorted(found)
    if keys not in (list(range(n)), list(range(1, n + 1))):
        return None
    return [found[k] for k in keys]


def _label_times(ij: dict, n: int, label_keys: list[int] | None) -> list[float] | None:
    labels = ij.get("Labels")
    if not isinstance(labels, (list, tuple)) or label_keys is None or not label_keys:
        return None
    if max(label_keys) >= len(labels):
        return None
    out = []
    for k in label_keys:
        t = _label_time_s(labels[k])
        if t is None:
            return None
        out.append(t)
    return out


def file_times(
    tif: tifffile.TiffFile,
    fmt: str,
    n_frames: int,
    *,
    c_index: int = 0,
    z_index: int = 0,
    page_keys: list[int] | None = None,
) -> tuple[np.ndarray | None, str, list[str]]:
    """(times_s or None, origin, notes) of the frames of an open TIFF.

    `page_keys` are the page (and ImageJ slice-label) indices of the frames at
    the selected channel and z-slice, None when pages do not map to planes.
    """
    notes: list[str] = []
    candidates: list[tuple[str, Any]] = []
    if fmt == "ome":
        times, problem = _ome_times(tif, n_frames, c_index, z_index)
        if problem:
            notes.append(problem)
        candidates.append(("ome", times))
    candidates.append(("micromanager", _mm_page_times(tif, page_keys)))
    ij = (tif.imagej_metadata or {}) if tif.is_imagej else {}
    mm_meta = None
    try:
        mm_meta = tif.micromanager_metadata if tif.is_micromanager else None
    except Exception:
        mm_meta = None
    for meta in (mm_meta, _info_json(ij) if ij else None):
        if isinstance(meta, dict):
            candidates.append(("micromanager", _mm_summary_times(meta, n_frames, c_index, z_index)))
    if ij:
        candidates.append(("imagej", _label_times(ij, n_frames, page_keys)))
        candidates.append(("imagej", _info_line_times(ij, n_frames)))
    for origin, times in candidates:
        if times is None:
            continue
        checked, problem = _check_times(times, n_frames)
        if problem is None:
            return checked, origin, notes
        notes.append(f"per-frame times in the file ({origin}) are ignored: {problem}")
    return None, "nominal", notes


def read_times_csv(path: Any) -> np.ndarray:
    """Times in seconds, one per row, from a CSV file (see the module notes).

    Raises InputError when the file is missing, empty or holds anything but
    finite numbers in its time column.
    """
    try:
        p = pathlib.Path(os.fspath(path))
    except TypeError:
        raise InputError(f"times file must be a path, got {type(path).__name__}") from None
    try:
        text = p.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"cannot read the times file {p}: {exc}; check the path") from None
    except UnicodeDecodeError:
        raise InputError(f"{p} is not a text (CSV) file; give one time in seconds per line") from None
    rows = [r for r in csv.reader(text.splitlines()) if r and any(c.strip() for c in r)]
    rows = [r for r in rows if not r[0].lstrip().startswith("#")]
    if not rows:
        raise InputError(f"the times file {p} holds no times; give one time in seconds per frame")

    def number(cell: str) -> float | None:
        try:
            return float(cell)
        except ValueError:
            return None

    column = 0
    header = [c.strip() for c in rows[0]]
    if any(number(c) is None for c in header):
        rows = rows[1:]
        if len(header) > 1:
            named = [i for i, c in enumerate(header) if re.search(r"time|^t(_s)?$", c, re.IGNORECASE)]
            if len(named) != 1:
                raise InputError(
                    f"the times file {p} has columns {header} and none (or several) is named as the "
                    "time; keep one column of times in seconds, or name it 'time_s'"
                )
            column = named[0]
        unit = re.search(r"(?:\(|\[|_|\s)(ms|s|min|h)(?:\)|\]|$)", header[column], re.IGNORECASE)
        if unit and unit.group(1).lower() != "s":
            raise InputError(
                f"the times file {p} gives times in {unit.group(1)} (column {header[column]!r}); "
                "waves reads times in seconds: convert the column"
            )
    elif len(header) > 1:
        raise InputError(
            f"the times file {p} has {len(header)} columns but no header; keep one column of times "
            "in seconds, or add a header that names the time column 'time_s'"
        )
    out = []
    for k, r in enumerate(rows):
        cell = r[column].strip() if column < len(r) else ""
        v = number(cell)
        if v is None:
            raise InputError(f"the times file {p}: row {k + 1} holds {cell!r}, not a time in seconds")
        out.append(v)
    if not rows:
        raise InputError(f"the times file {p} holds no times; give one time in seconds per frame")
    return np.asarray(out, dtype=np.float64)


def csv_times(path: Any, n_frames: int) -> np.ndarray:
    """Times of a CSV checked against the file's frame count (relative to frame 0)."""
    raw = read_times_csv(path)
    checked, problem = _check_times(raw, n_frames)
    if problem is not None:
        if raw.size != n_frames:
            problem = (
                f"it holds {raw.size} times but the stack has {n_frames} frames; give one time "
                "per frame of the whole file (frame selections apply to these times)"
            )
        raise InputError(f"the times file {os.fspath(path)} cannot be used: {problem}")
    assert checked is not None
    return checked


def irregular_note(times_s: np.ndarray, step_s: float, origin: str) -> str | None:
    """A note when recorded steps depart from the nominal step, else None."""
    n_bad = irregular_steps(times_s, step_s)
    if n_bad == 0:
        return None
    steps = np.diff(times_s)
    longest = float(np.max(steps))
    return (
        f"frame times ({origin}) are irregular: {n_bad} of {len(steps)} steps differ from the "
        f"nominal {step_s:g} s by more than {100 * IRREGULAR_TOLERANCE:g} % (longest step "
        f"{longest:g} s = {longest / step_s:.3g} intervals); the recorded times are kept "
        "(Stack.times_s)"
    )

