"""`waves screen`: its options and the command."""

from __future__ import annotations

import argparse
import math
import sys

from waves.cli_common import (
    add_analysis_options,
    add_calibration_options,
    analysis_options_from_args,
    parse_frames,
)
from waves.errors import WavesError
from waves.screen.common import DEFAULT_METRICS, EXIT_USAGE, metric_unit
from waves.screen.run import run_screen
from waves.screen.sheet import read_sheet

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
