"""Excitation -> degraded camera frames: `RecordingRenderer`.

The renderer works on a *canvas*, the recorded frame padded by `margin_px` on every
side, so a drifting stage shows texture (and waves) that continue past the frame
borders: the excitation must be given on that canvas.  Per nominal frame i at
t = i * frame_interval_s:

1. texture(t): the static granular texture, or, with streaming cells, the texture
   advected toward the stream centre (`waves.degrade_fields.stream_offset_px`,
   cubic-spline resampling); a slow random change multiplies it by 1 + texture_wander *
   w(t) (`waves.degrade_fields.wander_fields`, red noise); mounds multiply it by
   1 + mound_gain * (t / t_last) * profile;
2. sample = background * texture * (1 + s m e) + s band (e - 0.5) where cells are,
   empty_level * background elsewhere, + rim_gain * background * rim;
3. stage drift: ``scipy.ndimage.shift(sample, drift_px[i], order=3)`` (content moves
   by +drift: truth pixel (r, c) appears at (r + dy, c + dx)), cropped to the frame;
4. level = (sample + dust) * illumination * lamp(i) * flicker(i);
5. counts = full_scale * Poisson(level * full_well_e) / full_well_e (or full_scale *
   level) + Normal(0, read_noise_counts), rounded and clipped to [0, full_scale].

Noise of frame i comes from ``default_rng([seed, 7, i])``: rendering is
deterministic per seed and independent of which other frames are rendered.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from waves.degrade import Degradations
from waves.degrade_fields import (
    drift_path,
    dust_field,
    flicker_set,
    frame_schedule,
    illumination_field,
    lamp_gain,
    mound_profiles,
    presence_and_rim,
    rng_for,
    stream_offset_px,
    texture_field,
    wander_fields,
)
from waves.errors import WavesError

__all__ = ["RecordingRenderer"]

_POLARITY_SIGN = {"bright": 1.0, "dark": -1.0}


class RecordingRenderer:
    """Static fields, time laws and the per-frame rendering of one degraded recording."""

    def __init__(
        self,
        frame_yx: tuple[int, int],
        n_frames: int,
        *,
        pixel_size_um: float,
        frame_interval_s: float,
        degradations: Degradations,
        polarity: str = "bright",
        background: float = 0.45,
        dtype: str = "uint8",
        seed: int = 0,
    ) -> None:
        if not isinstance(degradations, Degradations):
            raise WavesError(f"degradations must be a waves.render.Degradations, got {type(degradations).__name__}")
        if polarity not in _POLARITY_SIGN:
            raise WavesError(f"polarity must be 'bright' or 'dark', got {polarity!r}")
        if not 0.0 < float(background) < 1.0:
            raise WavesError(f"background must lie in (0, 1) of full scale, e.g. 0.45, got {background!r}")
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise WavesError(f"seed must be a non-negative integer, got {seed!r}")
        deg = degradations
        self.deg = deg
        self.dtype = str(dtype)
        self.full_scale = deg.full_scale(self.dtype)
        self.sign = _POLARITY_SIGN[polarity]
        self.background = float(background)
        self.seed = int(seed)
        self.frame_yx = (int(frame_yx[0]), int(frame_yx[1]))
        self.n_frames = int(n_frames)
        self.pixel_size_um = float(pixel_size_um)
        self.dt_min = float(frame_interval_s) / 60.0
        self.t_last_min = max(self.n_frames - 1, 1) * self.dt_min
        ny, nx = self.frame_yx

        # time laws
        self.drift_px, self.jump_frames = drift_path(self.n_frames, deg, rng_for(seed, 1))
        self.lamp = lamp_gain(self.n_frames, deg)
        self.flicker = flicker_set(self.n_frames, deg, rng_for(seed, 2))
        self.gain = self.lamp.copy()
        for f, g in self.flicker.items():
            self.gain[f] *= g
        self.recorded, self.gaps = frame_schedule(self.n_frames, deg, rng_for(seed, 3))

        # canvas: room for the drift and the cubic spline's support
        self.margin_px = int(math.ceil(float(np.abs(self.drift_px).max()))) + 4
        m = self.margin_px
        self.canvas_yx = (ny + 2 * m, nx + 2 * m)
        self.presence, self.rim = presence_and_rim(self.canvas_yx, m, self.frame_yx, deg, self.pixel_size_um)
        self.mounds, self.mound_centres_px = mound_profiles(
            self.canvas_yx, m, self.frame_yx, deg, self.pixel_size_um, rng_for(seed, 4)
        )
        self.illumination = illumination_field(self.frame_yx, deg)
        self.dust, self.speck_mask = dust_field(self.frame_yx, deg, rng_for(seed, 5))

        # texture, with room for the streaming offset
        self.stream_center_px = (deg.stream_center_frac[0] * (ny - 1), deg.stream_center_frac[1] * (nx - 1))
        self.stream_speed_px_per_min = deg.stream_speed_um_per_min / self.pixel_size_um
        self.stream_core_px = deg.stream_core_um / self.pixel_size_um
        pad = 0
        if deg.streams:
            pad = int(math.ceil(self.stream_speed_px_per_min * self.t_last_min)) + 4
        self._tex_pad = pad
        big = (self.canvas_yx[0] + 2 * pad, self.canvas_yx[1] + 2 * pad)
        tex = texture_field(big, deg, rng_for(seed, 6))
        if deg.streams:
            self._coeffs = ndimage.spline_filter(tex.astype(np.float64), order=3, mode="mirror")
            y = np.arange(self.canvas_yx[0], dtype=np.float64)[:, None] - m
            x = np.arange(self.canvas_yx[1], dtype=np.float64)[None, :] - m
            self._cy, self._cx = np.broadcast_arrays(y, x)
            self._texture = None
        else:
            self._texture = tex[pad : pad + self.canvas_yx[0], pad : pad + self.canvas_yx[1]]
        self._wander = wander_fields(self.canvas_yx, self.n_frames, self.dt_min, deg, rng_for(seed, 8))

    # ------------------------------------------------------------------

    def texture_at(self, t_min: float) -> np.ndarray:
        """Cell texture on the canvas at time t_min (mean ~1)."""
        if self._texture is not None:
            return self._texture
        oy, ox = stream_offset_px(
            self._cy, self._cx, t_min, center_yx=self.stream_center_px,
            speed_px_per_min=self.stream_speed_px_per_min, core_px=self.stream_core_px,
        )
        base = self.margin_px + self._tex_pad
        coords = np.stack([self._cy + base + oy, self._cx + base + ox])
        return ndimage.map_coordinates(self._coeffs, coords, order=3, prefilter=False,
                                       mode="mirror", output=np.float32)

    def sample(self, e_canvas: np.ndarray, index: int) -> np.ndarray:
        """Sample scattering (fraction of full scale) on the canvas, before drift,
        illumination, lamp and noise."""
        deg = self.deg
        t = index * self.dt_min
        e = np.asarray(e_canvas, dtype=np.float32)
        if e.shape != self.canvas_yx:
            raise WavesError(f"excitation canvas has shape {e.shape}, expected {self.canvas_yx}")
        tex = self.texture_at(t)
        if self._wander is not None:  # red-noise change of the scattering
            pats, coef = self._wander
            w = np.tensordot(coef[index], pats, axes=1)
            tex = np.maximum(tex * (1.0 + np.float32(deg.texture_wander) * w), np.float32(0.05))
        if deg.mound_count:
            tex = tex * (1.0 + np.float32(deg.mound_gain * t / self.t_last_min) * self.mounds)
        bg = np.float32(self.background)
        out = tex * (bg * (1.0 + np.float32(self.sign * deg.modulation) * e))
        if deg.band > 0.0:
            out += np.float32(self.sign * deg.band) * (e - np.float32(0.5))
        if deg.dish_edge is not None or deg.strip_width_um > 0.0:
            out = self.presence * out + (1.0 - self.presence) * np.float32(deg.empty_level * self.background)
        if deg.dish_edge is not None and deg.rim_gain > 0.0:
            out += np.float32(deg.rim_gain * self.background) * self.rim
        return out

    def frame(self, e_canvas: np.ndarray, index: int) -> np.ndarray:
        """Recorded camera frame (y, x) of nominal frame `index`."""
        s = self.sample(e_canvas, index)
        d = self.drift_px[index]
        if d[0] != 0.0 or d[1] != 0.0:
            s = ndimage.shift(s, d, order=3, mode="nearest")
        m = self.margin_px
        ny, nx = self.frame_yx
        level = s[m : m + ny, m : m + nx]
        if self.deg.dust_count:
            level = level + self.dust
        level = level * (self.illumination * np.float32(self.gain[index]))
        return self.counts(level, index)

    def counts(self, level: np.ndarray, index: int) -> np.ndarray:
        """Level (fraction of full scale) -> camera counts with shot and read noise."""
        deg = self.deg
        fs = float(self.full_scale)
        rng = np.random.default_rng([self.seed, 7, int(index)])
        lev = np.maximum(level, 0.0, dtype=np.float32)
        if deg.full_well_e > 0.0:
            c = rng.poisson(lev * np.float32(deg.full_well_e)).astype(np.float32)
            c *= np.float32(fs / deg.full_well_e)
        else:
            c = lev * np.float32(fs)
        if deg.read_noise_counts > 0.0:
            c += rng.standard_normal(c.shape, dtype=np.float32) * np.float32(deg.read_noise_counts)
        np.rint(c, out=c)
        np.clip(c, 0.0, fs, out=c)
        return c.astype(self.dtype)

    def cell_mask(self) -> np.ndarray:
        """(y, x) bool in truth (zero-drift frame) coordinates: where cells are."""
        m = self.margin_px
        ny, nx = self.frame_yx
        return self.presence[m : m + ny, m : m + nx] > 0.5
