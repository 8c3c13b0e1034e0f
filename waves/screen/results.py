"""The combined table of a screen and its files."""

from __future__ import annotations

import csv
import json
import math
import pathlib
from dataclasses import dataclass

from waves import io
from waves.screen.common import QUARTILE_BLOCKS, STACKS_FOLDER, TABLE_CSV, TABLE_PARQUET
from waves.screen.sheet import Sheet

# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class ScreenResult:
    """What a screen run produced.

    table: the combined table as columns (one entry per sheet row).
    comparisons: `waves.stats.Comparison` per (metric, group).
    n_done: analysed in this run; n_reused: finished by an earlier run;
    n_failed: rows without a result (bad rows included).  exit_code: 0 all
    succeeded, 3 some failed.
    """

    out: str
    table: dict
    comparisons: tuple
    reference: str | None
    metrics: tuple[str, ...]
    n_rows: int
    n_done: int
    n_reused: int
    n_failed: int
    failures: tuple[tuple[int, str, str], ...]  # (sheet line, path, message)
    files: tuple[str, ...]
    exit_code: int


def _flatten_summary(summary: dict) -> dict:
    """Every scalar metric of a summary.json as {column: number or None}."""
    row: dict = {}
    for block in QUARTILE_BLOCKS:
        q = summary.get(block)
        for stat in ("median", "q25", "q75", "n"):
            row[f"{block}_{stat}"] = None if not q else q.get(stat)
    row["dominant_period_min"] = summary.get("dominant_period_min")
    course = [c["period_min"] for c in summary.get("period_timecourse") or [] if c.get("period_min") is not None]
    row["period_first_window_min"] = course[0] if course else None
    row["period_last_window_min"] = course[-1] if course else None
    row["n_spiral_cores"] = len(summary.get("spiral_cores") or [])
    row["n_centres"] = len(summary.get("centres") or [])
    row["cores_per_cm2"] = summary.get("cores_per_cm2")
    row["signal_fraction"] = (summary.get("analysis") or {}).get("signal_fraction")
    return row


def metric_columns() -> tuple[str, ...]:
    """Names of the metric columns of the combined table, in order."""
    return tuple(_flatten_summary({}).keys())


def combined_table(sheet: Sheet, keys: dict, stacks_dir, messages: dict) -> dict:
    """One row per sheet row: sheet columns, key, status, calibration, the
    stack's size and duration, warnings and every summary metric.

    keys: sheet line -> result key (or None); messages: line -> failure text.
    Status is 'ok' (summary.json present) or 'failed'.
    """
    stacks_dir = pathlib.Path(stacks_dir)
    metric_names = metric_columns()
    cols = (["line", "path", "group", "replicate", "date"] + list(sheet.extra_columns)
            + ["status", "error", "key", "result_dir", "pixel_size_um", "frame_interval_s",
               "calibration_origin", "n_frames", "height_px", "width_px", "duration_min",
               "n_warnings", "warnings"] + list(metric_names))
    table: dict = {c: [] for c in cols}
    for r in sheet.rows:
        key = keys.get(r.line)
        summary = None
        if key is not None and (stacks_dir / key / "summary.json").is_file():
            summary = json.loads((stacks_dir / key / "summary.json").read_text(encoding="utf-8"))
        cal = (summary or {}).get("calibration") or {}
        shape = ((summary or {}).get("source") or {}).get("shape_tyx") or [None, None, None]
        warn = (summary or {}).get("warnings") or []
        base = {
            "line": r.line, "path": r.path, "group": r.group, "replicate": r.replicate or "",
            "date": r.date or "", **dict(r.extra),
            "status": "ok" if summary is not None else "failed",
            "error": "" if summary is not None else (messages.get(r.line) or r.problem or "no result"),
            "key": key or "", "result_dir": f"{STACKS_FOLDER}/{key}" if summary is not None else "",
            "pixel_size_um": cal.get("pixel_size_um"), "frame_interval_s": cal.get("frame_interval_s"),
            "calibration_origin": cal.get("origin", ""),
            "n_frames": shape[0], "height_px": shape[1], "width_px": shape[2],
            "duration_min": None if summary is None else shape[0] * cal["frame_interval_s"] / 60.0,
            "n_warnings": None if summary is None else len(warn),
            "warnings": " | ".join(warn),
        }
        flat = _flatten_summary(summary) if summary is not None else dict.fromkeys(metric_names)
        for c in cols:
            table[c].append(flat[c] if c in flat else base.get(c))
    return table


def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    return str(v)


def write_table(table: dict, out_dir) -> list[str]:
    """Write the combined table as CSV (and Parquet when pyarrow is
    installed), atomically.  Returns the file names written."""
    out_dir = pathlib.Path(out_dir)
    cols = list(table)
    n = len(table[cols[0]]) if cols else 0
    with io.atomic_output(out_dir / TABLE_CSV, "w") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(cols)
        for i in range(n):
            w.writerow([_cell(table[c][i]) for c in cols])
    names = [TABLE_CSV]
    try:
        import pyarrow
        import pyarrow.parquet as pq
    except ImportError:
        return names
    arrays = {}
    numeric = set(metric_columns()) | {"pixel_size_um", "frame_interval_s", "duration_min"}
    for c in cols:
        if c in numeric:
            arrays[c] = pyarrow.array([None if v is None else float(v) for v in table[c]], type=pyarrow.float64())
        elif c in ("line", "n_frames", "height_px", "width_px", "n_warnings"):
            arrays[c] = pyarrow.array([None if v is None else int(v) for v in table[c]], type=pyarrow.int64())
        else:
            arrays[c] = pyarrow.array(["" if v is None else str(v) for v in table[c]], type=pyarrow.string())
    with io.atomic_output(out_dir / TABLE_PARQUET, "wb") as fh:
        pq.write_table(pyarrow.table(arrays), fh)
    names.append(TABLE_PARQUET)
    return names
