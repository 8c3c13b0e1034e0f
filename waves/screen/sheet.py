"""The screen's sheet: one row per stack, with group, replicate and calibration."""

from __future__ import annotations

import csv
import math
import os
import pathlib
from dataclasses import dataclass

from waves import io
from waves.errors import InputError
from waves.screen.common import KNOWN_COLUMNS, REQUIRED_COLUMNS

# --------------------------------------------------------------------------- sheet


@dataclass(frozen=True)
class SheetRow:
    """One row of a screen sheet.

    line: line number in the CSV file (the header is line 1).  path: as
    written; resolved: absolute path (relative paths are taken from the
    sheet's folder).  problem: why the row cannot be analysed, or None.
    extra: other columns as (name, text) pairs.
    """

    line: int
    path: str
    resolved: str
    group: str
    replicate: str | None
    date: str | None
    pixel_size_um: float | None
    frame_interval_s: float | None
    extra: tuple[tuple[str, str], ...]
    problem: str | None


@dataclass(frozen=True)
class Sheet:
    """A read sheet: its file, sha256, rows, and the extra column names."""

    path: str
    sha256: str
    rows: tuple[SheetRow, ...]
    extra_columns: tuple[str, ...]

    @property
    def groups(self) -> tuple[str, ...]:
        """Group names in order of first appearance."""
        return tuple(dict.fromkeys(r.group for r in self.rows if r.group))

    @property
    def has_replicates(self) -> bool:
        return any(r.replicate for r in self.rows)


def _source_exists(path: str) -> bool:
    import glob

    p = pathlib.Path(path)
    if p.exists():
        return True
    if any(ch in path for ch in "*?["):
        return bool(glob.glob(path))
    return False


def _row_number(text: str, name: str) -> tuple[float | None, str | None]:
    text = text.strip()
    if not text:
        return None, None
    try:
        value = float(text)
    except ValueError:
        return None, f"{name} must be a number, got {text!r}; fix the cell or leave it empty"
    if not math.isfinite(value) or value <= 0:
        return None, f"{name} must be a positive number, got {text!r}; fix the cell or leave it empty"
    return value, None


def read_sheet(path) -> Sheet:
    """Read a screen sheet (CSV with a header; see the module doc).

    Raises InputError when the file cannot be read, has no header, lacks the
    `path` or `group` column, repeats a column or has no rows; problems of a
    single row are recorded in that row's `problem`.
    """
    sheet_path = pathlib.Path(os.fspath(path)).expanduser()
    if not sheet_path.is_file():
        raise InputError(f"no such sheet: {sheet_path}; give the CSV file that lists the stacks")
    try:
        text = sheet_path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the sheet {sheet_path}: {exc}; save it as a UTF-8 CSV file") from None
    reader = csv.reader(text.splitlines())
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise InputError(f"the sheet {sheet_path} is empty; it needs a header line with path,group") from None
    if len(set(header)) != len(header):
        dup = sorted({h for h in header if header.count(h) > 1})
        raise InputError(f"the sheet {sheet_path} repeats the column(s) {', '.join(dup)}; keep one of each")
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        raise InputError(
            f"the sheet {sheet_path} has no {' and no '.join(repr(c) for c in missing)} column; "
            f"its header is {','.join(header)}; the header must name at least path,group "
            "(optional: replicate, date, pixel_size_um, frame_interval_s)"
        )
    extra_cols = tuple(h for h in header if h not in KNOWN_COLUMNS and h)
    folder = sheet_path.resolve().parent
    rows = []
    for line, cells in enumerate(reader, start=2):
        if not any(c.strip() for c in cells):
            continue  # blank line
        cells = cells + [""] * (len(header) - len(cells))
        rec = dict(zip(header, (c.strip() for c in cells), strict=False))
        problems = []
        if len(cells) > len(header):
            problems.append(f"{len(cells)} cells but the header has {len(header)} columns")
        raw = rec["path"]
        resolved = ""
        if not raw:
            problems.append("empty path; give the stack's file, folder or glob pattern")
        else:
            p = pathlib.Path(raw).expanduser()
            resolved = os.path.abspath(p if p.is_absolute() else folder / p)
            if not _source_exists(resolved):
                problems.append(f"no such file or folder: {resolved} (paths are relative to the sheet's folder)")
        if not rec["group"]:
            problems.append("empty group; name the strain or treatment of this stack")
        px, px_problem = _row_number(rec.get("pixel_size_um", ""), "pixel_size_um")
        dt, dt_problem = _row_number(rec.get("frame_interval_s", ""), "frame_interval_s")
        problems += [p for p in (px_problem, dt_problem) if p]
        rows.append(
            SheetRow(
                line=line,
                path=raw,
                resolved=resolved,
                group=rec["group"],
                replicate=rec.get("replicate") or None,
                date=rec.get("date") or None,
                pixel_size_um=px,
                frame_interval_s=dt,
                extra=tuple((c, rec.get(c, "")) for c in extra_cols),
                problem="; ".join(problems) if problems else None,
            )
        )
    if not rows:
        raise InputError(f"the sheet {sheet_path} lists no stacks; add one row per stack under the header")
    return Sheet(path=str(sheet_path.resolve()), sha256=io.file_sha256(sheet_path), rows=tuple(rows),
                 extra_columns=extra_cols)
