"""The static and per-frame fields of a degraded recording, each from its own seeded
random stream: cell texture, illumination, lamp gain, drift path, frame schedule,
cell presence (dish edge, cleared strip), rim, mounds, dust and the streaming map.

All arrays are float32 or float64 on a pixel grid; positions are (row, col).  The
*canvas* is the recorded frame padded by a margin on every side, in sample
coordinates (canvas pixel (r, c) is frame pixel (r - margin, c - margin) at zero
drift).  Nothing here imports the wave-field code.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from waves.degrade import Degradations

__all__ = [
    "texture_field", "illumination_field", "lamp_gain", "flicker_set", "drift_path",
    "frame_schedule", "presence_and_rim", "mound_profiles", "dust_field", "stream_offset_px",
]


def rng_for(seed: int, tag: int) -> np.random.Generator:
    """Independent stream `tag` of `seed` (three words: never a per-frame stream)."""
    return np.random.default_rng([int(seed), 0xDE6, int(tag)])


# ---------------------------------------------------------------------------
# texture and illumination


def texture_field(shape_yx: tuple[int, int], deg: Degradations, rng: np.random.Generator) -> np.ndarray:
    """Granular dark-field texture, mean 1, relative sd `texture_contrast`:
    Poisson-placed bright grains blurred by a Gaussian of sd `texture_grain_px`,
    over a dimmer continuum (floored at 0.05); the brightest grains are compressed
    softly so that the texture stays below 1 + 3 * texture_contrast (relative sd then
    slightly under texture_contrast)."""
    if deg.texture_contrast <= 0.0:
        return np.ones(shape_yx, dtype=np.float32)
    g = deg.texture_grain_px
    density = 1.0 / (6.0 * g * g)  # grains per pixel: they touch but stay distinct
    grains = rng.poisson(density, size=shape_yx).astype(np.float64)
    grains *= rng.uniform(0.5, 1.5, size=shape_yx)  # grains differ in brightness
    z = ndimage.gaussian_filter(grains, sigma=g, mode="wrap")
    sd = float(z.std())
    if sd > 0.0:
        z = (z - z.mean()) / sd
    z = np.where(z > 2.0, 2.0 + np.tanh(z - 2.0), z)  # brightest grains saturate softly at z = 3
    out = 1.0 + deg.texture_contrast * z
    np.maximum(out, 0.05, out=out)
    return (out / out.mean()).astype(np.float32)



WANDER_PATTERNS = 16  # independent patches patterns mixed per pixel


def wander_fields(shape_yx: tuple[int, int], n_frames: int, dt_min: float, deg: Degradations,
                  rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray] | None:
    """Slow random change of the texture: (patterns (K, y, x), coefficients
    (n_frames, K)); the change at frame i is ``coefficients[i] @ patterns``,
    of sd ~1 per pixel.  Each pattern is white noise blurred to the grain size
    (unit sd); each coefficient an AR(1) series of unit variance with
    rho = exp(-dt / wander_time_min).  A sum of AR(1) series with the same rho
    is itself AR(1): every pixel's change is red noise of that rho (the null
    model of waves.measure.significance).  None when texture_wander is 0."""
    if deg.texture_wander <= 0.0:
        return None
    k = WANDER_PATTERNS
    pats = rng.standard_normal((k, *shape_yx))
    g = max(deg.texture_grain_px, 1.0)
    for j in range(k):
        pats[j] = ndimage.gaussian_filter(pats[j], sigma=g, mode="wrap")
        pats[j] /= max(float(pats[j].std()), 1e-12)
    pats /= np.sqrt(k)
    rho = float(np.exp(-dt_min / deg.wander_time_min))
    coef = np.empty((n_frames, k))
    coef[0] = rng.standard_normal(k)
    shocks = rng.standard_normal((n_frames, k)) * np.sqrt(1.0 - rho * rho)
    for i in range(1, n_frames):
        coef[i] = rho * coef[i - 1] + shocks[i]
    return pats.astype(np.float32), coef.astype(np.float32)


def illumination_field(shape_yx: tuple[int, int], deg: Degradations) -> np.ndarray:
    """Camera-fixed illumination gain (y, x): vignetting x ramp x spot."""
    ny, nx = shape_yx
    y = np.arange(ny, dtype=np.float64)[:, None]
    x = np.arange(nx, dtype=np.float64)[None, :]
    out = np.ones(shape_yx, dtype=np.float64)
    cy, cx = (ny - 1) / 2.0, (nx - 1) / 2.0
    if deg.vignetting > 0.0:
        r2 = ((y - cy) ** 2 + (x - cx) ** 2) / max(cy * cy + cx * cx, 1e-12)
        out *= 1.0 - deg.vignetting * r2
    if deg.ramp is not None:
        a = math.radians(deg.ramp_direction_deg)
        s = (x - cx) * math.cos(a) - (y - cy) * math.sin(a)  # +y on screen is up
        s_min, s_max = float(s.min()), float(s.max())
        u = (s - s_min) / (s_max - s_min) if s_max > s_min else np.zeros_like(s)
        lo, hi = deg.ramp
        out *= lo + (hi - lo) * u
    if deg.spot_gain != 0.0:
        sy, sx = deg.spot_center_frac
        sd = deg.spot_sd_frac * max(ny, nx)
        r2 = (y - sy * (ny - 1)) ** 2 + (x - sx * (nx - 1)) ** 2
        out *= 1.0 + deg.spot_gain * np.exp(-0.5 * r2 / (sd * sd))
    return out.astype(np.float32)


# ---------------------------------------------------------------------------
# time: lamp, flicker, drift, schedule


def lamp_gain(n_frames: int, deg: Degradations) -> np.ndarray:
    """Lamp gain (n_frames,) of the nominal frames: 1 at frame 0, 1 - lamp_fade at
    the last, linear or exponential in between."""
    u = np.arange(n_frames, dtype=np.float64) / max(n_frames - 1, 1)
    if deg.lamp_fade <= 0.0:
        return np.ones(n_frames)
    if deg.lamp_fade_law == "linear":
        return 1.0 - deg.lamp_fade * u
    return np.exp(math.log(1.0 - deg.lamp_fade) * u)


def flicker_set(n_frames: int, deg: Degradations, rng: np.random.Generator) -> dict[int, float]:
    """Nominal flicker frames -> gain factor (1 +- flicker_gain, sign random)."""
    chosen = {f for f in deg.flicker_frames if f < n_frames}
    pool = np.setdiff1d(np.arange(1, n_frames), np.fromiter(chosen, dtype=np.int64, count=len(chosen)))
    k = min(deg.flicker_count, pool.size)
    if k:
        chosen |= {int(f) for f in rng.choice(pool, size=k, replace=False)}
    signs = rng.choice([-1.0, 1.0], size=len(chosen))
    return {f: 1.0 + s * deg.flicker_gain for f, s in zip(sorted(chosen), signs, strict=True)}


def drift_path(n_frames: int, deg: Degradations, rng: np.random.Generator) -> tuple[np.ndarray, list[int]]:
    """Stage drift (n_frames, 2) [row, col] pixels of the nominal frames, 0 at frame 0:
    a smooth random path (sum of slow sinusoids) scaled to max |excursion| = drift_px
    per axis, plus `drift_jump_count` steps of `drift_jump_px` in random directions.
    Returns the path and the nominal frames at which a jump happens."""
    u = np.arange(n_frames, dtype=np.float64) / max(n_frames - 1, 1)
    path = np.zeros((n_frames, 2))
    if deg.drift_px > 0.0:
        for axis in range(2):
            freqs = rng.uniform(0.2, 1.2, size=3)
            phases = rng.uniform(0.0, 2.0 * np.pi, size=3)
            amps = rng.uniform(0.5, 1.0, size=3)
            p = sum(a * np.sin(2.0 * np.pi * f * u + ph) for a, f, ph in zip(amps, freqs, phases, strict=True))
            p = p - p[0]
            peak = float(np.abs(p).max())
            if peak > 0.0:
                path[:, axis] = deg.drift_px * p / peak
    jumps: list[int] = []
    if deg.drift_jump_px > 0.0 and deg.drift_jump_count > 0 and n_frames > 2:
        lo, hi = max(1, n_frames // 5), max(2, (4 * n_frames) // 5)
        k = min(deg.drift_jump_count, hi - lo)
        jumps = sorted(int(j) for j in rng.choice(np.arange(lo, hi), size=k, replace=False))
        for j in jumps:
            a = rng.uniform(0.0, 2.0 * np.pi)
            path[j:, 0] += deg.drift_jump_px * math.sin(a)
            path[j:, 1] += deg.drift_jump_px * math.cos(a)
    return path, jumps


def frame_schedule(n_frames: int, deg: Degradations, rng: np.random.Generator) -> tuple[np.ndarray, list[tuple[int, int]]]:
    """Recorded nominal frame indices (sorted) and the gaps [(first, stop)) of
    consecutive missing frames.  Frame 0 and the last frame are always recorded."""
    missing = np.zeros(n_frames, dtype=bool)
    gaps: list[tuple[int, int]] = []
    g = deg.gap_frames
    if g > 0 and n_frames > g + 2:
        for _ in range(deg.gap_count):
            for _try in range(100):
                start = int(rng.integers(1, n_frames - g))
                lo, hi = max(0, start - 1), min(n_frames, start + g + 1)
                if not missing[lo:hi].any():  # keep gaps apart by a recorded frame
                    missing[start : start + g] = True
                    gaps.append((start, start + g))
                    break
    if deg.drop_fraction > 0.0 and n_frames > 2:
        pool = np.flatnonzero(~missing[1:-1]) + 1
        k = int(round(deg.drop_fraction * n_frames))
        k = min(k, pool.size)
        if k:
            missing[rng.choice(pool, size=k, replace=False)] = True
    return np.flatnonzero(~missing), sorted(gaps)


# ---------------------------------------------------------------------------
# the cell field: dish edge, cleared strip, rim, mounds, dust


def _canvas_coords(shape: tuple[int, int], margin: int) -> tuple[np.ndarray, np.ndarray]:
    y = np.arange(shape[0], dtype=np.float64)[:, None] - margin
    x = np.arange(shape[1], dtype=np.float64)[None, :] - margin
    return y, x


def _soft(d: np.ndarray) -> np.ndarray:
    """Anti-aliased step: 1 where the signed distance d (pixels) > 0.5, 0 below -0.5."""
    return np.clip(d + 0.5, 0.0, 1.0)


def presence_and_rim(
    canvas_yx: tuple[int, int], margin: int, frame_yx: tuple[int, int], deg: Degradations, pixel_size_um: float
) -> tuple[np.ndarray, np.ndarray]:
    """Cell presence in [0, 1] (anti-aliased) and the rim profile (peak 1) on the
    canvas, in sample coordinates."""
    y, x = _canvas_coords(canvas_yx, margin)
    ny, nx = frame_yx
    presence = np.ones(canvas_yx, dtype=np.float64)
    rim = np.zeros(canvas_yx, dtype=np.float64)
    if deg.dish_edge is not None:
        if deg.dish_edge == "circle":
            cy, cx = deg.dish_center_frac[0] * (ny - 1), deg.dish_center_frac[1] * (nx - 1)
            inside = deg.dish_radius_frac * max(ny, nx) - np.hypot(y - cy, x - cx)
        else:
            a = math.radians(deg.dish_line_angle_deg)
            s = (x - (nx - 1) / 2.0) * math.cos(a) - (y - (ny - 1) / 2.0) * math.sin(a)
            corners = [((cx_ - (nx - 1) / 2.0) * math.cos(a) - (cy_ - (ny - 1) / 2.0) * math.sin(a))
                       for cy_ in (0, ny - 1) for cx_ in (0, nx - 1)]
            s_min, s_max = min(corners), max(corners)
            edge = s_min + deg.dish_line_frac * (s_max - s_min)
            inside = edge - s
        presence *= _soft(inside)
        if deg.rim_gain > 0.0:
            w = deg.rim_width_px
            rim = np.exp(-0.5 * (inside + 1.5 * w) ** 2 / (w * w))  # centred just outside the cells
    if deg.strip_width_um > 0.0:
        cy, cx = deg.stream_center_frac[0] * (ny - 1), deg.stream_center_frac[1] * (nx - 1)
        a = math.radians(deg.strip_angle_deg)
        ux, uy = math.cos(a), -math.sin(a)  # +y on screen is up
        along = (x - cx) * ux + (y - cy) * uy
        across = np.abs(-(x - cx) * uy + (y - cy) * ux)
        half = 0.5 * deg.strip_width_um / pixel_size_um
        outside_strip = np.where(along > 0, across - half, half)  # distance out of the strip
        presence *= _soft(outside_strip)
    return presence.astype(np.float32), rim.astype(np.float32)


def mound_profiles(
    canvas_yx: tuple[int, int], margin: int, frame_yx: tuple[int, int], deg: Degradations,
    pixel_size_um: float, rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray]:
    """Sum of the mounds' Gaussian profiles (peak 1 each) on the canvas and their
    centres (k, 2) [row, col] in frame coordinates.  With streaming the first mound
    sits at the stream centre."""
    ny, nx = frame_yx
    centres = []
    for k in range(deg.mound_count):
        if k == 0 and deg.streams:
            centres.append((deg.stream_center_frac[0] * (ny - 1), deg.stream_center_frac[1] * (nx - 1)))
        else:
            centres.append((rng.uniform(0.15, 0.85) * (ny - 1), rng.uniform(0.15, 0.85) * (nx - 1)))
    y, x = _canvas_coords(canvas_yx, margin)
    prof = np.zeros(canvas_yx, dtype=np.float64)
    sd = deg.mound_radius_um / pixel_size_um
    for cy, cx in centres:
        prof += np.exp(-0.5 * ((y - cy) ** 2 + (x - cx) ** 2) / (sd * sd))
    return prof.astype(np.float32), np.array(centres, dtype=np.float64).reshape(-1, 2)


def dust_field(frame_yx: tuple[int, int], deg: Degradations, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Camera-fixed dust: additive level (fraction of full scale, before the lamp
    gain) and speck_mask (pixels where a speck adds >= 5 % of its peak)."""
    ny, nx = frame_yx
    level = np.zeros(frame_yx, dtype=np.float64)
    if deg.dust_count == 0:
        return level.astype(np.float32), np.zeros(frame_yx, dtype=bool)
    y = np.arange(ny, dtype=np.float64)[:, None]
    x = np.arange(nx, dtype=np.float64)[None, :]
    for _ in range(deg.dust_count):
        cy, cx = rng.uniform(0, ny - 1), rng.uniform(0, nx - 1)
        sd = deg.dust_radius_px * rng.uniform(0.7, 1.5)
        np.maximum(level, deg.dust_level * np.exp(-0.5 * ((y - cy) ** 2 + (x - cx) ** 2) / (sd * sd)), out=level)
    return level.astype(np.float32), level >= 0.05 * deg.dust_level


# ---------------------------------------------------------------------------
# streaming


def stream_offset_px(
    y: np.ndarray, x: np.ndarray, t_min: float, *, center_yx: tuple[float, float],
    speed_px_per_min: float, core_px: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Where the texture now at (y, x) was at t = 0, as an offset (dy, dx) pixels:
    radially outward by  speed * t * (1 - exp(-rho / core))  (rho = distance to the
    centre).  Far from the centre the cells move inward at exactly `speed`; the map
    rho -> rho + offset is monotone, so the flow never folds."""
    dy, dx = y - center_yx[0], x - center_yx[1]
    rho = np.hypot(dy, dx)
    shift = speed_px_per_min * t_min * (1.0 - np.exp(-rho / core_px))
    with np.errstate(invalid="ignore", divide="ignore"):
        uy = np.where(rho > 0, dy / rho, 0.0)
        ux = np.where(rho > 0, dx / rho, 0.0)
    return shift * uy, shift * ux
