"""Truths of waves.synthetic fields on an analysis grid, shared by the
analysis tests: exact local front speeds and exact windowed periods, computed
from the closed-form field definitions (never from the analyser)."""

import numpy as np


def grid_xy(a):
    """Recorded-image positions (um) of the analysis-grid pixels."""
    g = a.summary["analysis"]["grid"]
    ny, nx = a.maps["front_speed_um_per_min"].shape
    rr, cc = np.mgrid[0:ny, 0:nx]
    return cc * g["pixel_size_um"] + g["origin_x_um"], rr * g["pixel_size_um"] + g["origin_y_um"]


def spiral_front_speed(a, x0, y0, speed, wavelength):
    """Exact local front speed of the synthetic spiral on the analysis grid.

    phase = omega t - k r + q theta has |grad phase|^2 = k^2 + 1 / r^2, so the
    fronts (lines of constant phase) move along their normal at
    omega / |grad phase| = speed / sqrt(1 + 1 / (k r)^2): slower than the
    radial speed near the core (waves.synthetic's closed form, derived here)."""
    x, y = grid_xy(a)
    kr = 2 * np.pi / wavelength * np.hypot(x - x0, y - y0)
    with np.errstate(divide="ignore"):
        return speed / np.sqrt(1 + 1 / kr**2)


def median_truth(a, truth_map):
    """Median of a truth map over the pixels where a speed is reported."""
    return float(np.median(truth_map[np.isfinite(a.maps["front_speed_um_per_min"])]))


def emitted_phase(truth, index, t_lo, t_hi, step=1e-3):
    """(t, Phi): the phase 2 pi int dt / T(t) a source emits, by the trapezoid
    rule on a fine grid from the source's period law (not its closed form)."""
    t = np.arange(t_lo, t_hi + step, step)
    f = 1.0 / truth.period_at(index, t)
    return t, 2 * np.pi * np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * step)])


def whole_cycle_period(t, phi, delay_min, ta, tb):
    """Exact mean period of the whole cycles between times ta and tb at pixels
    whose phase is Phi(t - delay): from the first crossing of the next 2 pi
    level to the last crossing of the highest one (the definition of the
    windowed period, waves.measure.period), NaN below two cycles."""
    p0 = np.interp(ta - delay_min, t, phi)
    n = np.floor((np.interp(tb - delay_min, t, phi) - p0) / (2 * np.pi))
    t1 = np.interp(p0 + 2 * np.pi, phi, t)
    t2 = np.interp(p0 + 2 * np.pi * n, phi, t)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n >= 2, (t2 - t1) / (n - 1), np.nan)


def window_truth(a, movie, x0, y0, pixels):
    """Per time window of analysis `a` of a synthetic `movie`: the exact
    whole-cycle period at each of `pixels` (a (y, x) bool map of the analysis
    grid), for the movie's first source, at (x0, y0) um."""
    an = a.summary["analysis"]
    dt = movie.calibration.frame_interval_min
    trim = an["trimmed_frames_each_end"]
    win = int(round(an["window_min"] / dt))
    x, y = grid_xy(a)
    delay = np.hypot(x - x0, y - y0)[pixels] / movie.truth.speed_um_per_min
    t, phi = emitted_phase(movie.truth, 0, -delay.max() - 1.0, movie.data.shape[0] * dt + 1.0)
    out = []
    for tc in an["window_centres_min"]:
        w0 = int(round(tc / dt - trim - win / 2))
        ta, tb = (trim + w0) * dt, (trim + w0 + win - 1) * dt
        out.append(whole_cycle_period(t, phi, delay, ta, tb))
    return out
