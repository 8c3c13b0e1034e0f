"""Simulate an excitable medium and write a calibrated movie with its ground truth.

Python API: `simulate(model, *, out=..., ...) -> SimulationResult`; command
line: `waves simulate MODEL --out FILE.tif [options]` (`waves.simulate_cli`).
Ground truth and the grid-resolution check: `waves.simulate_truth`.

Calibration: one output pixel is `pixel_size_um`; the model grid step is
h = pixel_size_um / length_scale_um model units.  When h is coarser than the
model's default step by more than half, the grid is refined by an integer
factor (`oversample`) and frames are block means.  Frames are `frame_interval_s`
apart; the model advances frame_interval_s / time_scale_s model time units per
frame, in equal explicit steps no larger than the requested dt.

Outputs (when `out` is given): the movie, streamed frame by frame through
`waves.io.StackWriter` (never held whole), and the sidecar FILE.json (same
name, .json suffix; written atomically) holding the model, every parameter,
seed, numerics, calibration, wall time, cell updates per second and the
ground truth measured on the clean field.

Observable scaling: float32 frames hold the raw variable; uint16 frames hold
(value - lo) / (hi - lo) * 65535, rounded and clipped, with (lo, hi) the
model's fixed `observable_ranges` (Barkley u, v: 0..1; FitzHugh-Nagumo u:
-2.5..2.5, v: -1.5..1.5), recorded in the sidecar.  `render='darkfield'` maps
the same scaled value (clipped to 0..1) through `waves.render.DarkfieldRenderer`.

Ground truth: variable 0 is recorded every step at probe pixels; its upward
crossings of the model's threshold (linearly interpolated between steps)
after the transient (`transient_min`, default the first third of the run)
give one period per probe (median of the intervals); the sidecar reports their
median, quartiles, range and count.

Grid resolution: before the run, the front speed at the run's grid and time
step is compared with its converged value by a cheap 1-D estimate
(`waves.models.resolution`); the estimate goes to the sidecar's
numerics.front_resolution, and an error above FRONT_SPEED_TOLERANCE (2 %) adds
a warning (SimulationResult.warnings, the sidecar's warnings, and stderr from
the command line) naming the error and the refinement that fixes it.
"""

from __future__ import annotations

import bisect
import dataclasses
import math
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from waves import __version__
from waves.errors import WavesError
from waves.models import get_model
from waves.models.base import NUMERIC_NAMES, Integrator, check_time_step, stable_dt_limit
from waves.models.crossings import period_from_crossings, upward_crossings
from waves.models.grid import BOUNDARIES, Grid
from waves.models.heterogeneity import Heterogeneity, Ramp, add_noise
from waves.models.stimulus import (
    INITIAL_CONDITIONS,
    ROTATIONS,
    STIMULUS_RADIUS,
    Pacemaker,
    disc,
    initial_state,
)
from waves.models.stimulus import (
    random_pacemakers as random_pacemakers_at,
)
from waves.simulate_truth import (
    FRONT_SPEED_TOLERANCE,
    clean_field_truth,
    front_resolution_check,
    summarise,
)
from waves.units import Calibration

if TYPE_CHECKING:  # the renderer is imported only when a rendering is asked for
    from waves.render import DarkfieldStyle

__all__ = [
    "simulate",
    "SimulationResult",
    "upward_crossings",
    "period_from_crossings",
    "FRONT_SPEED_TOLERANCE",
    "DTYPES",
    "RENDERS",
]

DTYPES = ("uint16", "float32")
RENDERS = ("darkfield",)
# frames held in memory when out=None are refused above this size
_MAX_IN_MEMORY_BYTES = 1 << 30
# noise kicks are applied at least this often (model time units)
_NOISE_INTERVAL = 0.05
# a grid coarser than spacing * this factor is refined (oversampled)
_MAX_COARSENING = 1.5
# fraction of the run treated as transient for the ground-truth period
_TRANSIENT_FRACTION = 1.0 / 3.0


