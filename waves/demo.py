"""`waves demo`: analyse the bundled sample field and write its report.

Runs `waves.result.analyse_file` on samples/relay_aggregation_field.tif (a
simulated aggregation field, see samples/README.md) into a folder (default
./waves-demo), writes report.html there and prints where it is.
"""

from __future__ import annotations

import argparse
import pathlib

import waves
from waves.errors import InputError

__all__ = ["SAMPLE_NAME", "sample_path", "add_arguments", "run_from_args", "run_demo"]

SAMPLE_NAME = "relay_aggregation_field.tif"


def sample_path() -> pathlib.Path:
    """The bundled demo stack, next to the package in a source checkout."""
    path = pathlib.Path(waves.__file__).resolve().parents[1] / "samples" / SAMPLE_NAME
    if not path.is_file():
        raise InputError(
            f"the demo sample {path} is missing; 'waves demo' needs a source checkout of waves "
            "(git clone, then pip install -e .), or run 'waves analyse YOUR_STACK.tif --out DIR' instead"
        )
    return path


def run_demo(out="waves-demo", *, progress: bool = True) -> pathlib.Path:
    """Analyse the sample into `out` and write the report; returns report.html's path."""
    from waves.report import write_report
    from waves.result import analyse_file

    out = pathlib.Path(out)
    stack = sample_path()
    analyse_file(stack, out=out, progress=progress)
    return write_report(out, stack_path=stack, progress=progress)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `waves demo`."""
    parser.description = (
        "Analyse the bundled sample movie (a simulated aggregating cell field) and write its HTML report."
    )
    parser.add_argument("--out", default="waves-demo", metavar="DIR",
                        help="folder for the results and report (default: ./waves-demo)")
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


def run_from_args(args: argparse.Namespace) -> int:
    """Entry point of `waves demo`; prints the numbers and the report's path."""
    report = run_demo(args.out, progress=not args.quiet)
    import json

    s = json.loads((report.parent / "summary.json").read_text(encoding="utf-8"))

    from waves.cli_common import summary_lines

    print(f"sample          {sample_path()}")
    print("\n".join(summary_lines(s)))
    print(f"report          {report.resolve()}")
    return 0
