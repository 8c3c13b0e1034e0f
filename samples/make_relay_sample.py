"""Regenerate samples/relay_aggregation_field.tif and its sidecar relay_aggregation_field.json.

    python samples/make_relay_sample.py            (from the repository root)

A demo aggregation field simulated with the Martiel-Goldbeter cAMP relay model
(`waves.models.relay`) and rendered dark-field-like: one counterclockwise
spiral and two target pacemakers in an excitable cell field, competing (the
faster centre slowly takes over).  Every number below is invented for a demo
(field layout, pacemaker discs, heterogeneity, optics); only the model
parameters are the published Table 2 values, with ke raised to 10 /min in the
background so that the cells there are excitable, not oscillatory.

The truth in the sidecar is measured on the clean simulated field, not
assumed: pacemaker and spiral periods from threshold crossings of cAMP at the
centres, the spiral core as the least-swinging pixel of cAMP over each
10-minute window, its rotation from the order of activation around the core.

With the fixed seed the output is the same bit for bit on a given machine
(the compiled kernel is deterministic; the renderer draws from fixed seeds).

Writes (atomically): samples/relay_aggregation_field.tif (uint8 (t, y, x),
ImageJ calibration, truth dict in the metadata) and
samples/relay_aggregation_field.json (the same truth).
"""

from __future__ import annotations

import argparse
import pathlib
import sys
import time

import numpy as np

HERE = pathlib.Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # run from a checkout without installing

from waves import io  # noqa: E402
from waves.models.base import Integrator  # noqa: E402
from waves.models.grid import Grid  # noqa: E402
from waves.models.heterogeneity import correlated_noise  # noqa: E402
from waves.models.relay import (  # noqa: E402
    LENGTH_UNIT_UM,
    SPEC,
    broken_wave_state,
    excitation_from_g,
    reaction_dt_limit,
)
from waves.models.stimulus import disc  # noqa: E402
from waves.phase.tracking import rotation_of_charge  # noqa: E402
from waves.render import DarkfieldRenderer, DarkfieldStyle  # noqa: E402
from waves.units import Calibration  # noqa: E402

NAME = "relay_aggregation_field"

# ---- invented demo values
SHAPE_YX = (224, 224)  # 5.6 mm x 5.6 mm
PIXEL_SIZE_UM = 25.0  # simulation grid step = output pixel
FRAME_INTERVAL_S = 30.0
N_FRAMES = 120  # 60 min recorded
PREROLL_MIN = 30.0  # simulated before the first frame (the start is artificial)
BACKGROUND_KE_PER_MIN = 10.0  # excitable cells (REFERENCES.md: ke = 10 excitable)
KE_HETEROGENEITY_REL_SD = 0.05
KE_HETEROGENEITY_CORRELATION_UM = 150.0
OCCUPANCY_RANGE = (0.85, 1.0)  # smooth variation of cell density
OCCUPANCY_CORRELATION_UM = 300.0
SPIRAL = {"y_um": 3600.0, "x_um": 1100.0, "rotation": "counterclockwise"}  # initial break point
PACEMAKERS = (  # discs of dense (occupancy 1), oscillatory cells (lower ke); periods measured below
    {"name": "A", "y_um": 1300.0, "x_um": 4300.0, "radius_um": 700.0, "ke_per_min": 3.0},
    {"name": "B", "y_um": 4600.0, "x_um": 4700.0, "radius_um": 350.0, "ke_per_min": 3.0},
)
EXCITATION_G_HALF = 1.0  # excitation = g / (g + 1): high cAMP = excited band
STYLE = DarkfieldStyle(  # every field spelled out, so new defaults do not change the sample
    polarity="bright",
    contrast=0.3,
    background=0.45,
    texture=0.15,
    texture_scale_px=1.5,
    illumination=0.15,
    drift=0.04,
    drift_period_frames=300.0,
    noise=0.015,
    dtype="uint8",
)
SEED = 20240817
CORE_WINDOW_MIN = 10.0
# front speed: two points on a ray leaving pacemaker A to the left (its own territory,
# A being the fastest centre), 800 and 1600 um from its centre
SPEED_PROBES_PX = ((52, 140), (52, 108))