@dataclass(frozen=True)
class SimulationResult:
    """What a run produced.

    path, sidecar_path: the movie and its JSON sidecar (None when out=None).
    frames: (t, y, x) movie in memory when out=None, else None (streamed).
    truth: ground truth measured on the clean field (see module doc).
    metadata: the sidecar content.  final_state: float32 (nvar, y, x) on the
    simulation grid.  wall_time_s: whole run; cell_updates_per_s: grid cells
    x steps / time spent in the compiled steps.
    """

    path: Path | None
    sidecar_path: Path | None
    frames: np.ndarray | None
    truth: dict
    metadata: dict
    calibration: Calibration
    n_frames: int
    final_state: np.ndarray
    wall_time_s: float
    cell_updates_per_s: float
    warnings: tuple[str, ...] = ()


# --------------------------------------------------------------------------- helpers


def _size(size) -> tuple[int, int]:
    if isinstance(size, (int, np.integer)):
        size = (size, size)
    try:
        vals = [int(s) for s in size]
        if any(float(s) != int(s) for s in size):
            raise ValueError
    except (TypeError, ValueError):
        raise WavesError(f"size must be N or (NY, NX) integers, got {size!r}") from None
    if len(vals) == 1:
        vals = vals * 2
    if len(vals) != 2 or min(vals) < 1:
        raise WavesError(
            f"size must be one or two positive integers (rows, columns), got {size!r}; "
            "e.g. --size 256 or --size 256 384"
        )
    return vals[0], vals[1]


