"""`waves report RESULTS_DIR`: (re)write the HTML report of a results folder,
e.g. one written with --no-report or by an older version."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run_from_args", "add_report_options"]


def add_report_options(parser: argparse.ArgumentParser) -> None:
    """Options shared by `waves report` and `waves analyse` (kymograph line, movie)."""
    parser.add_argument(
        "--kymograph", type=float, nargs=4, metavar=("X0", "Y0", "X1", "Y1"),
        help="kymograph line in um of the recorded image (default: across the field through the main centre)",
    )
    parser.add_argument("--no-movie", action="store_true", help="do not write or embed the movie")
    parser.add_argument("--movie-frames", type=int, default=60, metavar="N",
                        help="frames in the movie, at most 120 (default 60)")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `waves report`."""
    parser.description = (
        "Write report.html (figures, movie, tables) into a folder written by 'waves analyse'."
    )
    parser.add_argument("results", metavar="DIR", help="results folder of 'waves analyse'")
    parser.add_argument("--stack", metavar="STACK",
                        help="the analysed stack, for phase pictures (default: the path in summary.json)")
    add_report_options(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


def run_from_args(args: argparse.Namespace) -> int:
    """Entry point of `waves report`; prints the report's path."""
    from waves.report.html import write_report

    path = write_report(
        args.results,
        stack_path=args.stack,
        movie=not args.no_movie,
        kymograph_line_um=args.kymograph,
        movie_frames=args.movie_frames,
        progress=not args.quiet,
    )
    print(f"report          {path.resolve()}")
    return 0