def _yx_px(y_um: float, x_um: float) -> tuple[float, float]:
    return y_um / PIXEL_SIZE_UM, x_um / PIXEL_SIZE_UM


def _fields(rng_seed: int):
    """ke multiplier (relative to the background) and occupancy, float32 (y, x)."""
    ny, nx = SHAPE_YX
    noise = correlated_noise(
        SHAPE_YX, correlation_px=KE_HETEROGENEITY_CORRELATION_UM / PIXEL_SIZE_UM,
        seed=np.random.default_rng([rng_seed, 1]),
    )
    ke = (1.0 + KE_HETEROGENEITY_REL_SD * noise).astype(np.float32)
    for pm in PACEMAKERS:
        inside = disc(SHAPE_YX, _yx_px(pm["y_um"], pm["x_um"]), pm["radius_um"] / PIXEL_SIZE_UM)
        ke[inside] = np.float32(pm["ke_per_min"] / BACKGROUND_KE_PER_MIN)
    occ_noise = correlated_noise(
        SHAPE_YX, correlation_px=OCCUPANCY_CORRELATION_UM / PIXEL_SIZE_UM,
        seed=np.random.default_rng([rng_seed, 2]),
    )
    lo, hi = OCCUPANCY_RANGE
    span = float(occ_noise.max() - occ_noise.min())
    occ = (lo + (hi - lo) * (occ_noise - occ_noise.min()) / span).astype(np.float32)
    for pm in PACEMAKERS:
        occ[disc(SHAPE_YX, _yx_px(pm["y_um"], pm["x_um"]), pm["radius_um"] / PIXEL_SIZE_UM)] = 1.0
    return ke, occ


def _crossings(x: np.ndarray, dt: float, level: float) -> np.ndarray:
    i = np.nonzero((x[:-1] < level) & (x[1:] >= level))[0]
    return (i + (level - x[i]) / (x[i + 1] - x[i])) * dt


def _core(frames_g: np.ndarray, around_yx: tuple[float, float], search_px: int) -> tuple[int, int]:
    """Pixel of least cAMP swing (max - min over the window) near `around_yx`."""
    swing = frames_g.max(axis=0) - frames_g.min(axis=0)
    ny, nx = swing.shape
    cy, cx = int(round(around_yx[0])), int(round(around_yx[1]))
    r0, r1 = max(0, cy - search_px), min(ny, cy + search_px + 1)
    c0, c1 = max(0, cx - search_px), min(nx, cx + search_px + 1)
    sub = swing[r0:r1, c0:c1]
    i, j = np.unravel_index(int(np.argmin(sub)), sub.shape)
    return r0 + int(i), c0 + int(j)


def _winding(frames_g: np.ndarray, core_yx: tuple[int, int], dt_min: float, radius_px: int) -> float:
    """Winding number of the activation phase around the core, counted counterclockwise
    as displayed: +1 for a counterclockwise rotation, -1 for clockwise."""
    cy, cx = core_yx
    angles = np.linspace(0.0, 2.0 * np.pi, 24, endpoint=False)
    rows = np.clip(np.round(cy - radius_px * np.sin(angles)).astype(int), 0, frames_g.shape[1] - 1)
    cols = np.clip(np.round(cx + radius_px * np.cos(angles)).astype(int), 0, frames_g.shape[2] - 1)
    acts = [_crossings(frames_g[:, r, c], dt_min, SPEC.threshold) for r, c in zip(rows, cols, strict=True)]
    period = float(np.median(np.diff(acts[0])))
    t0 = acts[0][-2]
    phase = []
    for a in acts:
        later = a[a >= t0 - 0.5 * period]
        phase.append(2.0 * np.pi * (later[0] - t0) / period if later.size else np.nan)
    phase = np.array(phase)
    steps = np.angle(np.exp(1j * np.diff(np.concatenate([phase, phase[:1]]))))
    return float(np.sum(steps) / (2.0 * np.pi))


