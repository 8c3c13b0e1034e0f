"""Units and calibration, normalised once.

Lengths are carried in micrometres and times in seconds inside the code
(`pixel_size_um`, `frame_interval_s`); tables a person reads use minutes,
um/min and mm^2 (DESIGN.md).  Every conversion from a unit written in a file or
typed by a user goes through `length_to_um` or `time_to_s`, so there is one
table of unit spellings and one set of factors.
"""

from __future__ import annotations

import math
import unicodedata
from dataclasses import dataclass, replace

from waves.errors import CalibrationError

__all__ = [
    "Calibration",
    "LENGTH_UNITS_UM",
    "TIME_UNITS_S",
    "length_to_um",
    "time_to_s",
    "normalise_length_unit",
    "normalise_time_unit",
    "resolve_calibration",
    "check_positive",
    "ORIGINS",
]

# factor to micrometres, keyed by canonical spelling
LENGTH_UNITS_UM: dict[str, float] = {
    "nm": 1e-3,
    "um": 1.0,
    "mm": 1e3,
    "cm": 1e4,
    "m": 1e6,
}

_LENGTH_ALIASES: dict[str, str] = {
    "nm": "nm",
    "nanometer": "nm",
    "nanometre": "nm",
    "nanometers": "nm",
    "nanometres": "nm",
    "um": "um",
    "micron": "um",
    "microns": "um",
    "micrometer": "um",
    "micrometre": "um",
    "micrometers": "um",
    "micrometres": "um",
    "mm": "mm",
    "millimeter": "mm",
    "millimetre": "mm",
    "millimeters": "mm",
    "millimetres": "mm",
    "cm": "cm",
    "centimeter": "cm",
    "centimetre": "cm",
    "centimeters": "cm",
    "centimetres": "cm",
    "m": "m",
    "meter": "m",
    "metre": "m",
    "meters": "m",
    "metres": "m",
}

# factor to seconds, keyed by canonical spelling
TIME_UNITS_S: dict[str, float] = {
    "ms": 1e-3,
    "s": 1.0,
    "min": 60.0,
    "h": 3600.0,
}

_TIME_ALIASES: dict[str, str] = {
    "ms": "ms",
    "msec": "ms",
    "millisecond": "ms",
    "milliseconds": "ms",
    "s": "s",
    "sec": "s",
    "secs": "s",
    "second": "s",
    "seconds": "s",
    "min": "min",
    "mins": "min",
    "minute": "min",
    "minutes": "min",
    "h": "h",
    "hr": "h",
    "hrs": "h",
    "hour": "h",
    "hours": "h",
}

ORIGINS = ("imagej", "ome", "options", "simulation")


def _clean(unit: str) -> str:
    # NFKC maps the micro sign (U+00B5) to Greek mu (U+03BC); both mean micro.
    text = unicodedata.normalize("NFKC", str(unit)).strip().lower()
    text = text.replace("\u03bc", "u")
    # ImageJ writes '\\u00B5m' into its description when it cannot store the sign
    text = text.replace("\\u00b5", "u")
    return text


def normalise_length_unit(unit: str) -> str:
    """Canonical spelling ('nm', 'um', 'mm', 'cm', 'm') of a length unit."""
    key = _clean(unit)
    if key not in _LENGTH_ALIASES:
        known = ", ".join(sorted(LENGTH_UNITS_UM))
        raise CalibrationError(
            f"unknown length unit {unit!r}; use one of {known} (or 'micron', 'µm'), "
            "or give the pixel size with --pixel-size UM"
        )
    return _LENGTH_ALIASES[key]


def normalise_time_unit(unit: str) -> str:
    """Canonical spelling ('ms', 's', 'min', 'h') of a time unit."""
    key = _clean(unit)
    if key not in _TIME_ALIASES:
        known = ", ".join(sorted(TIME_UNITS_S))
        raise CalibrationError(
            f"unknown time unit {unit!r}; use one of {known}, "
            "or give the frame interval with --frame-interval S"
        )
    return _TIME_ALIASES[key]


