"""Streaming-cell recordings shared by the texture tests: a spiral or a target under
cells that stream toward a centre (moving texture, a cleared strip, mounds), with a
geometry drawn from the seed.  Every truth is the generator's (waves.synthetic)."""

import math

import numpy as np

from waves.render import Degradations
from waves.synthetic import SpiralSource, TargetSource, synthetic_recording

PX, DT, SPEED, PERIOD = 10.0, 20.0, 100.0, 6.0  # um, s, um/min, min: wavelength 600 um
N, NT = 128, 160  # 1.28 mm square, 53 min (~9 periods)


def streaming_recording(kind: str, stream_um_per_min: float, seed: int, *, strip: bool = True,
                        mounds: int = 2, center_frac=None, modulation=None):
    """The source sits near the middle; the stream centre 350-450 um from it, the strip
    runs from the stream centre away from the source (so no cells are missing at the
    source itself), one mound at the stream centre and one elsewhere."""
    rng = np.random.default_rng([seed, 12])
    sx, sy = (0.5 + rng.uniform(-0.06, 0.06, 2)) * N * PX
    a = rng.uniform(0, 2 * math.pi)
    d = rng.uniform(350.0, 450.0)
    cx, cy = sx + d * math.cos(a), sy - d * math.sin(a)  # displayed angle: +y up
    if center_frac is None:
        center_frac = (cy / PX / (N - 1), cx / PX / (N - 1))
    deg = Degradations(
        texture_contrast=0.4, texture_modulation=modulation, stream_speed_um_per_min=stream_um_per_min,
        stream_center_frac=center_frac, strip_width_um=120.0 if strip else 0.0,
        strip_angle_deg=math.degrees(a) + rng.uniform(-30, 30), mound_count=mounds, mound_radius_um=40.0,
        full_well_e=8000, read_noise_counts=0.5,
    )
    src = SpiralSource(sx, sy, PERIOD) if kind == "spiral" else TargetSource(sx, sy, PERIOD)
    return synthetic_recording((NT, N, N), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                               sources=[src], degradations=deg, seed=seed, background=0.3)