def _positive(name: str, value, hint: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise WavesError(f"{name} must be a number, got {value!r}") from None
    if not (math.isfinite(v) and v > 0):
        raise WavesError(f"{name} must be a positive number, got {value!r}; {hint}")
    return v


def _upsample(mask: np.ndarray, factor: int) -> np.ndarray:
    if factor == 1:
        return mask
    return np.repeat(np.repeat(mask, factor, axis=0), factor, axis=1)


def _block_mean(field: np.ndarray, factor: int) -> np.ndarray:
    if factor == 1:
        return field
    ny, nx = field.shape
    return field.reshape(ny // factor, factor, nx // factor, factor).mean(axis=(1, 3))


class _Output:
    """Turns simulation states into output frames and sends them on."""

    def __init__(self, *, spec, observable, dtype, render, style, shape_yx, oversample, seed,
                 writer, keep, clean=None):
        self.clean = clean
        self.var = spec.variables.index(observable)
        self.lo, self.hi = spec.observable_ranges[observable]
        self.dtype = dtype
        self.oversample = oversample
        self.writer = writer
        self.frames = keep
        self.count = 0
        self.renderer = None
        if render == "darkfield":
            from waves.render import DarkfieldRenderer

            self.renderer = DarkfieldRenderer(shape_yx, style=style, seed=seed)

    def emit(self, state: np.ndarray) -> None:
        field = _block_mean(state[self.var], self.oversample)
        if self.clean is not None:
            self.clean.write(self.count, field[None].astype(np.float32))
        if self.renderer is not None:
            e = np.clip((field - self.lo) / (self.hi - self.lo), 0.0, 1.0).astype(np.float32)
            frame = self.renderer.frame(e, self.count)
        elif self.dtype == "uint16":
            scaled = (field.astype(np.float64) - self.lo) * (65535.0 / (self.hi - self.lo))
            frame = np.clip(np.rint(scaled), 0, 65535).astype(np.uint16)
        else:
            frame = field.astype(np.float32)
        if self.writer is not None:
            self.writer.write(frame)
        if self.frames is not None:
            self.frames[self.count] = frame
        self.count += 1


# --------------------------------------------------------------------------- API


def simulate(
    model: str,
    *,
    out: str | Path | None = None,
    size: int | Sequence[int] = (256, 256),
    pixel_size_um: float | None = None,
    minutes: float = 100.0,
    frame_interval_s: float = 20.0,
    seed: int = 0,
    params: dict | None = None,
    initial: str = "spiral",
    rotation: str = "counterclockwise",
    center_um: tuple[float, float] | None = None,
    boundary: str = "noflux",
    occupancy: np.ndarray | None = None,
    obstacles: np.ndarray | None = None,
    heterogeneity: Sequence[Heterogeneity] = (),
    pacemakers: Sequence[Pacemaker] = (),
    random_pacemakers: tuple[int, float, float] | None = None,
    ramps: Sequence[Ramp] = (),
    noise: float = 0.0,
    observable: str | None = None,
    dtype: str = "uint16",
    render: str | None = None,
    darkfield_style: DarkfieldStyle | None = None,
    oversample: int | None = None,
    probes_um: Sequence[tuple[float, float]] | None = None,
    threads: int | None = None,
    truth_analysis: bool = True,
    transient_min: float | None = None,
    progress: bool = False,
) -> SimulationResult:
    """Run `model` and write (or return) a calibrated movie with its ground truth.

    truth_analysis: also run the analyser (`waves.analyse.analyse_movie`) on
    the clean observable, before rendering and noise, and record the spiral
    cores, period, front speed and wavelength it finds as ground truth.

    size: N or (rows, cols) output pixels.  pixel_size_um: output pixel size
    (default: the model's grid step times its length scale).  minutes:
    simulated duration.  frame_interval_s: seconds between frames.
    params: model parameters and the numerics 'dt' (model time units),
    'diffusion' (D of variable 0, model units), 'time_scale_s' (s per model
    time unit), 'length_scale_um' (um per model length unit).
    initial: 'spiral', 'target', 'pacing', 'rest' or 'random'; rotation of
    the spiral ('counterclockwise' or 'clockwise' as displayed); center_um
    (y_um, x_um) of the spiral core / target / pacing site (default: field
    centre).  'pacing' adds a pacemaker at the centre firing every 10 model
    time units (an invented default) unless pacemakers are given.
    occupancy (float 0..1) and obstacles (bool): masks of the output size.
    heterogeneity: spatial variation of parameters; ramps: linear changes
    over time (minutes); pacemakers: sites firing periodically;
    random_pacemakers: (n, period_min_low, period_min_high) spontaneous
    pacemakers at seeded random sites with random periods and first firings;
    noise: additive noise intensity on variable 0 (per sqrt(model time)).
    observable: a model variable (default the first).  dtype: 'uint16'
    (scaled over the model's fixed range) or 'float32' (raw).  render: None
    or 'darkfield' (drawn with `darkfield_style`, a waves.render.DarkfieldStyle;
    the default style when None).  oversample: grid refinement factor (None:
    automatic).  probes_um: (y_um, x_um) points for the ground truth (default
    a 4 x 4 lattice).  threads: compiled-kernel threads (None: automatic, see
    `waves.models.base.Integrator`).  transient_min: ground-truth periods
    from crossings after this time (default: a third of the run).  progress:
    tqdm bar on stderr.
    With out=None the frames are returned in memory (SimulationResult.frames),
    else streamed to `out` and frames is None.
    """
    t_wall0 = time.perf_counter()
    spec = get_model(model)
    ny_out, nx_out = _size(size)
    minutes = _positive("minutes", minutes, "give the simulated duration, e.g. --minutes 60")
    frame_interval_s = _positive(
        "frame interval (s)", frame_interval_s, "give e.g. --frame-interval 20"
    )
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise WavesError(f"seed must be a non-negative integer, got {seed!r}")
    seed = int(seed)
    if boundary not in BOUNDARIES:
        raise WavesError(f"unknown boundary {boundary!r}; use one of {', '.join(BOUNDARIES)}")
    if dtype not in DTYPES:
        raise WavesError(f"unknown dtype {dtype!r}; use one of {', '.join(DTYPES)}")
    if render is not None and render not in RENDERS:
        raise WavesError(f"unknown rendering {render!r}; use one of {', '.join(RENDERS)}")
    if initial not in INITIAL_CONDITIONS:
        raise WavesError(
            f"unknown initial condition {initial!r}; use one of {', '.join(INITIAL_CONDITIONS)}"
        )
    if rotation not in ROTATIONS:
        raise WavesError(f"unknown rotation {rotation!r}; use one of {', '.join(ROTATIONS)}")
    observable = spec.variables[0] if observable is None else observable
    if observable not in spec.variables:
        raise WavesError(
            f"model {spec.name!r} has no variable {observable!r}; "
            f"choose one of {', '.join(spec.variables)}"
        )
    noise = float(noise)
    if not (math.isfinite(noise) and noise >= 0):
        raise WavesError(f"noise intensity must be >= 0, got {noise!r}")

    # ---- parameters and numerics
    given = dict(params or {})
    numerics = {k: given.pop(k) for k in list(given) if k in NUMERIC_NAMES}
    model_params = spec.resolve_params(given)
    time_scale_s = _positive(
        "time_scale_s", numerics.get("time_scale_s", spec.time_scale_s), "seconds per model time unit"
    )
    length_scale_um = _positive(
        "length_scale_um", numerics.get("length_scale_um", spec.length_scale_um),
        "micrometres per model length unit",
    )
    diffusion = float(numerics.get("diffusion", spec.diffusion))
    if not (math.isfinite(diffusion) and diffusion >= 0):
        raise WavesError(f"diffusion must be >= 0, got {diffusion!r}")
    if pixel_size_um is None:
        pixel_size_um = spec.spacing * length_scale_um
    pixel_size_um = _positive("pixel size (um)", pixel_size_um, "give e.g. --pixel-size 50")
    h_out = pixel_size_um / length_scale_um
    if oversample is None:
        oversample = max(1, math.ceil(h_out / (spec.spacing * _MAX_COARSENING)))
    if isinstance(oversample, bool) or int(oversample) != oversample or oversample < 1:
        raise WavesError(f"oversample must be a positive integer, got {oversample!r}")
    oversample = int(oversample)
    h = h_out / oversample
    ny, nx = ny_out * oversample, nx_out * oversample
    ndim = 1 if min(ny, nx) == 1 else 2
    for r in ramps:
        if r.param not in spec.param_names:
            raise WavesError(
                f"cannot ramp unknown parameter {r.param!r}; valid names: "
                f"{', '.join(spec.param_names)}"
            )
    run_params = [model_params] + [
        {**model_params, r.param: val} for r in ramps for val in (r.start, r.end)
    ]
    for q in run_params[1:]:
        spec.params_type(**q)  # a ramp may not leave the model's valid range
    n_frames = max(2, int(round(minutes * 60.0 / frame_interval_s)) + 1)
    run_min = (n_frames - 1) * frame_interval_s / 60.0

    # ---- grid, masks, heterogeneity
    def _mask(m, name):
        if m is None:
            return None
        m = np.asarray(m)
        if m.shape != (ny_out, nx_out):
            raise WavesError(
                f"{name} mask has shape {m.shape}, the output is {(ny_out, nx_out)}; "
                "give a mask of the output size"
            )
        return _upsample(m, oversample)

    grid = Grid((ny, nx), h, boundary, _mask(occupancy, "occupancy"), _mask(obstacles, "obstacle"))
    seeds = np.random.SeedSequence(seed).spawn(4)  # initial, heterogeneity, noise, pacemakers
    het_seeds = seeds[1].spawn(len(heterogeneity))
    multipliers = {}
    for k, het in enumerate(heterogeneity):
        if het.param not in spec.param_names:
            raise WavesError(
                f"cannot vary unknown parameter {het.param!r}; valid names: "
                f"{', '.join(spec.param_names)}"
            )
        if het.param in multipliers:
            raise WavesError(f"parameter {het.param!r} is varied twice; give it once")
        multipliers[het.param] = het.multiplier(
            (ny, nx), pixel_size_um=pixel_size_um / oversample,
            seed=np.random.default_rng(het_seeds[k]), periodic=grid.periodic,
        )
    # ranges every parameter field takes over the run (ramps included)
    field_ranges = {
        name: (min(q[name] for q in run_params) * float(m.min()),
               max(q[name] for q in run_params) * float(m.max()))
        for name, m in multipliers.items()
    }

    # ---- time step: the largest the scheme allows over the whole run
    reaction_scale = 1.0 if grid.occupancy is None else float(grid.occupancy.max())
    if "dt" in numerics:
        dt_max = _positive("dt", numerics["dt"], "give the time step in model units")
    else:
        dt_max = spec.dt_fraction * min(
            stable_dt_limit(spec, q, spacing=h, diffusion=diffusion, ndim=ndim,
                            field_ranges=field_ranges, reaction_scale=reaction_scale)
            for q in run_params
        )
    for q in run_params:
        check_time_step(spec, q, dt=dt_max, spacing=h, diffusion=diffusion, ndim=ndim,
                        field_ranges=field_ranges, reaction_scale=reaction_scale)
    frame_model = frame_interval_s / time_scale_s
    steps_per_frame = max(1, math.ceil(frame_model / dt_max * (1 - 1e-12)))
    dt = frame_model / steps_per_frame
    if transient_min is None:
        t_after_min = _TRANSIENT_FRACTION * run_min
    else:
        try:
            t_after_min = float(transient_min)
        except (TypeError, ValueError):
            t_after_min = math.nan
        if not (math.isfinite(t_after_min) and 0 <= t_after_min < run_min):
            raise WavesError(
                f"transient_min must lie in 0..{run_min:g} min (the run), got {transient_min!r}"
            )
    resolution, run_warnings = front_resolution_check(
        spec, model_params, h=h, dt=dt, diffusion=diffusion, pixel_size_um=pixel_size_um,
        oversample=oversample,
    )

    # ---- initial state, stimuli, probes
    field_um = (ny_out * pixel_size_um, nx_out * pixel_size_um)

    def _inside(y_um, x_um, what):
        if not (-0.5 * pixel_size_um <= y_um <= field_um[0] - 0.5 * pixel_size_um
                and -0.5 * pixel_size_um <= x_um <= field_um[1] - 0.5 * pixel_size_um):
            raise WavesError(
                f"{what} at (y, x) = ({y_um:g}, {x_um:g}) um lies outside the field "
                f"(0..{field_um[0] - pixel_size_um:g}, 0..{field_um[1] - pixel_size_um:g} um)"
            )

    if center_um is None:
        center_yx = ((ny - 1) / 2.0, (nx - 1) / 2.0)
    else:
        try:
            cy_um, cx_um = (float(c) for c in center_um)
        except (TypeError, ValueError):
            raise WavesError(f"center_um must be (y_um, x_um), got {center_um!r}") from None
        _inside(cy_um, cx_um, "the centre")
        center_um = (cy_um, cx_um)
        center_yx = (center_um[0] / pixel_size_um * oversample + (oversample - 1) / 2.0,
                     center_um[1] / pixel_size_um * oversample + (oversample - 1) / 2.0)
    state = None
    if spec.initial_state is not None:
        state = spec.initial_state(
            dict(model_params), (ny, nx), spacing=h, kind=initial, rotation=rotation,
            center_yx=center_yx, rng=np.random.default_rng(seeds[0]), dt=dt,
            diffusion=diffusion,
        )
    if state is None:
        state = initial_state(
            spec, model_params, (ny, nx), spacing=h, kind=initial, rotation=rotation,
            center_yx=center_yx, rng=np.random.default_rng(seeds[0]),
        )
    pacers = list(pacemakers)
    if random_pacemakers is not None:
        try:
            n_rand, lo_min, hi_min = random_pacemakers
        except (TypeError, ValueError):
            raise WavesError(
                "random_pacemakers must be (n, period_min_low, period_min_high)"
            ) from None
        if n_rand != int(n_rand) or n_rand < 0:
            raise WavesError(f"number of random pacemakers must be a whole number >= 0, got {n_rand}")
        pacers += random_pacemakers_at(
            int(n_rand), field_um=(field_um[0] - pixel_size_um, field_um[1] - pixel_size_um),
            period_min=(float(lo_min), float(hi_min)), rng=np.random.default_rng(seeds[3]),
        )
    if initial == "pacing" and not pacers:
        cy_um = center_yx[0] * pixel_size_um / oversample
        cx_um = center_yx[1] * pixel_size_um / oversample
        # default pacing period: 10 model time units (invented default)
        pacers = [Pacemaker(cy_um, cx_um, 10.0 * time_scale_s / 60.0)]
    events: dict[int, np.ndarray] = {}
    excited = spec.excited(model_params)
    for pm in pacers:
        _inside(pm.y_um, pm.x_um, "a pacemaker")
        radius_px = (STIMULUS_RADIUS / h if pm.radius_um is None
                     else pm.radius_um / pixel_size_um * oversample)
        where = disc((ny, nx), (pm.y_um / pixel_size_um * oversample,
                                pm.x_um / pixel_size_um * oversample), radius_px)
        if grid.obstacles is not None:
            where = where & ~grid.obstacles
        for t_min in pm.firing_times_min(run_min):
            k = int(round(t_min * 60.0 / time_scale_s / dt))
            events[k] = where if k not in events else (events[k] | where)
    if grid.obstacles is not None:
        rest = spec.rest(model_params)
        for k in range(state.shape[0]):
            state[k][grid.obstacles] = np.float32(rest[k])
    if probes_um is None:
        fr = (0.125, 0.375, 0.625, 0.875)
        probes = [(int(fy * (ny - 1) + 0.5), int(fx * (nx - 1) + 0.5)) for fy in fr for fx in fr]
    else:
        probes = []
        for y_um, x_um in probes_um:
            i = int(round(y_um / pixel_size_um * oversample + (oversample - 1) / 2.0))
            j = int(round(x_um / pixel_size_um * oversample + (oversample - 1) / 2.0))
            if not (0 <= i < ny and 0 <= j < nx):
                raise WavesError(f"probe ({y_um}, {x_um}) um lies outside the field")
            probes.append((i, j))
    if grid.obstacles is not None:
        probes = [p for p in probes if not grid.obstacles[p]]
    probes = sorted(set(probes), key=probes.index)
    probe_arr = np.asarray(probes, np.int64).reshape(-1, 2)

    integ = Integrator(spec, grid, model_params, state, dt=dt, diffusion=diffusion,
                       multipliers=multipliers, probes_yx=probe_arr, threads=threads)

    # ---- output
    calibration = Calibration(pixel_size_um, frame_interval_s, "simulation", "simulation")
    style = None
    if render == "darkfield":
        from waves.render import DarkfieldStyle

        style = DarkfieldStyle() if darkfield_style is None else darkfield_style
        if not isinstance(style, DarkfieldStyle):
            raise WavesError(
                f"darkfield_style must be a waves.render.DarkfieldStyle, got {type(style).__name__}"
            )
        out_dtype = np.dtype(style.dtype)
    else:
        out_dtype = np.dtype(dtype)
    keep = None
    if out is None:
        nbytes = n_frames * ny_out * nx_out * out_dtype.itemsize
        if nbytes > _MAX_IN_MEMORY_BYTES:
            raise WavesError(
                f"the movie would need {nbytes / 2**30:.1f} GiB in memory; give out=FILE.tif "
                "to stream it to disk, or fewer frames / a smaller size"
            )
        keep = np.empty((n_frames, ny_out, nx_out), out_dtype)
    metadata = {
        "schema": "waves-simulation",
        "schema_version": 1,
        "waves_version": __version__,
        "model": spec.name,
        "model_description": spec.description,
        "variables": list(spec.variables),
        "params": dict(model_params),
        "seed": seed,
        "initial": initial,
        "rotation": rotation if initial == "spiral" else None,
        "center_um": [center_yx[0] * pixel_size_um / oversample,
                      center_yx[1] * pixel_size_um / oversample],
        "numerics": {
            "scheme": "explicit Euler, 5-point Laplacian, float32",
            "dt_model": dt,
            "dt_max_model": dt_max,
            "spacing_model": h,
            "diffusion_model": diffusion,
            "oversample": oversample,
            "steps_per_frame": steps_per_frame,
            "steps": steps_per_frame * (n_frames - 1),
            "r_diffusion": diffusion * dt / (h * h),
            "threads": integ.threads,
            "front_resolution": resolution,
        },
        "scales": {"time_scale_s": time_scale_s, "length_scale_um": length_scale_um},
        "grid": {**grid.to_dict(), "shape_yx_out": [ny_out, nx_out]},
        "calibration": calibration.to_dict(),
        "n_frames": n_frames,
        "minutes": run_min,
        "heterogeneity": [hh.to_dict() for hh in heterogeneity],
        "pacemakers": [pm.to_dict() for pm in pacers],
        "ramps": [r.to_dict() for r in ramps],
        "noise": noise,
        "output": {
            "observable": observable,
            "dtype": str(out_dtype),
            "render": render,
            "darkfield_style": (None if style is None else dataclasses.asdict(style)),
            "value_range": (None if (render is None and dtype == "float32")
                            else list(spec.observable_ranges[observable])),
            "scaling": ("raw" if (render is None and dtype == "float32")
                        else "(value - lo) / (hi - lo) * full scale"),
        },
    }

    writer = None
    path = sidecar = None
    if out is not None:
        from waves import io as wio

        path = Path(out)
        if path.suffix.lower() not in (".tif", ".tiff"):
            raise WavesError(f"output file {out!r} must end in .tif or .tiff")
        if not path.parent.exists():
            raise WavesError(f"output folder {str(path.parent)!r} does not exist; create it first")
        sidecar = path.with_suffix(".json")
        writer = wio.StackWriter(
            path, calibration=calibration, shape_yx=(ny_out, nx_out), dtype=out_dtype,
            metadata={"waves_simulation": {"model": spec.name, "params": dict(model_params),
                                           "seed": seed, "sidecar": sidecar.name}},
            n_frames=n_frames,
        )
    event_steps = sorted(events)
    noise_rng = np.random.default_rng(seeds[2])
    noise_where = None
    if noise > 0:
        noise_where = grid.domain() * grid.occupancy_or_ones()
    noise_steps = max(1, int(math.floor(_NOISE_INTERVAL / dt)))
    crossings: list[list[np.ndarray]] = [[] for _ in probes]
    prev = integ.state[0, probe_arr[:, 0], probe_arr[:, 1]].copy() if probes else None
    prev_t = 0.0
    kernel_time = 0.0
    bar = None
    try:
        if progress:
            from tqdm import tqdm

            bar = tqdm(total=n_frames, unit="frame", file=sys.stderr, desc=f"simulate {spec.name}")
        clean = None
        if truth_analysis:
            from waves.analyse import clean_buffer

            clean = clean_buffer((n_frames, ny_out, nx_out), folder=None if path is None else path.parent)
        emitter = _Output(spec=spec, observable=observable, dtype=dtype, render=render,
                          style=style,
                          shape_yx=(ny_out, nx_out), oversample=oversample, seed=seed,
                          writer=writer, keep=keep, clean=clean)
        emitter.emit(integ.state)
        if bar is not None:
            bar.update(1)
        step = 0
        for f in range(1, n_frames):
            if ramps:
                t_min = (f - 1) * frame_interval_s / 60.0
                q = dict(model_params)
                for r in ramps:
                    q[r.param] = r.value(t_min, run_min=run_min)
                integ.set_params(q)
            end = f * steps_per_frame
            while step < end:
                if step in events:
                    where = events[step]
                    for k, val in enumerate(excited):
                        integ.state[k][where] = np.float32(val)
                nxt = min(end, step + (noise_steps if noise > 0 else end - step))
                e = bisect.bisect_right(event_steps, step)
                if e < len(event_steps) and event_steps[e] < nxt:
                    nxt = event_steps[e]
                t0 = time.perf_counter()
                trace = integ.advance(nxt - step)
                kernel_time += time.perf_counter() - t0
                if probes:
                    times = (np.arange(step + 1, nxt + 1)) * dt
                    for k, c in enumerate(upward_crossings(trace, times, spec.threshold,
                                                           prev, prev_t)):
                        if c.size:
                            crossings[k].append(c)
                    prev = trace[-1].copy()
                    prev_t = nxt * dt
                if noise > 0:
                    add_noise(integ.state[0], intensity=noise, duration=(nxt - step) * dt,
                              rng=noise_rng, where=noise_where)
                step = nxt
            emitter.emit(integ.state)
            if bar is not None:
                bar.update(1)
    except BaseException:
        if writer is not None:
            writer.abort()
        if clean is not None:
            clean.close()
        raise
    finally:
        if bar is not None:
            bar.close()
    if writer is not None:
        writer.close()

    # ---- ground truth
    t_after = t_after_min * 60.0 / time_scale_s
    probe_rows = []
    periods_model = []
    for k, (i, j) in enumerate(probes):
        c = np.concatenate(crossings[k]) if crossings[k] else np.zeros(0)
        per = period_from_crossings(c, after=t_after)
        if per is not None:
            periods_model.append(per)
        probe_rows.append({
            "y_um": (i - (oversample - 1) / 2.0) / oversample * pixel_size_um,
            "x_um": (j - (oversample - 1) / 2.0) / oversample * pixel_size_um,
            "n_crossings": int(np.sum(c > t_after)),
            "period_model": per,
            "period_min": None if per is None else per * time_scale_s / 60.0,
        })
    to_min = time_scale_s / 60.0
    truth = {
        "method": "upward threshold crossings of variable 0 at probe points, after the "
                  "transient (default the first third of the run); median interval per probe",
        "threshold": spec.threshold,
        "transient_model": t_after,
        "transient_min": t_after * time_scale_s / 60.0,
        "period_model": summarise(periods_model),
        "period_min": summarise([p * to_min for p in periods_model]),
        "probes": probe_rows,
    }
    if clean is not None:
        try:
            truth["analysis"] = clean_field_truth(clean, calibration)
        finally:
            clean.close()
    updates = grid.n_cells * step
    rate = updates / kernel_time if kernel_time > 0 else float("nan")
    wall = time.perf_counter() - t_wall0
    metadata["truth"] = truth
    metadata["warnings"] = list(run_warnings)
    metadata["wall_time_s"] = wall
    metadata["cell_updates"] = updates
    metadata["cell_updates_per_s"] = rate
    if sidecar is not None:
        from waves import io as wio

        wio.write_json(sidecar, metadata)
    return SimulationResult(
        path=path, sidecar_path=sidecar, frames=keep, truth=truth, metadata=metadata,
        calibration=calibration, n_frames=n_frames, final_state=integ.state.copy(),
        wall_time_s=wall, cell_updates_per_s=rate, warnings=tuple(run_warnings),
    )
