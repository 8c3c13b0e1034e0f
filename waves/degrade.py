"""What a real recording does to a clean wave field: the `Degradations` settings.

Every field is off by default (0, None or empty); `waves.synthetic.synthetic_recording`
renders a movie with the degradations switched on and returns their truth beside
the wave field's.  Units are in the names: ``_px`` pixels of the recorded frame,
``_um`` micrometres, ``_frac`` fractions of the field size (rows for y, columns for
x), gains and levels are dimensionless factors or fractions of full scale.

The camera model (see `waves.degrade_render`): the *sample* (cells on the dish)
scatters light

    sample = background * texture * mound * (1 + s * modulation * e) + s * band * (e - 0.5)

where cells are, ``empty_level * background`` where there are none (outside the
dish, in a cleared strip), plus a bright rim at the dish edge; ``e`` in [0, 1] is the
excitation, ``s = +1`` for bright and ``-1`` for dark bands.  The sample moves
against the camera by the stage drift (sub-pixel shift of a larger rendered field,
then cropped: the texture continues past the borders); then the camera-fixed
illumination field, the lamp gain of the frame and dust specks apply, and the level
(fraction of full scale) becomes counts with shot and read noise, clipped at full
scale of the bit depth.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from waves.errors import WavesError

__all__ = ["Degradations"]

_FADE_LAWS = ("linear", "exponential")
_DISH_EDGES = ("circle", "line")


def _num(name: str, value: object) -> float:
    try:
        out = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise WavesError(f"Degradations.{name} must be a number, got {value!r}") from None
    if not math.isfinite(out):
        raise WavesError(f"Degradations.{name} must be finite, got {value!r}")
    return out


def _count(name: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int) and not hasattr(value, "__index__"):
        raise WavesError(f"Degradations.{name} must be a whole number >= 0, got {value!r}")
    out = int(value)  # type: ignore[call-overload]
    if out < 0:
        raise WavesError(f"Degradations.{name} must be a whole number >= 0, got {value!r}")
    return out


def _pair(name: str, value: object) -> tuple[float, float]:
    try:
        a, b = value  # type: ignore[misc]
    except (TypeError, ValueError):
        raise WavesError(f"Degradations.{name} must be a pair of numbers, got {value!r}") from None
    return (_num(name, a), _num(name, b))


@dataclass(frozen=True)
class Degradations:
    """Degradations of a synthetic recording; every one off by default.

    Cell texture (the wave signal is a modulation of it)
      texture_contrast        relative sd of the granular dark-field texture (0 = uniform
                              cells; 0.5 is a strongly grainy field).
      texture_grain_px        Gaussian sd of one bright grain, pixels (a few px across).
      texture_wander          relative sd of a slow random change of the scattering (cells
                              shifting, rounding, clumping): red noise, each pixel a mix of
                              AR(1) processes in time on grain-sized patches; 0 = off.
      wander_time_min         correlation time of that change, minutes.
      texture_modulation      fractional change of the scattering at full excitation
                              (0.03-0.05 in real fields); None: 0.04 with texture, else 0.
      band_contrast           additive smooth band amplitude (fraction of full scale, peak
                              to peak); None: 0.25 without texture, 0 with texture.
    Illumination (camera-fixed, multiplies everything)
      vignetting              fractional fall-off at the corners, radial (r / r_corner)^2.
      ramp                    (low, high) gain of a linear ramp across the field, e.g.
                              (0.3, 2.0); None = off.
      ramp_direction_deg      direction of increasing gain, degrees counterclockwise from
                              +x as displayed (0 = x, 90 = up, 45 = diagonal).
      spot_gain               extra gain at the centre of a Gaussian spot (e.g. 0.5 = x1.5).
      spot_center_frac        (y, x) of the spot, fractions of the field.
      spot_sd_frac            Gaussian sd of the spot, fraction of the larger field side.
    Noise and bit depth
      full_well_e             photo-electrons at full scale for Poisson shot noise (0 = off);
                              variance in counts = mean * full_scale / full_well_e.
      read_noise_counts       Gaussian read noise sd, counts.
      bits                    8 (uint8) or 12 / 16 (uint16); None = the dtype's full range.
    Lamp
      lamp_fade               fractional loss of brightness from the first to the last
                              nominal frame (0.4 = -40 %).
      lamp_fade_law           'linear' or 'exponential'.
      flicker_count           number of random flicker frames (whole-frame gain jumps).
      flicker_frames          nominal frame indices that flicker, besides the random ones.
      flicker_gain            size of a jump, fraction (0.1 = x1.1 or x0.9, sign random).
    Stage drift (sample against camera; drift_px truth is per recorded frame)
      drift_px                amplitude of the smooth drift, pixels (each axis a smooth random
                              path starting at 0 at frame 0, max |excursion| = drift_px).
      drift_jump_px           size of each sudden jump, pixels (random direction).
      drift_jump_count        number of jumps (at random frames) when drift_jump_px > 0.
    Dropped frames (times_s keeps the true times)
      drop_fraction           fraction of nominal frames randomly missing.
      gap_frames              length of each gap of consecutive missing frames.
      gap_count               number of such gaps (when gap_frames > 0).
    Streaming cells (texture advected; the waves are not)
      stream_speed_um_per_min speed of the cells toward the stream centre (far from it).
      stream_center_frac      (y, x) of the stream centre, fractions of the field.
      stream_core_um          radius inside which the inflow slows down (no singularity).
      strip_width_um          width of a strip cleared of cells (no texture, no signal)
                              running from the stream centre outward; 0 = none.
      strip_angle_deg         direction of the strip from the centre (ccw from +x).
      mound_count             number of mounds (brighter, growing blobs of cells).
      mound_radius_um         Gaussian sd of a mound.
      mound_gain              extra brightness of a mound's centre at the last frame (1.0 = x2).
    Dish edge and dust
      dish_edge               'circle' or 'line' or None: part of the frame has no cells.
      dish_radius_frac        circle: radius, fraction of the larger field side.
      dish_center_frac        circle: (y, x) centre, fractions of the field.
      dish_line_angle_deg     line: direction of the outward normal (ccw from +x); cells
                              lie on the other side.
      dish_line_frac          line: fraction of the field (along the normal) that has cells.
      rim_gain                brightness of the rim, in units of the background level.
      rim_width_px            Gaussian sd of the rim profile, pixels.
      empty_level             level where no cells are, in units of the background level.
      dust_count              number of static bright dust specks (camera-fixed).
      dust_radius_px          Gaussian sd of a speck, pixels.
      dust_level              peak brightness of a speck, fraction of full scale.
    """

    texture_contrast: float = 0.0
    texture_grain_px: float = 1.5
    texture_wander: float = 0.0
    wander_time_min: float = 10.0
    texture_modulation: float | None = None
    band_contrast: float | None = None
    vignetting: float = 0.0
    ramp: tuple[float, float] | None = None
    ramp_direction_deg: float = 0.0
    spot_gain: float = 0.0
    spot_center_frac: tuple[float, float] = (0.5, 0.5)
    spot_sd_frac: float = 0.25
    full_well_e: float = 0.0
    read_noise_counts: float = 0.0
    bits: int | None = None
    lamp_fade: float = 0.0
    lamp_fade_law: str = "linear"
    flicker_count: int = 0
    flicker_frames: tuple[int, ...] = ()
    flicker_gain: float = 0.1
    drift_px: float = 0.0
    drift_jump_px: float = 0.0
    drift_jump_count: int = 1
    drop_fraction: float = 0.0
    gap_frames: int = 0
    gap_count: int = 1
    stream_speed_um_per_min: float = 0.0
    stream_center_frac: tuple[float, float] = (0.5, 0.5)
    stream_core_um: float = 100.0
    strip_width_um: float = 0.0
    strip_angle_deg: float = 0.0
    mound_count: int = 0
    mound_radius_um: float = 40.0
    mound_gain: float = 1.0
    dish_edge: str | None = None
    dish_radius_frac: float = 0.45
    dish_center_frac: tuple[float, float] = (0.5, 0.5)
    dish_line_angle_deg: float = 0.0
    dish_line_frac: float = 0.5
    rim_gain: float = 1.5
    rim_width_px: float = 2.0
    empty_level: float = 0.1
    dust_count: int = 0
    dust_radius_px: float = 1.2
    dust_level: float = 0.5

    def __post_init__(self) -> None:  # noqa: C901 - one check per field, flat
        set_ = object.__setattr__
        # (name, low, high) closed ranges for plain numbers
        ranges = {
            "texture_contrast": (0.0, 1.0), "texture_grain_px": (0.3, 20.0),
            "texture_wander": (0.0, 1.0), "wander_time_min": (0.01, 1e6),
            "vignetting": (0.0, 0.95), "ramp_direction_deg": (-360.0, 360.0),
            "spot_gain": (-0.95, 10.0), "spot_sd_frac": (0.01, 10.0),
            "full_well_e": (0.0, 1e9), "read_noise_counts": (0.0, 1e5),
            "lamp_fade": (0.0, 0.99), "flicker_gain": (0.0, 0.9),
            "drift_px": (0.0, 50.0), "drift_jump_px": (0.0, 50.0),
            "drop_fraction": (0.0, 0.9), "stream_speed_um_per_min": (0.0, 1000.0),
            "stream_core_um": (1.0, 1e6), "strip_width_um": (0.0, 1e6),
            "strip_angle_deg": (-360.0, 360.0), "mound_radius_um": (0.1, 1e6),
            "mound_gain": (0.0, 20.0), "dish_radius_frac": (0.01, 10.0),
            "dish_line_angle_deg": (-360.0, 360.0), "dish_line_frac": (0.0, 1.0),
            "rim_gain": (0.0, 20.0), "rim_width_px": (0.1, 100.0),
            "empty_level": (0.0, 1.0), "dust_radius_px": (0.3, 50.0), "dust_level": (0.0, 1.0),
        }
        for name, (lo, hi) in ranges.items():
            v = _num(name, getattr(self, name))
            if not lo <= v <= hi:
                raise WavesError(f"Degradations.{name} must lie in [{lo:g}, {hi:g}], got {v!r}")
            set_(self, name, v)
        for name in ("texture_modulation", "band_contrast"):
            v = getattr(self, name)
            if v is not None:
                v = _num(name, v)
                if not 0.0 <= v <= 1.0:
                    raise WavesError(f"Degradations.{name} must lie in [0, 1] or be None, got {v!r}")
                set_(self, name, v)
        for name in ("flicker_count", "drift_jump_count", "gap_frames", "gap_count",
                     "mound_count", "dust_count"):
            set_(self, name, _count(name, getattr(self, name)))
        for name in ("spot_center_frac", "stream_center_frac", "dish_center_frac"):
            set_(self, name, _pair(name, getattr(self, name)))
        if self.ramp is not None:
            lo, hi = _pair("ramp", self.ramp)
            if lo <= 0.0 or hi <= 0.0:
                raise WavesError(f"Degradations.ramp gains must be positive, e.g. (0.3, 2.0), got {self.ramp!r}")
            set_(self, "ramp", (lo, hi))
        if self.bits is not None and (isinstance(self.bits, bool) or self.bits not in (8, 12, 16)):
            raise WavesError(f"Degradations.bits must be 8, 12, 16 or None, got {self.bits!r}")
        if self.lamp_fade_law not in _FADE_LAWS:
            raise WavesError(f"Degradations.lamp_fade_law must be one of {_FADE_LAWS}, got {self.lamp_fade_law!r}")
        if self.dish_edge is not None and self.dish_edge not in _DISH_EDGES:
            raise WavesError(f"Degradations.dish_edge must be 'circle', 'line' or None, got {self.dish_edge!r}")
        try:
            frames = tuple(sorted({_count("flicker_frames", f) for f in self.flicker_frames}))
        except TypeError:
            raise WavesError(f"Degradations.flicker_frames must be frame indices, got {self.flicker_frames!r}") from None
        set_(self, "flicker_frames", frames)

    # derived settings -------------------------------------------------------

    @property
    def modulation(self) -> float:
        """Fractional scattering change at full excitation actually used."""
        if self.texture_modulation is not None:
            return self.texture_modulation
        return 0.04 if self.texture_contrast > 0.0 else 0.0

    @property
    def band(self) -> float:
        """Additive band amplitude (fraction of full scale) actually used."""
        if self.band_contrast is not None:
            return self.band_contrast
        return 0.0 if self.texture_contrast > 0.0 else 0.25

    @property
    def streams(self) -> bool:
        return self.stream_speed_um_per_min > 0.0

    def full_scale(self, dtype: str) -> int:
        """Counts at full scale for `dtype` ('uint8' or 'uint16') and `bits`."""
        if dtype == "uint8":
            if self.bits not in (None, 8):
                raise WavesError(f"bits={self.bits} needs dtype='uint16'; uint8 holds 8 bits")
            return 255
        if dtype == "uint16":
            return (1 << (self.bits or 16)) - 1 if self.bits != 8 else 255
        raise WavesError(f"dtype must be 'uint8' or 'uint16', got {dtype!r}")
