"""Plausibility of the calibration and of the headline numbers.

A pixel size typed in nm where um were asked for makes a 5-mm field 5 m wide
and every speed a thousand times too high; a frame interval in ms for s makes
the period a thousand times too long.  Nothing in the analysis fails: the
numbers only look strange.  These checks compare the field, the frame
interval and the results with what excitable media filmed through a
microscope or a macro lens show, and name the likely slip.  The bounds are
generous on purpose (from memory, no source: culture dishes are at most
~15 cm across; relayed waves in cell fields, chemical waves and cardiac
monolayers run at ~10 um/min to ~0.5 m/s with periods from a fraction of a
second to tens of minutes), so a warning means a real slip, not an unusual
medium.
"""

from __future__ import annotations

FIELD_MAX_UM = 2e5  # 20 cm: wider than any dish
FIELD_MIN_UM = 20.0  # narrower than a couple of cells
FRAME_INTERVAL_MAX_S = 1800.0  # half an hour between frames: no wave of minutes is resolved
PERIOD_MAX_MIN = 24 * 60.0  # a period of more than a day
SPEED_MAX_UM_PER_MIN = 1e8  # 1.7 m/s: faster than any excitable medium
SPEED_MIN_UM_PER_MIN = 0.1  # slower than the cells crawl


def calibration_warnings(pixel_size_um: float, frame_interval_s: float, shape_yx: tuple[int, int]) -> list[str]:
    """Warnings for a field or a frame interval no recording of waves has."""
    out = []
    width = float(max(shape_yx)) * float(pixel_size_um)
    if width > FIELD_MAX_UM:
        out.append(
            f"the field is {width / 1e6:.3g} m wide at {pixel_size_um:g} um per pixel, wider than any dish: "
            f"was the pixel size given in nm? ({pixel_size_um / 1000:g} um per pixel would make it "
            f"{width / 1e6:.3g} mm); speeds, wavelengths and areas scale with it"
        )
    elif width < FIELD_MIN_UM:
        out.append(
            f"the field is only {width:.3g} um wide at {pixel_size_um:g} um per pixel: was the pixel size "
            f"given in mm? ({pixel_size_um * 1000:g} um per pixel would make it {width:.3g} mm); "
            "speeds, wavelengths and areas scale with it"
        )
    if float(frame_interval_s) > FRAME_INTERVAL_MAX_S:
        out.append(
            f"frames are {frame_interval_s:g} s ({frame_interval_s / 3600:.3g} h) apart: was the frame interval "
            f"given in ms? ({frame_interval_s / 1000:g} s per frame); periods and speeds scale with it"
        )
    return out


def result_warnings(summary: dict) -> list[str]:
    """Warnings for a period or a front speed outside what any excitable medium shows."""
    out = []
    period = (summary.get("period_min") or {}).get("median")
    if period is not None and period > PERIOD_MAX_MIN:
        out.append(f"the period is {period / 60:.3g} h, longer than any excitable medium's: check the frame "
                   "interval's unit (ms given as s?)")
    speed = (summary.get("front_speed_um_per_min") or {}).get("median")
    if speed is not None and speed > SPEED_MAX_UM_PER_MIN:
        out.append(f"the front speed is {speed / 6e7:.3g} m/s, faster than any excitable medium: check the pixel "
                   "size's unit (nm given as um?) and the frame interval's (ms given as s?)")
    elif speed is not None and 0 < speed < SPEED_MIN_UM_PER_MIN:
        out.append(f"the front speed is {speed:.3g} um/min, slower than cells crawl: check the pixel size's unit "
                   "(um given as nm?) and the frame interval's (min given as s?)")
    return out