def length_to_um(value: float, unit: str) -> float:
    """Convert a length in `unit` to micrometres."""
    return float(value) * LENGTH_UNITS_UM[normalise_length_unit(unit)]


def time_to_s(value: float, unit: str) -> float:
    """Convert a duration in `unit` to seconds."""
    return float(value) * TIME_UNITS_S[normalise_time_unit(unit)]


def check_positive(name: str, value: float, option: str) -> float:
    """`value` as a positive finite float, or a CalibrationError naming `option`."""
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise CalibrationError(f"{name} must be a number, got {value!r}; give it with {option}") from None
    if not math.isfinite(value) or value <= 0:
        raise CalibrationError(
            f"{name} must be a positive finite number, got {value!r}; give it with {option}"
        )
    return value


@dataclass(frozen=True)
class Calibration:
    """Pixel size and frame interval of a stack, with where each came from.

    `origin` is the single word of the output contract: 'options' when any
    value was supplied by the user, otherwise the file's kind ('imagej', 'ome')
    or 'simulation'.  The per-value origins are kept too.
    """

    pixel_size_um: float
    frame_interval_s: float
    pixel_size_origin: str = "options"
    frame_interval_origin: str = "options"

    def __post_init__(self) -> None:
        object.__setattr__(
            self,
            "pixel_size_um",
            check_positive("pixel size (um)", self.pixel_size_um, "--pixel-size UM"),
        )
        object.__setattr__(
            self,
            "frame_interval_s",
            check_positive("frame interval (s)", self.frame_interval_s, "--frame-interval S"),
        )
        for origin in (self.pixel_size_origin, self.frame_interval_origin):
            if origin not in ORIGINS:
                raise CalibrationError(f"calibration origin must be one of {ORIGINS}, got {origin!r}")

    @property
    def origin(self) -> str:
        if "options" in (self.pixel_size_origin, self.frame_interval_origin):
            return "options"
        return self.pixel_size_origin

    @property
    def frame_interval_min(self) -> float:
        return self.frame_interval_s / 60.0

    def binned(self, factor: int) -> Calibration:
        """Calibration after spatial binning by an integer factor."""
        return replace(self, pixel_size_um=self.pixel_size_um * int(factor))

    def subsampled(self, step: int) -> Calibration:
        """Calibration after keeping every `step`-th frame."""
        return replace(self, frame_interval_s=self.frame_interval_s * int(step))

    def to_dict(self) -> dict:
        """The `calibration` block of summary.json (extra keys welcome)."""
        return {
            "pixel_size_um": self.pixel_size_um,
            "frame_interval_s": self.frame_interval_s,
            "origin": self.origin,
            "pixel_size_origin": self.pixel_size_origin,
            "frame_interval_origin": self.frame_interval_origin,
        }


def resolve_calibration(
    *,
    file_pixel_size_um: float | None,
    file_frame_interval_s: float | None,
    file_origin: str | None,
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
    source: str = "the stack",
) -> Calibration:
    """Combine what a file says with what the user gave; options win.

    Refuses (never guesses 1 um / 1 s) when a value is in neither place, with a
    message saying how to give it.
    """
    missing = []
    if pixel_size_um is not None:
        px, px_origin = pixel_size_um, "options"
    elif file_pixel_size_um is not None:
        px, px_origin = file_pixel_size_um, file_origin or "options"
    else:
        px, px_origin = None, None
        missing.append("pixel size (give --pixel-size UM, in micrometres per pixel)")
    if frame_interval_s is not None:
        dt, dt_origin = frame_interval_s, "options"
    elif file_frame_interval_s is not None:
        dt, dt_origin = file_frame_interval_s, file_origin or "options"
    else:
        dt, dt_origin = None, None
        missing.append("frame interval (give --frame-interval S, in seconds between frames)")
    if missing:
        raise CalibrationError(f"{source} has no calibration for " + " and ".join(missing))
    return Calibration(px, dt, px_origin, dt_origin)