def build(*, progress: bool = False):
    """Simulate and render; returns (uint8 movie (t, y, x), truth dict)."""
    t_wall = time.perf_counter()
    ny, nx = SHAPE_YX
    h = PIXEL_SIZE_UM / LENGTH_UNIT_UM
    params = dict(SPEC.default_params(), ke_per_min=BACKGROUND_KE_PER_MIN)
    ke_factor, occ = _fields(SEED)
    diffusion = SPEC.diffusion
    limit = min(h * h / (4.0 * diffusion),
                reaction_dt_limit(dict(params, ke_per_min=float(BACKGROUND_KE_PER_MIN
                                                                * ke_factor.max())))[0])
    frame_min = FRAME_INTERVAL_S / 60.0
    steps_per_frame = int(np.ceil(frame_min / (SPEC.dt_fraction * limit)))
    dt = frame_min / steps_per_frame
    core0 = _yx_px(SPIRAL["y_um"], SPIRAL["x_um"])
    state = broken_wave_state(params, SHAPE_YX, spacing=h, core_yx=core0,
                              rotation=SPIRAL["rotation"], dt=dt, diffusion=diffusion)
    pm_px = [tuple(int(round(v)) for v in _yx_px(pm["y_um"], pm["x_um"])) for pm in PACEMAKERS]
    it = Integrator(SPEC, Grid(SHAPE_YX, h, occupancy=occ), params, state, dt=dt,
                    diffusion=diffusion, multipliers={"ke_per_min": ke_factor},
                    probes_yx=np.array(pm_px + list(SPEED_PROBES_PX), np.int64))
    it.advance(int(round(PREROLL_MIN / frame_min)) * steps_per_frame)
    renderer = DarkfieldRenderer(SHAPE_YX, style=STYLE, seed=SEED)
    movie = np.empty((N_FRAMES, ny, nx), np.uint8)
    clean_g = np.empty((N_FRAMES, ny, nx), np.float32)
    traces = []
    for k in range(N_FRAMES):
        if k > 0:
            traces.append(it.advance(steps_per_frame))
        clean_g[k] = it.state[0]
        movie[k] = renderer.frame(excitation_from_g(clean_g[k], g_half=EXCITATION_G_HALF), k)
        if progress and k % 20 == 0:
            print(f"frame {k}/{N_FRAMES}", file=sys.stderr)
    trace = np.concatenate(traces)

    # ---- truth, measured on the clean field
    centres = []
    for k, (pm, (py, px)) in enumerate(zip(PACEMAKERS, pm_px, strict=True)):
        acts = _crossings(trace[:, k], dt, SPEC.threshold)
        period = float(np.median(np.diff(acts))) if acts.size > 1 else None
        centres.append({
            "id": pm["name"], "kind": "target", "x_um": px * PIXEL_SIZE_UM, "y_um": py * PIXEL_SIZE_UM,
            "period_min": period, "n_waves": int(acts.size),
            "disc_radius_um": pm["radius_um"], "disc_ke_per_min": pm["ke_per_min"],
        })
    near = _crossings(trace[:, len(PACEMAKERS)], dt, SPEC.threshold)
    far = _crossings(trace[:, len(PACEMAKERS) + 1], dt, SPEC.threshold)
    (y0, x0), (y1, x1) = SPEED_PROBES_PX
    distance_um = float(np.hypot(y1 - y0, x1 - x0)) * PIXEL_SIZE_UM
    speeds = []
    for t_near in near:  # the same wave reaches the far point within a few minutes
        later = far[(far > t_near) & (far < t_near + 0.5 * centres[0]["period_min"])]
        if later.size:
            speeds.append(distance_um / float(later[0] - t_near))
    front_speed = {
        "median": float(np.median(speeds)), "n": len(speeds),
        "where": f"waves of pacemaker {PACEMAKERS[0]['name']} between (x, y) = "
                 f"({x0 * PIXEL_SIZE_UM:g}, {y0 * PIXEL_SIZE_UM:g}) um and "
                 f"({x1 * PIXEL_SIZE_UM:g}, {y1 * PIXEL_SIZE_UM:g}) um",
    }
    per_window = int(round(CORE_WINDOW_MIN / frame_min))
    track = []
    guess = core0
    search = int(round(1500.0 / PIXEL_SIZE_UM))
    for start in range(0, N_FRAMES - per_window + 1, per_window):
        cy, cx = _core(clean_g[start:start + per_window], guess, search)
        track.append({"first_min": start * frame_min, "last_min": (start + per_window - 1) * frame_min,
                      "x_um": cx * PIXEL_SIZE_UM, "y_um": cy * PIXEL_SIZE_UM})
        guess = (cy, cx)
        search = int(round(500.0 / PIXEL_SIZE_UM))
    last = track[-1]
    core_px = (int(round(last["y_um"] / PIXEL_SIZE_UM)), int(round(last["x_um"] / PIXEL_SIZE_UM)))
    winding = _winding(clean_g, core_px, frame_min, int(round(300.0 / PIXEL_SIZE_UM)))
    rotation = "counterclockwise" if winding > 0 else "clockwise"
    charge = 1 if rotation_of_charge(1) == rotation else -1
    ring = _crossings(clean_g[:, core_px[0], min(nx - 1, core_px[1] + 12)].astype(np.float64),
                      frame_min, SPEC.threshold)
    spiral_period = float(np.median(np.diff(ring))) if ring.size > 1 else None
    centres.insert(0, {
        "id": "S", "kind": "spiral",
        "x_um": float(np.mean([p["x_um"] for p in track])),
        "y_um": float(np.mean([p["y_um"] for p in track])),
        "period_min": spiral_period, "rotation": rotation, "charge": charge,
        "winding_measured": round(winding, 3),
        "initial_break_x_um": SPIRAL["x_um"], "initial_break_y_um": SPIRAL["y_um"],
        "core_track": track,
    })
    truth = {
        "note": "demo simulation: field layout, pacemakers, heterogeneity and optics are "
                "invented for a demo, not a measurement; model parameters are Martiel & "
                "Goldbeter 1987 Table 2 with ke = 10 /min in the background",
        "generator": "samples/make_relay_sample.py (waves.models.relay)",
        "model": "relay",
        "model_params": params,
        "diffusion_um2_per_min": diffusion * LENGTH_UNIT_UM**2,
        "pixel_size_um": PIXEL_SIZE_UM,
        "frame_interval_s": FRAME_INTERVAL_S,
        "shape_tyx": [N_FRAMES, ny, nx],
        "preroll_min": PREROLL_MIN,
        "dt_min": dt,
        "ke_heterogeneity": {"rel_sd": KE_HETEROGENEITY_REL_SD,
                             "correlation_um": KE_HETEROGENEITY_CORRELATION_UM},
        "occupancy": {"range": list(OCCUPANCY_RANGE), "correlation_um": OCCUPANCY_CORRELATION_UM},
        "excitation": f"g / (g + {EXCITATION_G_HALF:g}), g = extracellular cAMP",
        "polarity": STYLE.polarity,
        "style": {f: getattr(STYLE, f) for f in (
            "polarity", "contrast", "background", "texture", "texture_scale_px",
            "illumination", "drift", "drift_period_frames", "noise", "dtype")},
        "seed": SEED,
        "centres": centres,
        "front_speed_um_per_min": front_speed,
        "charge_convention": "charge +1 = clockwise as displayed (waves.phase.tracking)",
        "rotation_convention": "as displayed, row 0 at the top",
    }  # no wall time: it would break bit-for-bit output
    if progress:
        print(f"simulated in {time.perf_counter() - t_wall:.1f} s", file=sys.stderr)
    return movie, truth


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out-dir", default=str(HERE), help="folder to write into (default: samples/)")
    parser.add_argument("--progress", action="store_true", help="print progress on stderr")
    args = parser.parse_args(argv)
    out = pathlib.Path(args.out_dir)
    movie, truth = build(progress=args.progress)
    cal = Calibration(PIXEL_SIZE_UM, FRAME_INTERVAL_S, "simulation", "simulation")
    tif = out / f"{NAME}.tif"
    with io.StackWriter(tif, calibration=cal, shape_yx=SHAPE_YX, dtype="uint8", metadata=truth,
                        n_frames=N_FRAMES) as writer:
        for frame in movie:
            writer.write(frame)
    js = io.write_json(out / f"{NAME}.json", truth)
    print(f"wrote {tif} ({tif.stat().st_size / 1e6:.2f} MB) and {js}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
