"""The `waves simulate` command: options (`add_arguments`) and the run
(`run_from_args`) on top of `waves.simulate.simulate`."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from waves.cli_common import parse_settings
from waves.errors import WavesError
from waves.models.grid import BOUNDARIES
from waves.models.heterogeneity import Heterogeneity, Ramp
from waves.models.stimulus import INITIAL_CONDITIONS, ROTATIONS, Pacemaker
from waves.simulate import DTYPES, RENDERS, simulate

__all__ = ["add_arguments", "run_from_args"]


def _read_toml(path: str) -> dict:
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    p = Path(path)
    if not p.is_file():
        raise WavesError(f"parameter file {path!r} not found; give a TOML file of name = value")
    try:
        with p.open("rb") as fh:
            data = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise WavesError(f"parameter file {path!r} is not valid TOML: {exc}") from None
    if "params" in data and isinstance(data["params"], dict) and len(data) == 1:
        data = data["params"]
    for key, val in data.items():
        if isinstance(val, bool) or not isinstance(val, (int, float)):
            raise WavesError(
                f"parameter file {path!r}: {key!r} must be a number (name = value), got {val!r}"
            )
    return {k: float(v) for k, v in data.items()}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the `simulate` options to `parser`."""
    parser.add_argument("model", help="model name: barkley, fhn, nagumo (or relay if installed)")
    parser.add_argument("--out", required=True, metavar="FILE.tif",
                        help="output movie; the ground truth goes to FILE.json beside it")
    parser.add_argument("--size", nargs="+", default=["256"], metavar="N",
                        help="field size in pixels: N (square) or NY NX (default 256)")
    parser.add_argument("--pixel-size", dest="pixel_size_um", type=float, metavar="UM",
                        help="pixel size in micrometres (default: the model's grid step)")
    parser.add_argument("--minutes", type=float, default=100.0,
                        help="simulated duration in minutes (default 100)")
    parser.add_argument("--frame-interval", dest="frame_interval_s", type=float, default=20.0,
                        metavar="S", help="seconds between frames (default 20)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--set", dest="set_params", action="append", default=[],
                        metavar="NAME=VALUE",
                        help="model parameter or numeric (dt, diffusion, time_scale_s, "
                             "length_scale_um); repeatable; wins over --params")
    parser.add_argument("--params", dest="params_file", metavar="FILE.toml",
                        help="TOML file of name = value parameters")
    parser.add_argument("--initial", choices=INITIAL_CONDITIONS, default="spiral",
                        help="initial condition (default spiral)")
    parser.add_argument("--rotation", choices=ROTATIONS, default="counterclockwise",
                        help="spiral rotation as displayed (default counterclockwise)")
    parser.add_argument("--boundary", choices=BOUNDARIES, default="noflux")
    parser.add_argument("--observable", help="model variable to write (default the first)")
    parser.add_argument("--dtype", choices=DTYPES, default="uint16",
                        help="uint16 (scaled over the model's fixed range) or float32 (raw)")
    parser.add_argument("--render", choices=RENDERS,
                        help="write a dark-field-like camera rendering instead of the variable")
    parser.add_argument("--pacemaker", nargs=3, action="append", default=[], type=float,
                        metavar=("Y_UM", "X_UM", "PERIOD_MIN"),
                        help="a pacemaker disc firing every PERIOD_MIN; repeatable")
    parser.add_argument("--vary", nargs=3, action="append", default=[],
                        metavar=("NAME", "REL_SD", "CORR_UM"),
                        help="random spatial variation of a parameter; repeatable")
    parser.add_argument("--ramp", nargs=3, action="append", default=[],
                        metavar=("NAME", "START", "END"),
                        help="parameter changing linearly over the run; repeatable")
    parser.add_argument("--noise", type=float, default=0.0,
                        help="additive noise intensity on the first variable (default 0)")
    parser.add_argument("--polarity", choices=("bright", "dark"), default="bright",
                        help="with --render darkfield: excited bands bright or dark")
    parser.add_argument("--center", nargs=2, type=float, metavar=("Y_UM", "X_UM"),
                        help="spiral core / target / pacing site (default: field centre)")
    parser.add_argument("--random-pacemakers", nargs=3, type=float,
                        metavar=("N", "PERIOD_MIN_LOW", "PERIOD_MIN_HIGH"),
                        help="N spontaneous pacemakers at random sites (seeded), each with a "
                             "random period in the range and a random first firing")
    parser.add_argument("--threads", type=int,
                        help="compiled-kernel threads (default: automatic)")
    parser.add_argument("--oversample", type=int, metavar="N",
                        help="simulate on a grid N times finer than the pixels (default: automatic)")
    parser.add_argument("--transient", dest="transient_min", type=float, metavar="MIN",
                        help="ground-truth periods from crossings after MIN minutes "
                             "(default: the first third of the run is transient)")
    parser.add_argument("--no-truth-analysis", action="store_true",
                        help="skip analysing the clean field for ground-truth cores and speed")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


def _float(text: str, what: str) -> float:
    try:
        return float(text)
    except ValueError:
        raise WavesError(f"{what}: {text!r} is not a number") from None


def run_from_args(args: argparse.Namespace) -> int:
    """Run `waves simulate` from parsed arguments; returns the exit code."""
    params = _read_toml(args.params_file) if args.params_file else {}
    params.update(parse_settings(args.set_params))
    sizes = []
    for s in args.size:
        try:
            sizes.append(int(s))
        except ValueError:
            raise WavesError(f"--size: {s!r} is not an integer") from None
    if len(sizes) not in (1, 2):
        raise WavesError("--size takes N or NY NX")
    hets = tuple(
        Heterogeneity(name, _float(sd, "--vary REL_SD"), _float(c, "--vary CORR_UM"))
        for name, sd, c in args.vary
    )
    ramps = tuple(
        Ramp(name, _float(a, "--ramp START"), _float(b, "--ramp END")) for name, a, b in args.ramp
    )
    pacers = tuple(Pacemaker(y, x, p) for y, x, p in args.pacemaker)
    spontaneous = None
    if args.random_pacemakers is not None:
        n, lo, hi = args.random_pacemakers
        spontaneous = (n, lo, hi)
    style = None
    if args.render == "darkfield":
        from waves.render import DarkfieldStyle

        style = DarkfieldStyle(polarity=args.polarity)
    res = simulate(
        args.model, out=args.out, size=sizes, pixel_size_um=args.pixel_size_um,
        minutes=args.minutes, frame_interval_s=args.frame_interval_s, seed=args.seed,
        params=params, initial=args.initial, rotation=args.rotation, boundary=args.boundary,
        heterogeneity=hets, pacemakers=pacers, ramps=ramps, noise=args.noise,
        observable=args.observable, dtype=args.dtype, render=args.render,
        darkfield_style=style, center_um=args.center, threads=args.threads,
        truth_analysis=not args.no_truth_analysis,
        random_pacemakers=spontaneous, oversample=args.oversample,
        transient_min=args.transient_min,
        progress=not args.quiet,
    )
    for w in res.warnings:
        print(f"warning: {w}", file=sys.stderr)
    per = res.truth["period_min"]
    per_text = "no period measured" if per is None else f"period {per['median']:.2f} min"
    if not args.quiet:
        print(
            f"wrote {res.path} ({res.n_frames} frames, {res.calibration.pixel_size_um:g} um/px, "
            f"{res.calibration.frame_interval_s:g} s/frame; {per_text}; "
            f"{res.cell_updates_per_s:.3g} cell-updates/s) and {res.sidecar_path}",
            file=sys.stderr,
        )
    return 0
