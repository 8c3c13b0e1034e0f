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

from waves.screen.command import add_arguments, main, run_from_args
from waves.screen.common import (
    DEFAULT_METRICS,
    EXIT_INTERNAL,
    EXIT_OK,
    EXIT_SOME_FAILED,
    EXIT_USAGE,
    METRIC_UNITS,
    metric_unit,
)
from waves.screen.results import ScreenResult, combined_table, metric_columns
from waves.screen.run import run_screen
from waves.screen.sheet import Sheet, SheetRow, read_sheet
from waves.screen.tasks import analyse_task, analysis_spec, stack_key

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
    "EXIT_INTERNAL",
    "metric_unit",
    "main",
]
