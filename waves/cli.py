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


def _build_info(p: argparse.ArgumentParser) -> None:
    p.add_argument("stack", help="TIFF file, folder of TIFF frames, or glob pattern")
    add_calibration_options(p)
    add_times_option(p)
    _add_selection_options(p)
    p.set_defaults(func=_cmd_info)


def _build_analyse(p: argparse.ArgumentParser) -> None:
    from waves.report import command as _report_cmd

    p.add_argument("stack", help="TIFF file, folder of TIFF frames, or glob pattern")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the results")
    add_calibration_options(p)
    add_times_option(p)
    _add_selection_options(p)
    add_analysis_options(p)
    add_cell_mask_option(p)
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.add_argument("--no-report", action="store_true", help="do not write report.html (figures, movie)")
    _report_cmd.add_report_options(p)
    p.set_defaults(func=_cmd_analyse)


def _build_report(p: argparse.ArgumentParser) -> None:
    from waves.report import command as _report_cmd

    _report_cmd.add_arguments(p)
    p.set_defaults(func=_report_cmd.run_from_args)


def _build_from(module: str):
    """A subcommand whose module has add_arguments / run_from_args."""

    def build(p: argparse.ArgumentParser) -> None:
        import importlib

        mod = importlib.import_module(module)
        mod.add_arguments(p)
        p.set_defaults(func=mod.run_from_args)

    return build


# name -> (one-line help, description or None, builder); a builder imports its subsystem
COMMANDS = {
    "info": ("print shape, calibration, duration and memory needs of a stack", None, _build_info),
    "analyse": (
        "measure period, front speed, wavelength and spiral cores of a stack",
        "Analyse a calibrated time-lapse stack; writes summary.json, CSV tables and calibrated TIFF maps into --out.",
        _build_analyse,
    ),
    "report": ("write the HTML report of a results folder", None, _build_report),
    "demo": ("analyse the bundled sample field and write its HTML report", None, _build_from("waves.demo")),
    "simulate": ("simulate an excitable medium and write a calibrated movie", None, _build_from("waves.simulate_cli")),
    "compare": ("fit a model's dispersion relation to analysed stacks and check what it reproduces", None,
                _build_from("waves.compare")),
    "screen": ("analyse every stack of a CSV sheet on a dask cluster, resumably, and compare groups", None,
               _build_from("waves.screen")),
}


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The whole parser; with `only` (a command name) only that command's
    options are built, the others are listed by name and help, so that a
    command imports its own subsystem and no other."""
    parser = _Parser(
        prog="waves",
        description="Measure and simulate relayed signalling waves in excitable media.",
    )
    parser.add_argument("--version", action="version", version=f"waves {__version__}")
    parser.add_argument(
        "--debug", action="store_true", help="show the full traceback of any error"
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (help_, description, builder) in COMMANDS.items():
        p = sub.add_parser(name, help=help_, description=description)
        if only is None or only == name:
            builder(p)
    return parser


def _command_of(argv: Sequence[str]) -> str | None:
    """The subcommand named on the command line (the first word that is not
    a top-level option), or None (none, or a name that is not a command:
    argparse then says so)."""
    for word in argv:
        if not word.startswith("-"):
            return word if word in COMMANDS else None
    return None


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
        parser = build_parser(_command_of(argv) or "")  # "": no command named, none built
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
