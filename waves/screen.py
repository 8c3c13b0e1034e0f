"""Screens: many stacks analysed on a dask cluster, resumable, with group statistics.

Python API: `read_sheet(path) -> Sheet`, `run_screen(sheet, *, out, ...) ->
ScreenResult`; command line: `waves screen SHEET.csv --out DIR` (`add_arguments`,
`run_from_args`).

The sheet is a CSV file with a header.  Columns: `path` (a TIFF file, folder of
frames or glob pattern, relative to the sheet's folder unless absolute) and
`group` (strain, treatment) are required; `replicate` and `date` are optional;
`pixel_size_um` and `frame_interval_s` override (or supply) the calibration of
that row; any other column is carried into the combined table unchanged.
Problems of one row (a missing file, a bad number) are reported for that row
and the others go on; a sheet without the required columns is refused.

Execution: every stack is one task on dask.distributed, a local cluster by
default (one single-threaded worker process per core, the machine's memory
shared between them and enforced by the workers' nannies) or an existing one
(`scheduler=` address; every worker must see the stacks and DIR under the
same paths).

Resumable, nothing lost.  Each stack's result lives in
DIR/stacks/<key>/ with key = sha256(input file sha256, canonical JSON of the
analysis options + frames + binning + the row's calibration, waves
version)[:16] (`stack_key`; the execution-only option `workers` is left
out).  A task analyses into a hidden temporary folder and renames it to
DIR/stacks/<key>/ when everything, summary.json last, is written: a killed run
leaves complete results or none.  A stack that fails leaves
DIR/stacks/<key>/error.json holding its message, and the run goes on.  A rerun
reuses every key that has a summary.json and retries failed ones (unless
`retry_failed=False`).  Input hashes are cached in DIR/input_hashes.json by
path, size and modification time, so a rerun does not read finished stacks
again.  Only one run may use a DIR at a time (DIR/screen.lock).

Outputs in DIR (all written atomically): screen_table.csv (one row per sheet
row with every summary metric; screen_table.parquet too when pyarrow is
installed), statistics.csv and statistics.json (each group against the
reference, per metric: `waves.stats`), plots/<metric>.png, report.html and
screen.json (provenance and counts).

Exit codes of `waves screen`: 0 every stack analysed; 3 some stacks failed
(their messages are in the table, the report and error.json); 2 bad sheet or
usage; 1 internal error; 130 interrupted (finished results are kept).
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import json
import logging
import math
import os
import pathlib
import shutil
import socket
import sys
import time
import traceback
import uuid
from dataclasses import dataclass, replace

from waves import __version__, io
from waves.cli_common import (
    add_analysis_options,
    add_calibration_options,
    analysis_options_from_args,
    parse_frames,
)
from waves.errors import InputError, WavesError

__all__ = [
    "SheetRow",
    "Sheet",
    "ScreenResult",
    "read_sheet",
    "stack_key",
    "analysis_spec",
    "analyse_task",
    "run_screen",
    "combined_table",
    "metric_columns",
    "DEFAULT_METRICS",
    "METRIC_UNITS",
    "add_arguments",
    "run_from_args",
    "EXIT_OK",
    "EXIT_SOME_FAILED",
    "EXIT_USAGE",
]

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_USAGE = 2
EXIT_SOME_FAILED = 3

REQUIRED_COLUMNS = ("path", "group")
KNOWN_COLUMNS = ("path", "group", "replicate", "date", "pixel_size_um", "frame_interval_s")
STACKS_FOLDER = "stacks"
HASH_CACHE = "input_hashes.json"
LOCK_FILE = "screen.lock"
TABLE_CSV = "screen_table.csv"
TABLE_PARQUET = "screen_table.parquet"
STATS_CSV = "statistics.csv"
STATS_JSON = "statistics.json"

# quartile blocks of summary.json expanded into columns <name>_median, _q25, _q75, _n
QUARTILE_BLOCKS = (
    "period_min",
    "front_speed_um_per_min",
    "wavelength_um",
    "front_speed_activation_fit_um_per_min",
)
# metrics compared between groups unless the caller picks others
DEFAULT_METRICS = (
    "period_min_median",
    "front_speed_um_per_min_median",
    "wavelength_um_median",
    "front_speed_activation_fit_um_per_min_median",
    "dominant_period_min",
    "n_spiral_cores",
)
METRIC_UNITS = {
    "period_min": "min",
    "front_speed_um_per_min": "um/min",
    "wavelength_um": "um",
    "front_speed_activation_fit_um_per_min": "um/min",
    "dominant_period_min": "min",
    "period_first_window_min": "min",
    "period_last_window_min": "min",
    "n_spiral_cores": "count",
    "n_centres": "count",
    "cores_per_cm2": "1/cm^2",
    "signal_fraction": "fraction",
    "duration_min": "min",
}


def metric_unit(column: str) -> str:
    """Unit of a combined-table metric column ('' when it has none)."""
    if column in METRIC_UNITS:
        return METRIC_UNITS[column]
    for block in QUARTILE_BLOCKS:
        if column.startswith(block + "_"):
            return "count" if column.endswith("_n") else METRIC_UNITS[block]
    return ""


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


# --------------------------------------------------------------------------- keys and tasks


def _canonical_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)


def analysis_spec(
    options=None,
    *,
    frames: slice | None = None,
    bin: int = 1,  # noqa: A002 - the name users know from ImageJ
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
) -> dict:
    """Everything that decides a stack's result besides its bytes, as a
    JSON-able dict: analysis options (without the execution-only `workers`),
    frame range, binning and calibration overrides (um, s)."""
    from dataclasses import asdict

    from waves.analyse import AnalysisOptions

    options = options if options is not None else AnalysisOptions()
    opts = asdict(options)
    opts.pop("workers", None)
    opts["period_band_min"] = list(options.period_band_min)
    if frames is not None and not isinstance(frames, slice):
        raise WavesError(f"frames must be a slice (START:STOP), got {frames!r}")
    if int(bin) != bin or int(bin) < 1:
        raise WavesError(f"bin must be a whole number >= 1, got {bin!r}")
    return {
        "options": opts,
        "frames": None if frames is None else [frames.start or 0, frames.stop, frames.step],
        "bin": int(bin),
        "pixel_size_um": None if pixel_size_um is None else float(pixel_size_um),
        "frame_interval_s": None if frame_interval_s is None else float(frame_interval_s),
    }


def stack_key(input_sha256: str, spec: dict, *, version: str = __version__) -> str:
    """Result key of a stack: the first 16 hex digits of the sha256 of the
    canonical JSON of {input sha256, analysis spec, waves version}."""
    text = _canonical_json({"input_sha256": input_sha256, "analysis": spec, "waves_version": version})
    return hashlib.sha256(text.encode("ascii")).hexdigest()[:16]


def _stat_signature(path: str) -> list | None:
    """[size, mtime_ns] of a regular file (the hash cache's check); None
    for folders and patterns, which are hashed every run."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    if not pathlib.Path(path).is_file():
        return None
    return [int(st.st_size), int(st.st_mtime_ns)]


def _options_from_spec(spec: dict, workers: int):
    from waves.analyse import AnalysisOptions

    opts = dict(spec["options"])
    opts["period_band_min"] = tuple(opts["period_band_min"])
    return AnalysisOptions(**opts, workers=workers)


def _error_record(exc: BaseException) -> dict:
    if isinstance(exc, WavesError):
        return {"kind": "input", "error_type": type(exc).__name__, "message": " ".join(str(exc).split())}
    return {
        "kind": "internal",
        "error_type": type(exc).__name__,
        "message": f"internal error {type(exc).__name__}: {' '.join(str(exc).split())}",
        "traceback": traceback.format_exc(),
    }


def analyse_task(task: dict) -> dict:
    """Analyse one stack into DIR/stacks/<key>/ and return a small record.

    Runs on a dask worker.  task: {path, spec, stacks_dir, retry_failed,
    sha256 (or None: computed here), threads}.  Returns {key, path, sha256,
    stat, status, message, seconds}; status 'done' (analysed now), 'reused'
    (a finished result existed), 'failed' (error.json written) or
    'failed-kept' (an earlier failure, not retried).  Never raises for a
    problem of the stack itself.
    """
    t0 = time.perf_counter()
    path = task["path"]
    stacks_dir = pathlib.Path(task["stacks_dir"])
    record = {"key": None, "path": path, "sha256": task.get("sha256"), "stat": _stat_signature(path),
              "status": "failed", "message": None, "seconds": 0.0}
    try:
        sha = record["sha256"] or io.file_sha256(path)
    except (WavesError, OSError) as exc:
        record["message"] = f"cannot read {path}: {' '.join(str(exc).split())}"
        record["seconds"] = time.perf_counter() - t0
        return record
    record["sha256"] = sha
    key = stack_key(sha, task["spec"])
    record["key"] = key
    folder = stacks_dir / key
    if (folder / "summary.json").is_file():
        record.update(status="reused", seconds=time.perf_counter() - t0)
        return record
    if (folder / "error.json").is_file() and not task.get("retry_failed", True):
        try:
            record["message"] = json.loads((folder / "error.json").read_text())["message"]
        except (OSError, ValueError, KeyError):
            record["message"] = "an earlier run failed on this stack (error.json unreadable)"
        record.update(status="failed-kept", seconds=time.perf_counter() - t0)
        return record
    threads = max(1, int(task.get("threads", 1)))
    _limit_threads(threads)
    tmp = stacks_dir / f".tmp-{key}-{uuid.uuid4().hex[:8]}"
    spec = task["spec"]
    try:
        from waves.result import analyse_file

        frames = None if spec["frames"] is None else slice(*spec["frames"])
        analyse_file(
            path,
            out=tmp,
            options=_options_from_spec(spec, threads),
            frames=frames,
            bin=spec["bin"],
            pixel_size_um=spec["pixel_size_um"],
            frame_interval_s=spec["frame_interval_s"],
            progress=False,
        )
        seconds = time.perf_counter() - t0
        io.write_json(tmp / "screen_record.json", {
            "key": key, "input_path": path, "input_sha256": sha, "analysis": spec,
            "waves_version": __version__, "seconds": seconds, "host": socket.gethostname(),
            "finished_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        })
        _publish(tmp, folder)
        record.update(status="done", seconds=seconds)
    except Exception as exc:  # a stack's failure is recorded; the screen goes on
        shutil.rmtree(tmp, ignore_errors=True)
        if (folder / "summary.json").is_file():  # an identical stack finished meanwhile
            record.update(status="reused", seconds=time.perf_counter() - t0)
            return record
        err = _error_record(exc)
        folder.mkdir(parents=True, exist_ok=True)
        io.write_json(folder / "error.json", {"key": key, "input_path": path, "input_sha256": sha,
                                             "analysis": spec, "waves_version": __version__, **err})
        record.update(status="failed", message=err["message"], seconds=time.perf_counter() - t0)
    return record


def _publish(tmp: pathlib.Path, folder: pathlib.Path) -> None:
    """Rename a finished temporary result folder to its key folder.  An
    earlier failure there is replaced; a result that another task (same
    bytes, same options) published meanwhile is kept and `tmp` dropped."""
    if (folder / "summary.json").is_file():
        shutil.rmtree(tmp, ignore_errors=True)
        return
    if folder.exists():  # an earlier failure: error.json only
        shutil.rmtree(folder)
    try:
        os.replace(tmp, folder)
    except OSError:
        if not (folder / "summary.json").is_file():
            raise
        shutil.rmtree(tmp, ignore_errors=True)


def _limit_threads(threads: int) -> None:
    """Keep a task's compiled kernels to its share of the cores."""
    try:
        import numba

        numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))
    except (ImportError, ValueError):  # pragma: no cover - numba is a dependency
        pass


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


# --------------------------------------------------------------------------- run


class _Lock:
    """DIR/screen.lock holding host and pid; a lock left by a dead process
    on this host is taken over."""

    def __init__(self, out: pathlib.Path) -> None:
        self.path = out / LOCK_FILE
        self.held = False

    def __enter__(self) -> _Lock:
        me = {"host": socket.gethostname(), "pid": os.getpid()}
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            except FileExistsError:
                try:
                    other = json.loads(self.path.read_text())
                except (OSError, ValueError):
                    other = {}
                if other.get("host") == me["host"] and not _pid_alive(int(other.get("pid", -1))):
                    self.path.unlink(missing_ok=True)
                    continue
                raise InputError(
                    f"another screen run (host {other.get('host')}, pid {other.get('pid')}) is using "
                    f"{self.path.parent}; wait for it, or delete {self.path} if that run is gone"
                ) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self.held = True
            return self
        raise InputError(f"cannot take the lock {self.path}; delete it if no screen run is using the folder")

    def __exit__(self, *exc) -> None:
        if self.held:
            self.path.unlink(missing_ok=True)


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _load_hash_cache(path: pathlib.Path) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data.get("files", {}) if isinstance(data, dict) else {}


def _save_hash_cache(path: pathlib.Path, cache: dict) -> None:
    io.write_json(path, {"note": "sha256 of screen inputs by path, [size, mtime_ns]", "files": cache})


def _local_cluster(n_workers: int | None, worker_memory_mb: float | None):
    from distributed import LocalCluster

    n = int(n_workers) if n_workers is not None else max(1, os.cpu_count() or 1)
    if n < 1:
        raise WavesError(f"--workers must be at least 1, got {n_workers!r}")
    memory = "auto" if worker_memory_mb is None else int(float(worker_memory_mb) * 2**20)
    # workers' own log lines (e.g. heartbeats failing while the cluster shuts
    # down) are silenced; a stack's failure reaches the table and the report
    return LocalCluster(n_workers=n, threads_per_worker=1, processes=True, memory_limit=memory,
                        dashboard_address=None, silence_logs=logging.CRITICAL)


def _worker_memory_bytes(client) -> list[int]:
    info = client.scheduler_info(n_workers=-1) if _accepts_n_workers(client) else client.scheduler_info()
    return [int(w.get("memory_limit") or 0) for w in info.get("workers", {}).values()]


def _accepts_n_workers(client) -> bool:
    import inspect

    return "n_workers" in inspect.signature(client.scheduler_info).parameters


def _check_memory(client, options) -> None:
    budget = options.memory_budget_mb * 2**20
    limits = [m for m in _worker_memory_bytes(client) if m > 0]
    # the analysis holds about two budgets at its peak (strip + outputs); common practice, no source
    if limits and 2 * budget > min(limits):
        raise WavesError(
            f"the analysis memory budget ({options.memory_budget_mb:g} MB per stack) does not fit a "
            f"worker's memory limit ({min(limits) / 2**20:.0f} MB); lower --memory-mb, give the "
            "workers more memory (--worker-memory-mb) or use fewer workers"
        )


def run_screen(
    sheet: Sheet,
    *,
    out,
    options=None,
    frames: slice | None = None,
    bin: int = 1,  # noqa: A002
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
    reference: str | None = None,
    metrics=None,
    client=None,
    scheduler: str | None = None,
    n_workers: int | None = None,
    worker_memory_mb: float | None = None,
    retry_failed: bool = True,
    n_boot: int = 2000,
    seed: int = 0,
    holm_family: str = "metric",
    progress: bool = True,
    report: bool = True,
) -> ScreenResult:
    """Analyse every stack of `sheet` on a dask cluster into `out`, then
    combine, compare the groups and write the table, statistics, plots and
    report.

    options: `waves.analyse.AnalysisOptions` shared by all rows; frames,
    bin: read selection for all rows; pixel_size_um (um), frame_interval_s
    (s): calibration for rows whose own cells are empty (a row's cells win,
    the file's calibration is used when both are absent).  reference: the
    group others are compared with (default: the sheet's first group).
    metrics: combined-table columns to compare (default `DEFAULT_METRICS`).
    client: a `distributed.Client` to use; else `scheduler` (address of a
    running scheduler); else a local cluster of `n_workers` (default one
    per core) single-threaded worker processes with `worker_memory_mb` each
    (default: the machine's memory shared equally).  retry_failed: analyse
    again stacks that failed in an earlier run.  n_boot, seed: bootstrap
    resamples and seed; holm_family: 'metric' or 'all' (`waves.stats`).
    Statistics run on replicate medians when any row has a replicate label
    (a row without one counts as a replicate of its own).

    The local cluster starts worker processes: a script that calls this
    must do so under `if __name__ == "__main__":`.
    """
    from waves import stats
    from waves.analyse import AnalysisOptions

    options = options if options is not None else AnalysisOptions()
    metrics = tuple(metrics) if metrics is not None else DEFAULT_METRICS
    unknown = [m for m in metrics if m not in metric_columns()]
    if unknown:
        raise WavesError(f"unknown metric(s) {', '.join(unknown)}; choose from {', '.join(metric_columns())}")
    groups = sheet.groups
    if reference is None:
        reference = groups[0] if groups else None
    elif reference not in groups:
        raise WavesError(
            f"reference group {reference!r} is not in the sheet; groups are {', '.join(groups)}: "
            "give one of them with --reference"
        )
    if holm_family not in stats.HOLM_FAMILIES:
        raise WavesError(f"holm family must be one of {stats.HOLM_FAMILIES}, got {holm_family!r}")
    out = pathlib.Path(os.fspath(out)).expanduser().resolve()
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder; give a folder for the screen")
    stacks_dir = out / STACKS_FOLDER
    stacks_dir.mkdir(parents=True, exist_ok=True)
    started = time.time()
    with _Lock(out):
        for stale in stacks_dir.glob(".tmp-*"):  # left by a killed run
            shutil.rmtree(stale, ignore_errors=True)
        cache_path = out / HASH_CACHE
        cache = _load_hash_cache(cache_path)
        keys: dict[int, str | None] = {}
        messages: dict[int, str] = {}
        tasks: dict[str, dict] = {}  # task id -> task
        lines_of: dict[str, list[int]] = {}
        n_reused = 0
        for r in sheet.rows:
            if r.problem is not None:
                keys[r.line] = None
                messages[r.line] = r.problem
                continue
            spec = analysis_spec(
                options, frames=frames, bin=bin,
                pixel_size_um=r.pixel_size_um if r.pixel_size_um is not None else pixel_size_um,
                frame_interval_s=r.frame_interval_s if r.frame_interval_s is not None else frame_interval_s,
            )
            cached = cache.get(r.resolved)
            sha = None
            if cached is not None and cached.get("stat") == _stat_signature(r.resolved):
                sha = cached["sha256"]
                key = stack_key(sha, spec)
                if (stacks_dir / key / "summary.json").is_file():
                    keys[r.line] = key
                    n_reused += 1
                    continue
            tid = hashlib.sha256(_canonical_json([r.resolved, spec]).encode()).hexdigest()[:16]
            lines_of.setdefault(tid, []).append(r.line)
            tasks[tid] = {"path": r.resolved, "spec": spec, "stacks_dir": str(stacks_dir),
                          "retry_failed": bool(retry_failed), "sha256": sha, "threads": 1}
        records = _execute(tasks, client=client, scheduler=scheduler, n_workers=n_workers,
                           worker_memory_mb=worker_memory_mb, options=options, progress=progress,
                           cache=cache, cache_path=cache_path)
        n_done = 0
        for tid, rec in records.items():
            for line in lines_of[tid]:
                keys[line] = rec["key"]
                if rec["status"] in ("failed", "failed-kept"):
                    messages[line] = rec["message"] or "failed"
                elif rec["status"] == "reused":
                    n_reused += 1
                else:
                    n_done += 1
        _save_hash_cache(cache_path, cache)
        table = combined_table(sheet, keys, stacks_dir, messages)
        files = write_table(table, out)
        ok = [i for i, s in enumerate(table["status"]) if s == "ok"]
        comparisons: tuple = ()
        notes = []
        ok_groups = {table["group"][i] for i in ok}
        if reference is not None and reference in ok_groups and len(ok_groups) > 1:
            sub = {c: [table[c][i] for i in ok] for c in table}
            by_replicate = any(sub["replicate"])
            # a stack without a replicate label is a replicate of its own
            sub["replicate"] = [rep or f"line {line}" for rep, line in zip(sub["replicate"], sub["line"], strict=True)]
            comparisons = stats.compare_metrics(
                sub, metrics, reference=reference,
                replicate_column="replicate" if by_replicate else None,
                n_boot=n_boot, seed=seed, holm_family=holm_family,
            )
        else:
            notes.append("no statistics: the reference group and at least one other group need finished stacks")
        files += _write_statistics(comparisons, out)
        failures = tuple(
            (table["line"][i], table["path"][i], table["error"][i])
            for i, s in enumerate(table["status"]) if s != "ok"
        )
        exit_code = EXIT_OK if not failures else EXIT_SOME_FAILED
        result = ScreenResult(
            out=str(out), table=table, comparisons=comparisons, reference=reference, metrics=metrics,
            n_rows=len(sheet.rows), n_done=n_done, n_reused=n_reused, n_failed=len(failures),
            failures=failures, files=(), exit_code=exit_code,
        )
        provenance = {
            "schema_version": 1,
            "waves_version": __version__,
            "sheet": {"path": sheet.path, "sha256": sheet.sha256, "rows": len(sheet.rows)},
            "analysis": analysis_spec(options, frames=frames, bin=bin, pixel_size_um=pixel_size_um,
                                      frame_interval_s=frame_interval_s),
            "reference": reference,
            "metrics": list(metrics),
            "statistics": {"n_boot": n_boot, "seed": seed, "holm_family": holm_family,
                           "replicate_level": bool(any(table["replicate"]))},
            "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)),
            "wall_time_s": time.time() - started,
            "counts": {"rows": len(sheet.rows), "analysed": n_done, "reused": n_reused,
                       "failed": len(failures)},
            "cluster": _cluster_note(client, scheduler, n_workers),
            "notes": notes,
            "disclaimer": "research measurements; not a clinical, diagnostic or safety judgement",
        }
        if report:
            from waves import screen_report

            files += screen_report.write_screen_report(result, out, provenance=provenance)
        io.write_json(out / "screen.json", {**provenance, "files": files})
        files.append("screen.json")
    return replace(result, files=tuple(files))


def _cluster_note(client, scheduler, n_workers) -> str:
    if client is not None:
        return "given client"
    if scheduler is not None:
        return f"scheduler {scheduler}"
    return f"local cluster, {n_workers or os.cpu_count()} worker process(es)"


def _execute(tasks: dict, *, client, scheduler, n_workers, worker_memory_mb, options, progress,
             cache: dict, cache_path: pathlib.Path) -> dict:
    """Run the tasks on the cluster; returns task id -> record.  Records
    the input hashes in `cache` as results arrive (saved every 25)."""
    if not tasks:
        return {}
    from distributed import Client, as_completed
    from tqdm.auto import tqdm

    own_cluster = own_client = None
    try:
        if client is None:
            if scheduler is not None:
                try:
                    own_client = client = Client(scheduler, timeout="20s")
                except (OSError, TimeoutError) as exc:
                    raise WavesError(
                        f"cannot reach the dask scheduler at {scheduler}: {exc}; check the address "
                        "(tcp://HOST:PORT) and that the scheduler is running"
                    ) from None
            else:
                own_cluster = _local_cluster(n_workers, worker_memory_mb)
                own_client = client = Client(own_cluster)
        _check_memory(client, options)
        ids = list(tasks)
        run_id = uuid.uuid4().hex[:8]  # a new key each run: never a result the cluster still holds
        futures = client.map(analyse_task, [tasks[i] for i in ids],
                             key=[f"waves-screen-{i}-{run_id}" for i in ids], pure=False, retries=0)
        by_key = {f.key: i for f, i in zip(futures, ids, strict=True)}
        records: dict = {}
        bar = tqdm(total=len(futures), desc="stacks", unit="stack", disable=not progress)
        try:
            for fut in as_completed(futures):
                tid = by_key[fut.key]
                try:
                    rec = fut.result()
                except Exception as exc:  # the worker died (memory?) or the task could not run
                    rec = {"key": None, "path": tasks[tid]["path"], "sha256": None, "stat": None,
                           "status": "failed", "seconds": 0.0,
                           "message": f"the task failed on the cluster ({type(exc).__name__}: "
                                      f"{' '.join(str(exc).split())}); a worker that dies is often "
                                      "out of memory: lower --memory-mb or give workers more memory"}
                records[tid] = rec
                if rec.get("sha256") and rec.get("stat"):
                    cache[rec["path"]] = {"stat": rec["stat"], "sha256": rec["sha256"]}
                if len(records) % 25 == 0:
                    _save_hash_cache(cache_path, cache)
                bar.update(1)
        except BaseException:
            client.cancel(futures)
            raise
        finally:
            bar.close()
        return records
    finally:
        if own_client is not None:
            own_client.close()
        if own_cluster is not None:
            own_cluster.close()


def _write_statistics(comparisons, out: pathlib.Path) -> list[str]:
    cols = ["metric", "unit", "group", "reference", "level", "n", "n_reference", "median",
            "median_reference", "difference", "ci_low", "ci_high", "ci_level", "u_statistic",
            "p_value", "p_holm", "cliffs_delta", "test_method"]
    rows = [{**c.as_row(), "unit": metric_unit(c.metric)} for c in comparisons]
    with io.atomic_output(out / STATS_CSV, "w") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(cols)
        for r in rows:
            w.writerow([_cell(r[c]) for c in cols])
    io.write_json(out / STATS_JSON, {
        "note": "p-values are descriptive numbers for a research screen, not a clinical, "
                "diagnostic or regulatory judgement",
        "comparisons": rows,
    })
    return [STATS_CSV, STATS_JSON]


# --------------------------------------------------------------------------- command line


def add_arguments(p: argparse.ArgumentParser) -> None:
    """Options of `waves screen`."""
    p.description = (
        "Analyse every stack listed in a CSV sheet on a dask cluster (local by default), "
        "resumably, and compare the groups. Exit code: 0 all stacks analysed, 3 some failed "
        "(see the table and report), 2 bad sheet or usage, 1 internal error."
    )
    p.add_argument("sheet", help="CSV with columns path, group [, replicate, date, pixel_size_um, "
                   "frame_interval_s, ...]; paths relative to the sheet's folder")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for results (reused by reruns)")
    p.add_argument("--reference", metavar="NAME", help="group the others are compared with "
                   "(default: the sheet's first group)")
    p.add_argument("--metrics", nargs="+", metavar="COLUMN",
                   help=f"table columns to compare (default: {' '.join(DEFAULT_METRICS)})")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing dask cluster "
                   "(tcp://HOST:PORT); its workers must see the stacks and DIR at the same paths")
    p.add_argument("--workers", type=int, metavar="N", help="local cluster: worker processes (default: one per core)")
    p.add_argument("--worker-memory-mb", type=float, metavar="MB",
                   help="local cluster: memory limit per worker (default: memory shared equally)")
    p.add_argument("--no-retry", action="store_true", help="do not retry stacks that failed in an earlier run")
    add_calibration_options(p)
    add_analysis_options(p)
    p.add_argument("--bootstrap", type=int, default=2000, metavar="N", help="bootstrap resamples")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap")
    p.add_argument("--holm", choices=("metric", "all"), default="metric",
                   help="Holm correction across the groups of each metric, or across all tests")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def run_from_args(args: argparse.Namespace) -> int:
    """`waves screen`: returns the exit code (0 all done, 3 some failed)."""
    # one thread per analysis: the cluster runs one analysis per worker process
    options = analysis_options_from_args(args, workers=1)
    sheet = read_sheet(args.sheet)
    result = run_screen(
        sheet,
        out=args.out,
        options=options,
        frames=parse_frames(args.frames),
        bin=args.bin,
        pixel_size_um=args.pixel_size_um,
        frame_interval_s=args.frame_interval_s,
        reference=args.reference,
        metrics=args.metrics,
        scheduler=args.scheduler,
        n_workers=args.workers,
        worker_memory_mb=args.worker_memory_mb,
        retry_failed=not args.no_retry,
        n_boot=args.bootstrap,
        seed=args.seed,
        holm_family=args.holm,
        progress=not args.quiet,
    )
    print(f"stacks          {result.n_rows} rows: {result.n_done} analysed, {result.n_reused} reused, "
          f"{result.n_failed} failed")
    for line, path, message in result.failures:
        print(f"failed          line {line} {path}: {message}")
    print(f"reference       {result.reference}")
    for c in result.comparisons:
        if c.metric in ("period_min_median", "front_speed_um_per_min_median") and math.isfinite(c.p_value):
            print(f"{c.metric:<32}{c.group}: {c.median:.4g} vs {c.median_reference:.4g} "
                  f"{metric_unit(c.metric)}, p_holm {c.p_holm:.3g}, delta {c.cliffs_delta:+.2f}")
    print(f"results in      {result.out}")
    return result.exit_code


def main(argv=None) -> int:
    """`python -m waves.screen SHEET --out DIR ...` (same as `waves screen`)."""
    p = argparse.ArgumentParser(prog="waves screen")
    add_arguments(p)
    args = p.parse_args(argv)
    try:
        return run_from_args(args)
    except WavesError as exc:
        print(f"waves: error: {' '.join(str(exc).split())}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("waves: interrupted; finished stacks are kept, rerun to go on", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover - exercised through a subprocess in the tests
    sys.exit(main())
