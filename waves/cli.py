"""Command line: `waves SUBCOMMAND ...`.

`main(argv=None) -> int` is testable in-process.  Exit codes: 0 done, 2 usage
or bad input (one line on stderr, no traceback), 1 internal error, 3 a screen
finished but some of its stacks failed (each failure is recorded).  `--debug`
re-raises so the traceback is visible.
"""

from __future__ import annotations

import argparse
import pathlib
import sys
from collections.abc import Sequence

from waves import __version__
from waves.cli_common import (
    add_analysis_options,
    add_calibration_options,
    add_cell_mask_option,
    add_times_option,
    analysis_options_from_args,
    parse_frames,
    summary_lines,
)
from waves.errors import WavesError

__all__ = ["main", "build_parser"]

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_USAGE = 2


class _Parser(argparse.ArgumentParser):
    """argparse that raises instead of exiting, so usage errors get exit code 2
    through the same path as every other bad input."""

    def error(self, message: str):  # noqa: D401 - argparse API
        raise WavesError(f"{self.prog}: {message} (see '{self.prog} --help')")


def _add_selection_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--channel", type=int, metavar="C", help="channel of a hyperstack to use")
    p.add_argument("--zslice", type=int, metavar="Z", help="z-slice of a hyperstack to use")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="waves",
        description="Measure and simulate relayed signalling waves in excitable media.",
    )
    parser.add_argument("--version", action="version", version=f"waves {__version__}")
    parser.add_argument(
        "--debug", action="store_true", help="show the full traceback of any error"
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p_info = sub.add_parser(
        "info", help="print shape, calibration, duration and memory needs of a stack"
    )
    p_info.add_argument("stack", help="TIFF file, folder of TIFF frames, or glob pattern")
    add_calibration_options(p_info)
    add_times_option(p_info)
    _add_selection_options(p_info)
    p_info.set_defaults(func=_cmd_info)

    p_an = sub.add_parser(
        "analyse",
        help="measure period, front speed, wavelength and spiral cores of a stack",
        description="Analyse a calibrated time-lapse stack; writes summary.json, CSV tables "
        "and calibrated TIFF maps into --out.",
    )
    p_an.add_argument("stack", help="TIFF file, folder of TIFF frames, or glob pattern")
    p_an.add_argument("--out", required=True, metavar="DIR", help="folder for the results")
    add_calibration_options(p_an)
    add_times_option(p_an)
    _add_selection_options(p_an)
    add_analysis_options(p_an)
    add_cell_mask_option(p_an)
    p_an.add_argument("--quiet", action="store_true", help="no progress bars")
    p_an.add_argument(
        "--no-report", action="store_true", help="do not write report.html (figures, movie)"
    )
    from waves.report import command as _report_cmd

    _report_cmd.add_report_options(p_an)
    p_an.set_defaults(func=_cmd_analyse)

    p_rep = sub.add_parser("report", help="write the HTML report of a results folder")
    _report_cmd.add_arguments(p_rep)
    p_rep.set_defaults(func=_report_cmd.run_from_args)

    from waves import demo as _demo

    p_demo = sub.add_parser(
        "demo", help="analyse the bundled sample field and write its HTML report"
    )
    _demo.add_arguments(p_demo)
    p_demo.set_defaults(func=_demo.run_from_args)

    from waves import simulate_cli as _simulate

    p_sim = sub.add_parser(
        "simulate", help="simulate an excitable medium and write a calibrated movie"
    )
    _simulate.add_arguments(p_sim)
    p_sim.set_defaults(func=_simulate.run_from_args)

    from waves import compare as _compare

    p_cmp = sub.add_parser(
        "compare",
        help="fit a model's dispersion relation to analysed stacks and check what it reproduces",
    )
    _compare.add_arguments(p_cmp)
    p_cmp.set_defaults(func=_compare.run_from_args)

    from waves import screen as _screen

    p_scr = sub.add_parser(
        "screen",
        help="analyse every stack of a CSV sheet on a dask cluster, resumably, and compare groups",
    )
    _screen.add_arguments(p_scr)
    p_scr.set_defaults(func=_screen.run_from_args)
    return parser


def _human_bytes(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(n) < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024.0
    raise AssertionError("unreachable")


def _duration_line(t: int, dt_s: float, times_s) -> str:
    """Duration from the recorded times when frames are missing, else t x dt."""
    nominal = t * dt_s
    span = float(times_s[-1]) + dt_s if times_s is not None and len(times_s) else nominal
    if abs(span - nominal) <= 0.5 * dt_s:
        return f"duration        {nominal / 60.0:.1f} min ({t} frames x {dt_s:g} s)"
    return f"duration        {span / 60.0:.1f} min ({t} recorded frames; {t * dt_s / 60.0:.1f} min at {dt_s:g} s each)"


def _cmd_info(args: argparse.Namespace) -> int:
    from waves import io

    info = io.inspect_stack(
        args.stack,
        channel=args.channel,
        zslice=args.zslice,
        pixel_size_um=args.pixel_size_um,
        frame_interval_s=args.frame_interval_s,
        times_csv=args.times_csv,
    )
    t, ny, nx = info.shape_tyx
    lines = [
        f"path            {info.path}",
        f"format          {info.format}"
        + (f" ({info.compression})" if info.compression not in (None, "none") else ""),
        f"axes in file    {info.axes}",
        f"shape (t,y,x)   {t} x {ny} x {nx}",
        f"dtype           {info.dtype}",
        f"size on disk    {_human_bytes(info.nbytes)}"
        + ("  (memory-mapped)" if info.memory_mapped else ""),
    ]
    cal = info.calibration
    if cal is None:
        lines.append(f"calibration     MISSING: {info.calibration_problem}")
    else:
        lines += [
            f"pixel size      {cal.pixel_size_um:g} um  (from {cal.pixel_size_origin})",
            f"frame interval  {cal.frame_interval_s:g} s  (from {cal.frame_interval_origin})",
            _duration_line(t, cal.frame_interval_s, info.times_s),
            f"field size      {nx * cal.pixel_size_um / 1000:.2f} mm x "
            f"{ny * cal.pixel_size_um / 1000:.2f} mm",
        ]
    if cal is not None and info.times_s is not None:
        from waves.errors import InputError
        from waves.preprocess.timebase import describe_times

        try:
            lines.append(f"frame times     {describe_times(info.times_s, cal.frame_interval_s, info.times_origin)}")
        except InputError as exc:  # info describes; the analysis refuses such times
            lines.append(f"frame times     {info.times_origin}; UNUSABLE: {exc}")
    whole = t * ny * nx * 4 * 3  # float32 signal + phase + amplitude, all in memory
    tile = info.analysis_memory_bytes
    lines.append(
        f"analysis memory {_human_bytes(tile)} working set (tiled); "
        f"{_human_bytes(whole)} if held whole as float32"
    )
    for w in info.warnings:
        lines.append(f"warning         {w}")
    print("\n".join(lines))
    return EXIT_OK


def _cmd_analyse(args: argparse.Namespace) -> int:
    from waves.result import analyse_file

    options = analysis_options_from_args(args)
    result = analyse_file(
        args.stack,
        out=args.out,
        options=options,
        frames=parse_frames(args.frames),
        bin=args.bin,
        channel=args.channel,
        zslice=args.zslice,
        pixel_size_um=args.pixel_size_um,
        frame_interval_s=args.frame_interval_s,
        times_csv=args.times_csv,
        progress=not args.quiet,
        cell_mask=args.mask,
    )
    summary_path = pathlib.Path(args.out) / "summary.json"
    print("\n".join(summary_lines(result.summary)))
    print(f"results in      {summary_path.parent}")
    if not args.no_report:
        from waves.report import write_report

        report = write_report(
            args.out,
            stack_path=args.stack,
            movie=not args.no_movie,
            kymograph_line_um=args.kymograph,
            movie_frames=args.movie_frames,
            progress=not args.quiet,
        )
        print(f"report          {report}")
    return EXIT_OK


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if getattr(args, "func", None) is None:
            parser.print_help()
            return EXIT_USAGE
        return int(args.func(args))
    except SystemExit as exc:  # --help and --version exit through argparse
        code = exc.code
        return code if isinstance(code, int) else (0 if code is None else EXIT_USAGE)
    except KeyboardInterrupt:
        print("waves: interrupted", file=sys.stderr)
        return 130
    except WavesError as exc:
        if debug:
            raise
        message = " ".join(str(exc).split())
        print(f"waves: error: {message}", file=sys.stderr)
        return EXIT_USAGE
    except Exception as exc:  # internal error: say so, keep it to one line
        if debug:
            raise
        print(
            f"waves: internal error: {type(exc).__name__}: {exc} "
            "(rerun with --debug for the traceback, and please report it)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


def main_exit() -> None:
    """Console-script entry point."""
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    main_exit()
