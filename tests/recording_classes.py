"""Degradation classes of issue 12 on one kind of field, and the checks of the
issue against the field's known truth.

The field: a spiral and a target of the same period (so the territory line
between them stays put) filmed like a dark-field recording (granular cell
texture whose scattering changes by 4 % as a wave passes, vignetting, shot
and read noise, 8 bits).  Each class adds one family of degradations with
strengths and seeds varied; `combined` has all of them at once.

Truths come from the synthetic recording (waves.synthetic_recording): source
positions, period, speed, the spiral's core, and the area each source holds
inside the cell field.  The tolerances are the issue's: period 5 %, speed
10 %, spiral and centre counts exact, cores and centres within
max(300 um, a quarter wavelength), territories 15 %.
"""

from __future__ import annotations

import numpy as np

from waves.render import Degradations
from waves.synthetic import SpiralSource, TargetSource, synthetic_recording

PX = 15.0  # um per pixel
DT = 20.0  # s per frame
SPEED = 150.0  # um/min
PERIOD = 6.0  # min, both sources
SHAPE = (160, 160, 192)  # nominal frames, rows, columns: 53 min, 2.4 x 2.9 mm
WAVELENGTH = SPEED * PERIOD  # 900 um

# what every real dark-field recording has (issue 12's "real-looking" movies)
CAMERA = dict(texture_contrast=0.3, texture_modulation=0.04, vignetting=0.2, full_well_e=4000.0,
              read_noise_counts=1.5, bits=8)

CLASSES = {
    "brightness": [dict(lamp_fade=0.4, flicker_count=4, flicker_gain=0.1),
                   dict(lamp_fade=0.3, lamp_fade_law="exponential", flicker_count=3, flicker_gain=0.12)],
    "illumination": [dict(ramp=(0.3, 2.0), ramp_direction_deg=45.0),
                     dict(ramp=(0.4, 1.8), ramp_direction_deg=120.0, spot_gain=0.5, spot_center_frac=(0.3, 0.7))],
    "drift": [dict(drift_px=3.0, drift_jump_px=1.5), dict(drift_px=5.0, drift_jump_px=2.0, drift_jump_count=2)],
    "dropped": [dict(drop_fraction=0.05, gap_frames=8), dict(drop_fraction=0.1, gap_frames=12)],
    "streaming": [dict(stream_speed_um_per_min=10.0, stream_center_frac=(0.5, 0.5), strip_width_um=150.0,
                       strip_angle_deg=100.0, mound_count=2),
                  dict(stream_speed_um_per_min=15.0, stream_center_frac=(0.4, 0.55), mound_count=3)],
    "dish": [dict(dish_edge="line", dish_line_angle_deg=-90.0, dish_line_frac=0.75, dust_count=6),
             dict(dish_edge="circle", dish_radius_frac=0.55, dust_count=4, rim_gain=2.0)],
}
CLASSES["combined"] = [
    {k: v for d in (CLASSES[c][0] for c in ("brightness", "illumination", "drift", "dropped", "dish")) for k, v in d.items()}
    | dict(stream_speed_um_per_min=5.0, mound_count=1)
]


def sources():
    ny, nx = SHAPE[1:]
    return [SpiralSource(0.3 * nx * PX, 0.5 * ny * PX, PERIOD, charge=1),
            TargetSource(0.75 * nx * PX, 0.45 * ny * PX, PERIOD)]


def recording(cls: str, variant: int, seed: int):
    deg = Degradations(**(CAMERA | CLASSES[cls][variant]))
    return synthetic_recording(SHAPE, pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                               sources=sources(), degradations=deg, seed=seed)


def errors(analysis, truth) -> dict:
    """The issue's figures of one analysis against the recording's truth."""
    s = analysis.summary
    out: dict = {}
    out["period_rel"] = (s["period_min"]["median"] / PERIOD - 1.0) if s.get("period_min") else None
    sp = s.get("front_speed_um_per_min")
    out["speed_rel"] = (sp["median"] / SPEED - 1.0) if sp else None
    cores = s.get("spiral_cores") or []
    out["n_cores"] = len(cores)
    tc = truth.cores[0]
    out["core_err_um"] = (min(float(np.hypot(c["x_um"] - tc.x_um, c["y_um"] - tc.y_um)) for c in cores)
                          if cores else None)
    centres = s.get("centres") or []
    out["n_centres"] = len(centres)
    # each true source matched to its nearest reported centre
    matched, area_err = [], []
    t_an = np.asarray([c["t_min"] for c in s.get("period_timecourse") or []])
    frames = np.arange(truth.territory_area_in_cells_mm2.shape[0])
    if len(t_an):
        frames = frames[(truth.t_min >= t_an.min()) & (truth.t_min <= t_an.max())]
    true_area = truth.territory_area_in_cells_mm2[frames].mean(axis=0)
    for i, src in enumerate(truth.sources):
        if not centres:
            matched.append(None)
            area_err.append(None)
            continue
        d = [float(np.hypot(c["x_um"] - src.x_um, c["y_um"] - src.y_um)) for c in centres]
        j = int(np.argmin(d))
        matched.append(d[j])
        area_err.append(centres[j]["territory_area_mm2"] / true_area[i] - 1.0)
    out["centre_err_um"] = matched
    out["territory_rel"] = area_err
    return out


def failures(e: dict) -> list[str]:
    """What misses the issue's tolerances (empty when all pass)."""
    tol_pos = max(300.0, WAVELENGTH / 4)
    bad = []
    if e["period_rel"] is None or abs(e["period_rel"]) > 0.05:
        bad.append(f"period {e['period_rel']}")
    if e["speed_rel"] is None or abs(e["speed_rel"]) > 0.10:
        bad.append(f"speed {e['speed_rel']}")
    if e["n_cores"] != 1 or e["core_err_um"] is None or e["core_err_um"] > tol_pos:
        bad.append(f"cores {e['n_cores']} at {e['core_err_um']}")
    if e["n_centres"] != 2 or any(d is None or d > tol_pos for d in e["centre_err_um"]):
        bad.append(f"centres {e['n_centres']} at {e['centre_err_um']}")
    if any(a is None or abs(a) > 0.15 for a in e["territory_rel"]):
        bad.append(f"territories {e['territory_rel']}")
    return bad


def variants():
    return [(c, v) for c in CLASSES for v in range(len(CLASSES[c]))]
