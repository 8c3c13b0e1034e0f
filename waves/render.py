"""Excitation field -> dark-field-like camera movie.

A simulated or synthetic excitation field (float in [0, 1], 1 = excited) is
turned into what a camera filming a cell field would record:

    level(t, y, x) = gain(y, x) * baseline(t) * (background + s * contrast * (e - 0.5))
    counts         = round(full_scale * level + noise),   clipped to the dtype

with

- ``s = +1`` for ``polarity='bright'`` (excited bands brighter) and ``-1`` for
  ``'dark'`` (excited bands darker).  Which one a real film shows depends on
  the optics and processing; nothing downstream may assume either.
- ``gain(y, x) = illumination_yx * texture_yx``, static over the movie:
  ``texture_yx = 1 + texture * tanh(z)`` with ``z`` white noise smoothed by a
  Gaussian of sd ``texture_scale_px`` pixels and scaled to unit sd (the cell
  texture; bounded in ``[1 - texture, 1 + texture]``), and
  ``illumination_yx`` a smooth vignette plus gradient spanning exactly
  ``[1 - illumination, 1]``.
- ``baseline(t) = 1 + drift * sin(2 pi t / drift_period_frames + phase)``, a
  slow drift of the overall level (``t`` is the frame index).
- ``noise`` Gaussian camera noise of sd ``noise * full_scale`` counts, drawn
  per frame from ``np.random.default_rng([seed, index])``, so rendering frame
  by frame (streaming) and rendering a whole movie give identical frames.

``full_scale`` is 255 for uint8 and 65535 for uint16.  The style is checked so
that the noise-free level stays inside (0, 1) of full scale; with the default
style the brightest noise-free pixel sits at about 0.69 and the darkest at
about 0.22 of full scale, so noise of a few sd does not clip.

`Degradations` (from `waves.degrade`) describes what a real recording adds: cell
texture, illumination fields, shot/read noise and bit depth, lamp fade and flicker,
stage drift, dropped frames, streaming cells, dish edge and dust;
`waves.synthetic.synthetic_recording` renders them with `waves.degrade_render`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from waves.degrade import Degradations
from waves.errors import WavesError

__all__ = ["DarkfieldStyle", "DarkfieldRenderer", "Degradations", "FULL_SCALE"]

FULL_SCALE: dict[str, int] = {"uint8": 255, "uint16": 65535}

_POLARITIES = ("bright", "dark")


def _number(name: str, value: object) -> float:
    try:
        out = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise WavesError(f"DarkfieldStyle.{name} must be a number, got {value!r}") from None
    if not math.isfinite(out):
        raise WavesError(f"DarkfieldStyle.{name} must be finite, got {value!r}")
    return out


@dataclass(frozen=True)
class DarkfieldStyle:
    """How an excitation field looks on camera.  All levels are fractions of
    the full scale of `dtype` (255 or 65535 counts).

    polarity            'bright': excited bands brighter; 'dark': darker.
    contrast            peak-to-peak band amplitude (e from 0 to 1), fraction of full scale.
    background          mean level (at e = 0.5), fraction of full scale.
    texture             static cell texture: multiplicative factor in [1 - texture, 1 + texture].
    texture_scale_px    smoothing of the texture speckle (Gaussian sd, pixels).
    illumination        uneven illumination: multiplicative factor in [1 - illumination, 1].
    drift               slow baseline drift: multiplicative factor in [1 - drift, 1 + drift].
    drift_period_frames period of the baseline drift, in frames.
    noise               Gaussian camera noise sd, fraction of full scale.
    dtype               'uint8' or 'uint16'.
    """

    polarity: str = "bright"
    contrast: float = 0.25
    background: float = 0.45
    texture: float = 0.15
    texture_scale_px: float = 2.0
    illumination: float = 0.15
    drift: float = 0.05
    drift_period_frames: float = 400.0
    noise: float = 0.01
    dtype: str = "uint8"

    def __post_init__(self) -> None:
        if self.polarity not in _POLARITIES:
            raise WavesError(
                f"DarkfieldStyle.polarity must be 'bright' (excited bands brighter) or "
                f"'dark' (excited bands darker), got {self.polarity!r}"
            )
        if str(self.dtype) not in FULL_SCALE:
            raise WavesError(
                f"DarkfieldStyle.dtype must be 'uint8' or 'uint16', got {self.dtype!r}"
            )
        object.__setattr__(self, "dtype", str(self.dtype))
        ranges = {
            # name: (low, high, low inclusive, high inclusive, hint)
            "contrast": (0.0, 1.0, True, True, "a fraction of full scale, e.g. 0.25"),
            "background": (0.0, 1.0, False, False, "a fraction of full scale, e.g. 0.45"),
            "texture": (0.0, 1.0, True, False, "e.g. 0.15 for +-15 %"),
            "texture_scale_px": (0.0, math.inf, False, False, "pixels, e.g. 2"),
            "illumination": (0.0, 1.0, True, False, "e.g. 0.15 for 15 % fall-off"),
            "drift": (0.0, 1.0, True, False, "e.g. 0.05 for +-5 %"),
            "drift_period_frames": (0.0, math.inf, False, False, "frames, e.g. 400"),
            "noise": (0.0, 1.0, True, False, "a fraction of full scale, e.g. 0.01"),
        }
        for name, (lo, hi, lo_in, hi_in, hint) in ranges.items():
            value = _number(name, getattr(self, name))
            ok_lo = value >= lo if lo_in else value > lo
            ok_hi = value <= hi if hi_in else value < hi
            if not (ok_lo and ok_hi):
                lb = "[" if lo_in else "("
                rb = "]" if hi_in else ")"
                raise WavesError(
                    f"DarkfieldStyle.{name} must lie in {lb}{lo:g}, {hi:g}{rb}, got {value!r} ({hint})"
                )
            object.__setattr__(self, name, value)
        low, high = self.level_range()
        if low <= 0.0 or high >= 1.0:
            raise WavesError(
                f"DarkfieldStyle would clip: noise-free levels span {low:.3f}..{high:.3f} of full "
                "scale, outside (0, 1); lower contrast, texture, illumination or drift, or move "
                "background towards 0.5"
            )

    def level_range(self) -> tuple[float, float]:
        """Lowest and highest noise-free level this style can produce, as
        fractions of full scale (worst case of every factor)."""
        lo_band = self.background - 0.5 * self.contrast
        hi_band = self.background + 0.5 * self.contrast
        low = lo_band * (1.0 - self.texture) * (1.0 - self.illumination) * (1.0 - self.drift)
        high = hi_band * (1.0 + self.texture) * (1.0 + self.drift)
        return low, high

    @property
    def sign(self) -> float:
        """+1 for bright bands, -1 for dark bands."""
        return 1.0 if self.polarity == "bright" else -1.0

    @property
    def full_scale(self) -> int:
        """Counts at full scale of `dtype`."""
        return FULL_SCALE[self.dtype]


def _illumination_yx(shape_yx: tuple[int, int], strength: float, rng: np.random.Generator) -> np.ndarray:
    """Smooth vignette + linear gradient spanning exactly [1 - strength, 1]."""
    ny, nx = shape_yx
    y = (np.arange(ny, dtype=np.float64) - (ny - 1) / 2.0) / max(ny, nx)
    x = (np.arange(nx, dtype=np.float64) - (nx - 1) / 2.0) / max(ny, nx)
    cy, cx = rng.uniform(-0.15, 0.15, size=2)
    angle = rng.uniform(0.0, 2.0 * np.pi)
    tilt = rng.uniform(0.3, 1.0)
    yy, xx = y[:, None], x[None, :]
    fall = (yy - cy) ** 2 + (xx - cx) ** 2 + tilt * 0.5 * (np.cos(angle) * xx + np.sin(angle) * yy)
    span = float(fall.max() - fall.min())
    if span <= 0.0:  # a single pixel
        return np.ones(shape_yx)
    fall = (fall - fall.min()) / span
    return 1.0 - strength * fall


def _texture_yx(
    shape_yx: tuple[int, int], strength: float, scale_px: float, rng: np.random.Generator
) -> np.ndarray:
    """Static multiplicative cell texture in [1 - strength, 1 + strength]."""
    z = rng.standard_normal(shape_yx)
    z = ndimage.gaussian_filter(z, sigma=scale_px, mode="wrap")
    sd = float(z.std())
    if sd > 0.0:
        z = (z - z.mean()) / sd
    return 1.0 + strength * np.tanh(z)


class DarkfieldRenderer:
    """Render excitation frames of one field size as camera frames.

    The static parts (texture, illumination, drift phase) are drawn once from
    `seed`; the noise of frame `index` comes from
    ``np.random.default_rng([seed, index])``.  So ``frame(e, i)`` depends only
    on ``(e, i, seed, style)``, and ``movie(e)`` equals stacking
    ``frame(e[i], i)``.
    """

    def __init__(
        self, shape_yx: tuple[int, int], *, style: DarkfieldStyle = DarkfieldStyle(), seed: int = 0
    ) -> None:
        try:
            ny, nx = (int(n) for n in shape_yx)
        except (TypeError, ValueError):
            raise WavesError(f"shape_yx must be two integers (rows, columns), got {shape_yx!r}") from None
        if ny < 1 or nx < 1:
            raise WavesError(f"shape_yx must be positive (rows, columns), got {shape_yx!r}")
        if not isinstance(style, DarkfieldStyle):
            raise WavesError(f"style must be a DarkfieldStyle, got {type(style).__name__}")
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise WavesError(f"seed must be a non-negative integer, got {seed!r}")
        self.shape_yx: tuple[int, int] = (ny, nx)
        self.style = style
        self.seed = int(seed)
        # static parts: a three-word seed, so no frame's [seed, index] stream can equal it
        rng = np.random.default_rng([self.seed, 0x5EED, 1])
        illum = _illumination_yx(self.shape_yx, style.illumination, rng)
        tex = _texture_yx(self.shape_yx, style.texture, style.texture_scale_px, rng)
        self._drift_phase = float(rng.uniform(0.0, 2.0 * np.pi))
        gain = (illum * tex).astype(np.float32)
        gain.flags.writeable = False
        self._gain = gain

    @property
    def gain_yx(self) -> np.ndarray:
        """Static multiplicative gain (illumination x texture), (y, x) float32, read-only."""
        return self._gain

    def baseline(self, index: int) -> float:
        """Baseline drift factor of frame `index` (dimensionless, near 1)."""
        s = self.style
        return 1.0 + s.drift * math.sin(2.0 * math.pi * index / s.drift_period_frames + self._drift_phase)

    def _check_frame(self, excitation: np.ndarray, what: str) -> np.ndarray:
        e = np.asarray(excitation)
        if e.shape != self.shape_yx:
            raise WavesError(
                f"{what} has shape {e.shape}, but this renderer was made for (y, x) = {self.shape_yx}; "
                "make a DarkfieldRenderer with the field's shape"
            )
        return e

    def _render_into(self, e: np.ndarray, index: int, out: np.ndarray) -> None:
        s = self.style
        ef = np.asarray(e, dtype=np.float32)
        if not np.isfinite(ef).all():
            raise WavesError(f"excitation of frame {index} holds NaN or inf; render only finite fields")
        lo, hi = float(ef.min()), float(ef.max())
        if lo < -1e-6 or hi > 1.0 + 1e-6:
            raise WavesError(
                f"excitation of frame {index} spans {lo:.4g}..{hi:.4g}, outside [0, 1]; rescale it "
                "to 0 = rest, 1 = fully excited before rendering"
            )
        fs = float(s.full_scale)
        level = np.clip(ef, 0.0, 1.0)
        level -= np.float32(0.5)
        level *= np.float32(s.sign * s.contrast)
        level += np.float32(s.background)
        level *= self._gain
        level *= np.float32(fs * self.baseline(index))
        if s.noise > 0.0:
            rng = np.random.default_rng([self.seed, int(index)])
            noise = rng.standard_normal(self.shape_yx, dtype=np.float32)
            noise *= np.float32(s.noise * fs)
            level += noise
        np.rint(level, out=level)
        np.clip(level, 0.0, fs, out=level)
        out[...] = level

    def frame(self, excitation: np.ndarray, index: int) -> np.ndarray:
        """One camera frame (y, x) of `style.dtype` from an excitation frame in [0, 1].

        Deterministic given the renderer's seed and `index` (the frame number,
        which also sets the baseline drift)."""
        if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or index < 0:
            raise WavesError(f"frame index must be a non-negative integer, got {index!r}")
        e = self._check_frame(excitation, "excitation frame")
        out = np.empty(self.shape_yx, dtype=self.style.dtype)
        self._render_into(e, int(index), out)
        return out

    def movie(self, excitation: np.ndarray) -> np.ndarray:
        """Camera movie (t, y, x) of `style.dtype`; frame i equals ``frame(excitation[i], i)``."""
        e = np.asarray(excitation)
        if e.ndim != 3 or e.shape[1:] != self.shape_yx:
            raise WavesError(
                f"excitation movie has shape {e.shape}; expected (t, y, x) with (y, x) = {self.shape_yx}"
            )
        out = np.empty(e.shape, dtype=self.style.dtype)
        for i in range(e.shape[0]):
            self._render_into(e[i], i, out[i])
        return out
