"""Cleaning steps applied to a (t, y, x) stack before phase mapping.

Every step is a function on arrays: standard numpy arrays (or memory maps) in,
float32 arrays out, options keyword-only.  The science core knows no file
formats; calibration enters only where a step needs it (`frame_interval_s`,
periods in minutes).  Nothing assumes the polarity of the bands: every step is
linear in the signal or works on magnitudes, so bright and dark bands are
treated alike.

How each step may be cut up by the analysis pipeline, which works on spatial
tiles (row blocks with halos) of a memory-mapped stack:

==========================  ==========================================================
step                        can be applied to
==========================  ==========================================================
`bin_frames`                any frame block; a row tile whose first row is a multiple
                            of the factor
`estimate_drift`            whole frames (binned if large), read one frame at a time
`apply_drift`               any frame block with its rows of `shifts`; a row tile with
                            `drift_halo_px(shifts)` rows of halo, then cropped
`estimate_brightness`       whole frames (a pixel sample of each), all frames (trend)
`remove_brightness`         any frame block with its rows of the per-frame gain/offset
`interpolate_frames`        whole frames, read one at a time
`illumination_gain`         the temporal mean image (whole field)
`apply_gain`                any block or tile with the matching part of the gain
`detrend_time`              any spatial tile holding all frames (pixels independent)
`bandpass_time`             any spatial tile holding all frames (pixels independent)
`smooth_space`              any frame block; a row tile with `halo_px(sigma_px)` rows
                            of halo, then cropped (exactly equal to the whole frame)
`difference_movie`          a frame block with `lag` extra frames at its end
`signal_mask`, `dish_mask`  whole-field maps (small: one value per pixel)
`smooth_in_field`           like `smooth_space` (normalised convolution in a mask)
`find_cell_field`           whole-field maps from `FieldStats` (streamed per block)
==========================  ==========================================================

Units: spatial options in pixels of the array passed (`sigma_px`), times in
seconds (`frame_interval_s`) and periods in minutes (`period_min_range`).
Shifts are (dy, dx) in pixels, rows first, as everywhere in (t, y, x).
"""

from waves.preprocess._checks import DEFAULT_PERIOD_MIN_RANGE
from waves.preprocess.binning import bin_frames
from waves.preprocess.binning import (
    bin_frames_numpy as bin_frames_numpy,  # the numpy twin, for tests
)
from waves.preprocess.brightness import estimate_brightness, interpolate_frames, remove_brightness
from waves.preprocess.cellfield import (
    BadPixels,
    CellField,
    FieldStats,
    bin_weighted,
    file_cell_field,
    fill_small_holes,
    find_cell_field,
    find_specks,
    margin_px,
    measurable,
    scan_bad_pixels,
    small_hole_px,
    smooth_in_field,
    user_cell_mask,
)
from waves.preprocess.drift import apply_drift, drift_halo_px, estimate_drift
from waves.preprocess.illumination import (
    apply_gain,
    flatten_illumination,
    illumination_gain,
    relative_amplitude,
)
from waves.preprocess.masks import difference_movie, dish_mask, signal_mask
from waves.preprocess.spatial import (
    halo_px,
    sigma_for_wavelength,
    smooth_space,
    smoothing_variance_px2,
)
from waves.preprocess.temporal import (
    bandpass_padlen,
    bandpass_settle_frames,
    bandpass_time,
    butterworth_sos,
    detrend_time,
    sosfiltfilt_numba,
)

__all__ = [
    "DEFAULT_PERIOD_MIN_RANGE",
    "bin_frames",
    "estimate_drift",
    "apply_drift",
    "drift_halo_px",
    "estimate_brightness",
    "remove_brightness",
    "interpolate_frames",
    "illumination_gain",
    "apply_gain",
    "relative_amplitude",
    "flatten_illumination",
    "detrend_time",
    "butterworth_sos",
    "bandpass_padlen",
    "bandpass_settle_frames",
    "bandpass_time",
    "sosfiltfilt_numba",
    "smooth_space",
    "halo_px",
    "sigma_for_wavelength",
    "smoothing_variance_px2",
    "signal_mask",
    "dish_mask",
    "difference_movie",
    # the cell field (preprocess.cellfield)
    "BadPixels",
    "CellField",
    "FieldStats",
    "bin_weighted",
    "file_cell_field",
    "fill_small_holes",
    "find_cell_field",
    "find_specks",
    "margin_px",
    "measurable",
    "scan_bad_pixels",
    "small_hole_px",
    "smooth_in_field",
    "user_cell_mask",
]
