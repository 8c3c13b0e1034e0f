"""Synthetic wave fields: every stated truth checked by independent arithmetic.

The checks below compute periods, wavelengths, speeds, windings, rotation
senses and territories with numpy/scipy directly from the pixel values, never
with helpers of waves.synthetic.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate
from scipy.spatial import cKDTree

import waves.synthetic as synthetic
from waves.errors import CalibrationError, WavesError
from waves.synthetic import (
    PlanarSource,
    SpiralSource,
    TargetSource,
    excitation,
    phase_field,
    planar_wave,
    pulse_exponent,
    rotation_of_charge,
    synthetic_movie,
)


def _wrap(a):
    """Wrap radians into (-pi, pi] (test's own arithmetic)."""
    return np.angle(np.exp(1j * np.asarray(a, dtype=np.float64)))


def _upward_zero_crossings(series, dt):
    """Times where an increasing wrapped phase passes 0 from below, by linear
    interpolation between frames (skips the wrap from +pi to -pi)."""
    s = np.asarray(series, dtype=np.float64)
    a, b = s[:-1], s[1:]
    idx = np.nonzero((a < 0) & (b >= 0) & (b - a < np.pi))[0]
    frac = -a[idx] / (b[idx] - a[idx])
    return (idx + frac) * dt


def _loop_ccw_displayed(r0, c0, half):
    """Pixel indices of a square loop around (r0, c0), traversed
    counterclockwise AS DISPLAYED (row 0 at the top): up the right side (rows
    decreasing), left along the top, down the left side, right along the bottom."""
    pts = []
    for r in range(r0 + half, r0 - half, -1):  # right side, going up on screen
        pts.append((r, c0 + half))
    for c in range(c0 + half, c0 - half, -1):  # top side, going left
        pts.append((r0 - half, c))
    for r in range(r0 - half, r0 + half):  # left side, going down
        pts.append((r, c0 - half))
    for c in range(c0 - half, c0 + half):  # bottom side, going right
        pts.append((r0 + half, c))
    return np.array(pts)


def _winding(frame, loop):
    vals = frame[loop[:, 0], loop[:, 1]].astype(np.float64)
    steps = _wrap(np.diff(np.concatenate([vals, vals[:1]])))
    return steps.sum() / (2 * np.pi)


# ---------------------------------------------------------------------------
# period


def test_target_period_is_spectral_peak_and_crossing_spacing():
    period_min, dt_s = 6.0, 30.0
    nt = 240  # 120 min = exactly 20 periods, so the peak falls on an FFT bin
    phase, truth = phase_field(
        (nt, 33, 33), pixel_size_um=10.0, frame_interval_s=dt_s, speed_um_per_min=300.0,
        sources=[TargetSource(160.0, 160.0, period_min)],
    )
    series = excitation(phase[:, 5, 27]).astype(np.float64)
    spectrum = np.abs(np.fft.rfft(series - series.mean()))
    freqs = np.fft.rfftfreq(nt, d=dt_s / 60.0)  # cycles per minute
    # spectral peak at 1/period: common practice, no source
    assert freqs[np.argmax(spectrum)] == pytest.approx(1.0 / period_min, rel=1e-12)
    crossings = _upward_zero_crossings(phase[:, 5, 27], dt_s / 60.0)
    # phase linear in time: interpolated crossings spaced exactly by the period (from the definition)
    np.testing.assert_allclose(np.diff(crossings), period_min, atol=1e-4)
    assert truth.sources[0].period_min == period_min
    assert truth.period_min == (period_min,)


# ---------------------------------------------------------------------------
# speed and wavelength


def test_target_phase_difference_between_radii_matches_wavelength():
    px, speed, period = 12.0, 350.0, 6.5
    wavelength = speed * period  # definition of wavelength
    phase, truth = phase_field(
        (3, 41, 200), pixel_size_um=px, frame_interval_s=20.0, speed_um_per_min=speed,
        sources=[TargetSource(20 * px, 20 * px, period)],
    )
    assert truth.sources[0].wavelength_um == pytest.approx(wavelength, rel=1e-15)
    row = 20
    for c1, c2 in [(25, 40), (30, 170), (60, 199)]:
        r1, r2 = (c1 - 20) * px, (c2 - 20) * px
        measured = _wrap(phase[1, row, c2].astype(np.float64) - phase[1, row, c1])
        expected = _wrap(-2 * np.pi * (r2 - r1) / wavelength)  # phase = wt - kr (module docstring convention)
        assert abs(_wrap(measured - expected)) < 1e-5
    # along a diagonal too (distance by Pythagoras)
    r1 = math.hypot(10 * px, 10 * px)
    r2 = math.hypot(20 * px, 15 * px)
    measured = _wrap(phase[2, 30, 30].astype(np.float64) - phase[2, 40, 35])
    expected = _wrap(-2 * np.pi * (r1 - r2) / wavelength)
    assert abs(_wrap(measured - expected)) < 1e-5


def test_front_moves_speed_times_frame_interval():
    px, speed, period, dt_s = 10.0, 320.0, 3.0, 30.0  # wavelength 960 um: four fronts in 4 mm
    phase, _ = phase_field(
        (4, 1, 400), pixel_size_um=px, frame_interval_s=dt_s, speed_um_per_min=speed,
        sources=[TargetSource(0.0, 0.0, period)],
    )

    def fronts(profile):
        # outward the phase decreases; a front (phase 0) is a + to - crossing
        p = profile.astype(np.float64)
        a, b = p[:-1], p[1:]
        idx = np.nonzero((a > 0) & (b <= 0) & (a - b < np.pi))[0]
        return (idx + a[idx] / (a[idx] - b[idx])) * px

    shift = speed * dt_s / 60.0  # distance = speed * time
    for i in range(3):
        f0, f1 = fronts(phase[i, 0]), fronts(phase[i + 1, 0])
        assert len(f0) >= 3
        # every front in frame i reappears shift further out in frame i + 1
        for x in f0:
            if x + shift < 399 * px:
                assert np.min(np.abs(f1 - (x + shift))) < 1e-2


def test_planar_wave_direction_and_speed():
    px, speed, period, direction = 8.0, 400.0, 5.0, 30.0
    phase, truth = planar_wave(
        (2, 50, 60), pixel_size_um=px, frame_interval_s=15.0, speed_um_per_min=speed,
        period_min=period, direction_deg=direction,
    )
    k = 2 * np.pi / (speed * period)
    a = math.radians(direction)
    p = phase[0].astype(np.float64)
    # one column right: travel coordinate grows by px cos a; one row UP on screen: by px sin a
    step_right = _wrap(p[:, 1:] - p[:, :-1])
    step_up = _wrap(p[:-1, :] - p[1:, :])
    np.testing.assert_allclose(step_right, -k * px * math.cos(a), atol=1e-5)
    np.testing.assert_allclose(step_up, -k * px * math.sin(a), atol=1e-5)
    # time step: +2 pi dt / T everywhere (phase increases in time)
    dphi = _wrap(phase[1].astype(np.float64) - p)
    np.testing.assert_allclose(dphi, 2 * np.pi * 0.25 / period, atol=1e-5)
    src = truth.sources[0]
    assert src.kind == "planar" and src.direction_deg == direction and src.charge == 0
    assert truth.cores == ()


# ---------------------------------------------------------------------------
# spirals: winding and rotation


@pytest.mark.parametrize("charge", [1, -1])
def test_spiral_winding_counterclockwise_as_displayed_equals_charge(charge):
    px = 10.0
    phase, truth = phase_field(
        (3, 80, 90), pixel_size_um=px, frame_interval_s=30.0, speed_um_per_min=300.0,
        sources=[SpiralSource(45.5 * px, 40.5 * px, 6.0, charge=charge)],
    )
    for half in (1, 3, 10):
        loop = _loop_ccw_displayed(40, 45, half)  # the core (40.5, 45.5) lies inside
        for f in range(3):
            # winding number = sum of wrapped differences / 2 pi (Iyer & Gray 2001, REFERENCES.md)
            assert _winding(phase[f], loop) == pytest.approx(charge, abs=1e-6)
    # a loop not enclosing the core winds zero times
    assert _winding(phase[1], _loop_ccw_displayed(15, 15, 5)) == pytest.approx(0.0, abs=1e-6)
    (core,) = truth.cores
    assert (core.x_um, core.y_um, core.charge) == (45.5 * px, 40.5 * px, charge)
    assert core.rotation == ("clockwise" if charge == 1 else "counterclockwise")


def test_counter_rotating_pair_gives_plus_and_minus_one():
    px = 10.0
    # one above the other, so each core's leftward branch ray stays in its own territory
    phase, truth = phase_field(
        (2, 160, 120), pixel_size_um=px, frame_interval_s=30.0, speed_um_per_min=300.0,
        sources=[
            SpiralSource(60.5 * px, 40.5 * px, 6.0, charge=1),
            SpiralSource(60.5 * px, 120.5 * px, 6.0, charge=-1),
        ],
    )
    for f in range(2):
        assert _winding(phase[f], _loop_ccw_displayed(40, 60, 4)) == pytest.approx(1.0, abs=1e-6)
        assert _winding(phase[f], _loop_ccw_displayed(120, 60, 4)) == pytest.approx(-1.0, abs=1e-6)
        # loop around both: net charge zero
        loop = _loop_ccw_displayed(80, 60, 55)
        assert _winding(phase[f], loop) == pytest.approx(0.0, abs=1e-6)
        # plaquette count over the whole frame finds exactly the two cores
        # (discrete charge of 2x2 blocks, Iyer & Gray 2001 via REFERENCES.md)
        p = phase[f].astype(np.float64)
        q = (
            _wrap(p[1:, 1:] - p[1:, :-1]) + _wrap(p[:-1, 1:] - p[1:, 1:])
            + _wrap(p[:-1, :-1] - p[:-1, 1:]) + _wrap(p[1:, :-1] - p[:-1, :-1])
        ) / (2 * np.pi)
        q = np.rint(q).astype(int)
        assert sorted(map(tuple, np.argwhere(q != 0))) == [(40, 60), (120, 60)]
        assert q[40, 60] == 1 and q[120, 60] == -1
    assert [c.charge for c in truth.cores] == [1, -1]
    assert [c.rotation for c in truth.cores] == ["clockwise", "counterclockwise"]


@pytest.mark.parametrize("charge", [1, -1])
def test_spiral_isoline_turns_clockwise_as_displayed_for_charge_plus_one(charge):
    px, period, dt_s = 10.0, 6.0, 30.0
    r0, c0, radius = 50.0, 50.0, 20.0
    phase, _ = phase_field(
        (2, 101, 101), pixel_size_um=px, frame_interval_s=dt_s, speed_um_per_min=300.0,
        sources=[SpiralSource(c0 * px, r0 * px, period, charge=charge)],
    )
    # sample a circle of radius 20 px at angles counted counterclockwise as displayed
    ang = np.linspace(0, 2 * np.pi, 3600, endpoint=False)
    rows = np.rint(r0 - radius * np.sin(ang)).astype(int)
    cols = np.rint(c0 + radius * np.cos(ang)).astype(int)

    def isoline_angle(f):
        vals = phase[f, rows, cols].astype(np.float64)
        return ang[np.argmin(np.abs(_wrap(vals)))]

    turn = _wrap(isoline_angle(1) - isoline_angle(0))
    # d theta/dt = -omega / q (derived from the phase convention); angular step 2 pi dt/T = 0.52 rad
    expected = -charge * 2 * np.pi * (dt_s / 60.0) / period
    assert turn == pytest.approx(expected, abs=0.08)  # pixel rounding of the sampled circle
    assert (turn < 0) == (charge == 1)  # negative displayed angle = clockwise
    assert rotation_of_charge(charge) == ("clockwise" if charge == 1 else "counterclockwise")


def test_rotation_of_charge_refuses_other_values():
    for bad in (0, 2, True, 0.5):
        with pytest.raises(WavesError, match="charge"):
            rotation_of_charge(bad)


# ---------------------------------------------------------------------------
# several sources: territories


def test_equal_period_targets_give_voronoi_territories():
    px = 10.0
    ny, nx = 90, 110
    pos = np.array([[150.0, 200.0], [800.0, 310.0], [420.0, 750.0], [950.0, 820.0]])  # (x_um, y_um)
    srcs = [TargetSource(x, y, 6.0) for x, y in pos]
    phase, truth = phase_field(
        (3, ny, nx), pixel_size_um=px, frame_interval_s=30.0, speed_um_per_min=300.0, sources=srcs,
    )
    rows, cols = np.mgrid[0:ny, 0:nx]
    pts = np.column_stack([cols.ravel() * px, rows.ravel() * px])
    dist, nearest = cKDTree(pos).query(pts, k=2)  # nearest source: scipy reference
    clear = (dist[:, 1] - dist[:, 0]) > 1e-6  # drop exact ties
    for labels in (truth.labels_first, truth.labels_last, truth.labels_at(1)):
        np.testing.assert_array_equal(labels.ravel()[clear], nearest[clear, 0])
    # the phase in each territory is that source's own target phase (module docstring formula)
    t_min = 1 * 30.0 / 60.0
    r = np.hypot(pts[:, 0] - pos[nearest[:, 0], 0], pts[:, 1] - pos[nearest[:, 0], 1])
    expected = _wrap(2 * np.pi * t_min / 6.0 - 2 * np.pi * r / (300.0 * 6.0))
    got = phase[1].ravel().astype(np.float64)
    assert np.max(np.abs(_wrap(got - expected))) < 1e-5
    # areas: pixel counts times pixel area in mm^2
    # (pixels at exact ties may go either way by float rounding)
    counts = np.bincount(nearest[:, 0], minlength=4)
    n_ties = int(np.count_nonzero(~clear))
    assert np.all(np.abs(truth.territory_area_mm2[0] - counts * (px / 1000) ** 2) <= (n_ties + 1e-9) * (px / 1000) ** 2)
    assert truth.territory_area_mm2.sum(axis=1) == pytest.approx(np.full(3, ny * nx * (px / 1000) ** 2))


def test_faster_source_takes_over_and_phase_is_the_larger_one():
    px, speed = 10.0, 300.0
    srcs = [TargetSource(300.0, 400.0, 7.5), TargetSource(1100.0, 400.0, 6.0)]
    phase, truth = phase_field(
        (120, 80, 140), pixel_size_um=px, frame_interval_s=30.0, speed_um_per_min=speed, sources=srcs,
    )
    area = truth.territory_area_mm2[:, 1]
    assert np.all(np.diff(area) >= 0) and area[-1] > area[0]
    # at the end the faster source wins at pixel (40, 30), which the slower held at first
    assert truth.labels_first[40, 40] == 0 and truth.labels_last[40, 40] == 1
    # check the max-phase rule directly at a few pixels and times (module docstring)
    for f, r, c in [(0, 40, 40), (60, 10, 70), (119, 40, 40), (119, 79, 5)]:
        t = f * 0.5
        u = [
            2 * np.pi * (t - math.hypot(c * px - s.x_um, r * px - s.y_um) / speed) / s.period_min
            for s in srcs
        ]
        assert abs(_wrap(phase[f, r, c] - max(u))) < 1e-5
        assert truth.labels_at(f)[r, c] == int(np.argmax(u))


def test_phase_offset_shifts_phase_and_territory():
    px = 10.0
    srcs = [TargetSource(200.0, 200.0, 6.0), TargetSource(800.0, 200.0, 6.0, phase0=np.pi / 2)]
    phase, truth = phase_field(
        (1, 41, 101), pixel_size_um=px, frame_interval_s=30.0, speed_um_per_min=300.0, sources=srcs,
    )
    # source 1 is a quarter period ahead: on the joining line the boundary is where
    # -k r0 = -k r1 + pi/2, i.e. r1 - r0 = wavelength / 4 with r0 = x - 200, r1 = 800 - x
    wavelength = 300.0 * 6.0
    x_boundary = (200.0 + 800.0 - wavelength / 4) / 2  # 275 um
    row = truth.labels_first[20]
    x = np.arange(101) * px
    assert np.all(row[(x > 200) & (x < x_boundary - 1)] == 0)
    assert np.all(row[(x > x_boundary + 1) & (x < 800)] == 1)
    # at source 1 itself (r1 = 0, t = 0) the phase is its offset
    assert abs(_wrap(phase[0, 20, 80] - np.pi / 2)) < 1e-6


# ---------------------------------------------------------------------------
# period drift


def test_period_drift_phase_is_exact_integral_and_local_period_follows():
    px, speed, dt_s = 10.0, 300.0, 20.0
    nt = 361  # 120 min
    t0, t1 = 8.0, 5.0
    phase, truth = phase_field(
        (nt, 1, 60), pixel_size_um=px, frame_interval_s=dt_s, speed_um_per_min=speed,
        sources=[TargetSource(0.0, 0.0, t0, period_end_min=t1)],
    )
    duration = (nt - 1) * dt_s / 60.0

    def period_of(t):  # the stated law: constant before 0, linear, constant after
        return t0 if t <= 0 else (t1 if t >= duration else t0 + (t1 - t0) * t / duration)

    # at the source pixel, phase(t) = 2 pi int_0^t ds / T(s): scipy quadrature as reference
    for f in (0, 37, 180, 360):
        t = f * dt_s / 60.0
        integral = integrate.quad(lambda s: 1.0 / period_of(s), 0.0, t, epsabs=1e-12)[0] if t else 0.0
        assert abs(_wrap(phase[f, 0, 0] - 2 * np.pi * integral)) < 2e-5
    # away from the source: waves emitted at t - r/c, so local period T(t - r/c)
    col = 50
    delay = col * px / speed
    crossings = _upward_zero_crossings(phase[:, 0, col], dt_s / 60.0)
    intervals = np.diff(crossings)
    mids = 0.5 * (crossings[1:] + crossings[:-1])
    expected = np.array([period_of(m - delay) for m in mids])
    assert len(intervals) >= 15
    np.testing.assert_allclose(intervals, expected, rtol=5e-3)  # midpoint rule, slow drift
    src = truth.sources[0]
    assert (src.period_min, src.period_end_min, src.drift_end_min) == (t0, t1, duration)
    assert src.wavelength_end_um == pytest.approx(speed * t1)
    course = np.array(src.period_timecourse)
    np.testing.assert_allclose(course[:, 1], [period_of(t) for t in course[:, 0]], rtol=1e-12)
    np.testing.assert_allclose(truth.period_at(0, [-5.0, 60.0, 500.0]), [t0, 6.5, t1], rtol=1e-12)


def test_drift_end_before_movie_end_keeps_final_period():
    phase, truth = phase_field(
        (241, 1, 1), pixel_size_um=10.0, frame_interval_s=30.0, speed_um_per_min=300.0,
        sources=[TargetSource(0.0, 0.0, 6.0, period_end_min=4.0, drift_end_min=40.0)],
    )
    crossings = _upward_zero_crossings(phase[:, 0, 0], 0.5)
    late = np.diff(crossings[crossings > 45.0])
    np.testing.assert_allclose(late, 4.0, atol=1e-4)  # constant period after the drift ends
    assert truth.sources[0].drift_end_min == 40.0


# ---------------------------------------------------------------------------
# pulse shape


def test_jittered_target_fires_at_its_generated_times():
    # the phase passes 0 upwards at the source exactly at the firing times the
    # truth lists, and at distance r exactly r / c later (the test's own
    # zero-crossing arithmetic); the intervals have the asked-for spread
    period_min, dt_s, speed = 6.0, 6.0, 300.0
    nt = 1200  # 120 min, 20 periods
    src = TargetSource(160.0, 160.0, period_min, jitter_min=0.6, jitter_seed=3)
    phase, truth = phase_field((nt, 33, 33), pixel_size_um=10.0, frame_interval_s=dt_s,
                               speed_um_per_min=speed, sources=[src])
    fire = truth.firing_times_min(0)
    t_last = (nt - 1) * dt_s / 60.0
    t = np.arange(nt) * dt_s / 60.0
    r_um = math.hypot(27 * 10.0 - 160.0, 5 * 10.0 - 160.0)
    for (row, col), lag in (((16, 16), 0.0), ((5, 27), r_um / speed)):
        # the phase itself: 2 pi n at the n-th firing, linear in between (float32: 1e-5 rad)
        cycles = np.interp(t - lag, fire, np.arange(len(fire)))
        cycles = np.where(t - lag < 0.0, (t - lag) / period_min, cycles)
        np.testing.assert_allclose(_wrap(phase[:, row, col] - 2 * np.pi * cycles), 0.0, atol=1e-4)
        # its upward zero crossings; interpolating across the kink at a firing
        # time errs by at most a frame step times the slope change (achieved
        # 0.016 min with 0.1 min steps)
        crossings = _upward_zero_crossings(phase[:, row, col], dt_s / 60.0)
        expected = fire + lag
        np.testing.assert_allclose(crossings, expected[(expected > 0.0) & (expected < t_last)], atol=0.04)
    gaps = np.diff(fire)
    # 22 deviates of spread 0.6 min: the interval spread is about sqrt(2) * 0.6
    assert 0.5 < np.std(gaps) < 1.3 and abs(np.mean(gaps) - period_min) < 0.3
    # the truth's period time course is the interval holding each frame time
    course = np.array(truth.sources[0].period_timecourse)
    k = np.searchsorted(fire, course[:, 0], side="right") - 1
    np.testing.assert_allclose(course[:, 1], gaps[k])


@pytest.mark.parametrize("orbit", [True, False])
def test_moving_core_sits_on_its_path(orbit):
    # the winding (the test's own loop sum) of a small loop about the path's
    # position is the charge in every frame, and 0 about the start position
    # once the core has moved away
    px, dt_s = 10.0, 30.0
    src = (SpiralSource(300.0, 300.0, 6.0, charge=-1, orbit_radius_um=80.0, orbit_period_min=20.0)
           if orbit else SpiralSource(200.0, 250.0, 6.0, charge=1, velocity_um_per_min=(6.0, 3.0)))
    nt = 40
    phase, truth = phase_field((nt, 61, 61), pixel_size_um=px, frame_interval_s=dt_s,
                               speed_um_per_min=200.0, sources=[src])
    t = np.arange(nt) * dt_s / 60.0
    x, y = truth.core_at(0, t)
    if orbit:  # counterclockwise as displayed: up the screen (y decreasing) after t = 0
        np.testing.assert_allclose(np.hypot(x - 300.0, y - 300.0), 80.0)
        assert y[1] < y[0]
    else:
        np.testing.assert_allclose(x, 200.0 + 6.0 * t)
        np.testing.assert_allclose(y, 250.0 + 3.0 * t)
    for f in range(nt):
        r0, c0 = int(round(y[f] / px)), int(round(x[f] / px))
        assert round(_winding(phase[f], _loop_ccw_displayed(r0, c0, 2))) == src.charge
    moved = np.hypot(x - x[0], y - y[0]) > 60.0
    assert moved.any()
    r0, c0 = int(round(y[0] / px)), int(round(x[0] / px))
    for f in np.flatnonzero(moved):
        assert round(_winding(phase[f], _loop_ccw_displayed(r0, c0, 2))) == 0


@pytest.mark.parametrize("width", [0.08, 0.2, 0.5, 0.7, 0.9])
def test_pulse_width_is_fraction_of_time_excited(width):
    period_min, dt_s = 5.0, 3.0
    nt = 2000  # 20 periods, 100 samples per period
    phase, _ = phase_field(
        (nt, 1, 1), pixel_size_um=10.0, frame_interval_s=dt_s, speed_um_per_min=300.0,
        sources=[TargetSource(0.0, 0.0, period_min, phase0=0.0123)],
    )
    e = excitation(phase, pulse_width=width)
    assert e.dtype == np.float32 and e.min() >= 0.0 and e.max() <= 1.0
    # fraction of time above half maximum: 100 samples per period -> resolution 1 %
    assert np.mean(e > 0.5) == pytest.approx(width, abs=0.011)
    # dense phase grid: fraction of phases with e > 0.5 equals the width
    grid = np.linspace(-np.pi, np.pi, 200001, endpoint=False)
    assert np.mean(excitation(grid, pulse_width=width) > 0.5) == pytest.approx(width, abs=2e-5)


def test_pulse_half_width_is_sinusoid_and_peak_at_phase_zero():
    ph = np.linspace(-np.pi, np.pi, 1001)
    np.testing.assert_allclose(excitation(ph), 0.5 + 0.5 * np.cos(ph), atol=1e-6)
    assert pulse_exponent(0.5) == 1.0
    for width in (0.1, 0.3, 0.8):
        e = excitation(np.array([0.0, np.pi, np.pi * width]), pulse_width=width)
        np.testing.assert_allclose(e, [1.0, 0.0, 0.5], atol=1e-5)


def test_pulse_width_out_of_range_is_refused():
    for bad in (0.0, 1.0, -0.2, 1.5, float("nan")):
        with pytest.raises(WavesError, match="pulse_width"):
            excitation(np.zeros(3), pulse_width=bad)
    with pytest.raises(WavesError, match="floating"):
        excitation(np.zeros(3, dtype=int))


# ---------------------------------------------------------------------------
# blocks, movie, truth, validation


def test_frame_blocks_equal_whole_movie(monkeypatch):
    args = dict(
        pixel_size_um=15.0, frame_interval_s=25.0, speed_um_per_min=330.0,
        sources=[SpiralSource(300.0, 400.0, 6.0, charge=-1), TargetSource(900.0, 200.0, 7.0, period_end_min=6.0)],
    )
    whole, truth_whole = phase_field((23, 40, 70), **args)
    monkeypatch.setattr(synthetic, "_BLOCK_ELEMENTS", 40 * 70 * 3)  # 3 frames per block
    blocked, truth_blocked = phase_field((23, 40, 70), **args)
    np.testing.assert_array_equal(whole, blocked)
    np.testing.assert_array_equal(truth_whole.territory_area_mm2, truth_blocked.territory_area_mm2)
    np.testing.assert_array_equal(truth_whole.labels_last, truth_blocked.labels_last)


def test_compiled_competition_kernel_equals_numpy_twin():
    rng = np.random.default_rng(42)
    srcs = [
        SpiralSource(*rng.uniform(0, 900, 2), rng.uniform(4, 8), charge=1, phase0=rng.uniform(-3, 3)),
        SpiralSource(*rng.uniform(0, 900, 2), rng.uniform(4, 8), charge=-1, period_end_min=5.0),
        TargetSource(*rng.uniform(0, 900, 2), rng.uniform(4, 8), period_end_min=9.0, drift_end_min=3.0),
        TargetSource(*rng.uniform(0, 900, 2), 6.0, phase0=1.0),
        PlanarSource(rng.uniform(0, 360), rng.uniform(4, 8), phase0=-2.0),
    ]
    ev = synthetic._Evaluator(
        tuple(srcs), (30, 45, 61), pixel_size_um=15.0, frame_interval_s=20.0, speed_um_per_min=310.0
    )
    for start, stop in [(0, 1), (3, 17), (17, 30)]:
        ph_k, lab_k = ev.block(start, stop)
        ph_n, lab_n = ev.block_numpy(start, stop)
        # same float64 arithmetic; libm and numpy log1p may differ in the last bit
        assert np.max(np.abs(_wrap(ph_k.astype(np.float64) - ph_n))) < 1e-6
        assert np.mean(lab_k != lab_n) < 1e-3
        assert ph_k.dtype == np.float32 and lab_k.dtype == np.int16


def test_phase_range_and_dtype():
    phase, _ = phase_field(
        (40, 30, 30), pixel_size_um=10.0, frame_interval_s=30.0, speed_um_per_min=300.0,
        sources=[SpiralSource(150.0, 150.0, 6.0)],
    )
    assert phase.dtype == np.float32
    assert phase.min() > -np.float32(np.pi) and phase.max() <= np.float32(np.pi)


def test_synthetic_movie_renders_the_field_with_truth():
    from waves.render import DarkfieldRenderer, DarkfieldStyle

    style = DarkfieldStyle(polarity="dark", dtype="uint16")
    srcs = [SpiralSource(300.0, 300.0, 6.0), TargetSource(1000.0, 500.0, 7.0)]
    movie = synthetic_movie(
        (12, 50, 80), pixel_size_um=15.0, frame_interval_s=30.0, speed_um_per_min=320.0,
        sources=srcs, pulse_width=0.3, style=style, seed=7, keep_excitation=True,
    )
    assert movie.data.dtype == np.uint16 and movie.data.shape == (12, 50, 80)
    assert movie.calibration.origin == "simulation"
    assert movie.calibration.pixel_size_um == 15.0 and movie.calibration.frame_interval_s == 30.0
    phase, truth = phase_field(
        (12, 50, 80), pixel_size_um=15.0, frame_interval_s=30.0, speed_um_per_min=320.0, sources=srcs,
    )
    exc = excitation(phase, pulse_width=0.3)
    np.testing.assert_array_equal(movie.excitation, exc)
    np.testing.assert_array_equal(movie.data, DarkfieldRenderer((50, 80), style=style, seed=7).movie(exc))
    # dark polarity: camera level anticorrelated with excitation
    assert np.corrcoef(movie.data.ravel().astype(float), exc.ravel())[0, 1] < -0.5
    assert movie.truth.cores[0].rotation == "clockwise"
    assert [s.kind for s in movie.truth.sources] == ["spiral", "target"]
    assert [s.charge for s in movie.truth.sources] == [1, 0]
    assert movie.truth.sources[1].rotation is None
    np.testing.assert_array_equal(movie.truth.labels_last, truth.labels_last)
    d = movie.truth.to_dict()
    assert d["sources"][0]["wavelength_um"] == pytest.approx(320.0 * 6.0)
    assert d["spiral_cores"] == [
        {"x_um": 300.0, "y_um": 300.0, "charge": 1, "rotation": "clockwise", "source_index": 0}
    ]
    plain = synthetic_movie(
        (2, 10, 10), pixel_size_um=15.0, frame_interval_s=30.0, speed_um_per_min=320.0, sources=srcs,
    )
    assert plain.excitation is None and plain.data.dtype == np.uint8


def test_bad_inputs_raise_waves_errors_with_hints():
    ok = dict(pixel_size_um=10.0, frame_interval_s=30.0, speed_um_per_min=300.0, sources=[TargetSource(0, 0, 6)])
    with pytest.raises(WavesError, match="shape_tyx"):
        phase_field((10, 20), **ok)
    with pytest.raises(WavesError, match="shape_tyx"):
        phase_field((0, 20, 20), **ok)
    with pytest.raises(CalibrationError, match="pixel size"):
        phase_field((2, 5, 5), **{**ok, "pixel_size_um": -1.0})
    with pytest.raises(WavesError, match="speed_um_per_min"):
        phase_field((2, 5, 5), **{**ok, "speed_um_per_min": 0.0})
    with pytest.raises(WavesError, match="empty"):
        phase_field((2, 5, 5), **{**ok, "sources": []})
    with pytest.raises(WavesError, match="sources\\[0\\]"):
        phase_field((2, 5, 5), **{**ok, "sources": [(1, 2, 3)]})
    with pytest.raises(WavesError, match="period_min"):
        TargetSource(0.0, 0.0, -6.0)
    with pytest.raises(WavesError, match="charge"):
        SpiralSource(0.0, 0.0, 6.0, charge=0)
    with pytest.raises(WavesError, match="finite"):
        PlanarSource(float("inf"), 6.0)
    with pytest.raises(WavesError, match="drift_end_min"):
        phase_field((1, 5, 5), **{**ok, "sources": [TargetSource(0, 0, 6, period_end_min=5)]})
    with pytest.raises(WavesError, match="jitter_min"):
        TargetSource(0.0, 0.0, 6.0, jitter_min=-1.0)
    with pytest.raises(WavesError, match="period_end_min"):
        TargetSource(0.0, 0.0, 6.0, jitter_min=0.5, period_end_min=5.0)
    with pytest.raises(WavesError, match="orbit_period_min"):
        SpiralSource(0.0, 0.0, 6.0, orbit_radius_um=50.0)
    with pytest.raises(WavesError, match="velocity_um_per_min"):
        SpiralSource(0.0, 0.0, 6.0, velocity_um_per_min=3.0)


# ---------------------------------------------------------------------------
# the shipped sample


def _load_sample_script():
    import importlib.util
    import pathlib

    path = pathlib.Path(__file__).resolve().parents[1] / "samples" / "make_synthetic_sample.py"
    spec = importlib.util.spec_from_file_location("make_synthetic_sample", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module, path.parent


def test_sample_tiff_is_regenerated_bit_for_bit_and_its_truth_is_clean():
    import json

    from waves import io

    script, folder = _load_sample_script()
    tif = folder / "synthetic_spiral_target.tif"
    movie, truth = script.build()
    stack = io.read_stack(tif)
    np.testing.assert_array_equal(stack.data, movie.data)
    assert stack.calibration.pixel_size_um == script.PIXEL_SIZE_UM
    assert stack.calibration.frame_interval_s == script.FRAME_INTERVAL_S
    assert tif.stat().st_size < 5e6
    stored = io.read_metadata(tif)
    assert stored["spiral_cores"] == truth["spiral_cores"]
    assert stored["sources"][1]["period_min"] == 6.3
    side = json.loads((folder / "synthetic_spiral_target.truth.json").read_text())
    decoded = np.array([[int(ch) for ch in row] for row in side["territory_labels_last"]])
    np.testing.assert_array_equal(decoded, movie.truth.labels_last)
    # the clean phase has exactly one singularity, the stated core, in every frame
    # (plaquette charge, Iyer & Gray 2001 via REFERENCES.md): no boundary defects
    phase, _ = phase_field(
        script.SHAPE_TYX, pixel_size_um=script.PIXEL_SIZE_UM, frame_interval_s=script.FRAME_INTERVAL_S,
        speed_um_per_min=script.SPEED_UM_PER_MIN, sources=script.SOURCES,
    )
    p = phase.astype(np.float64)
    q = (
        _wrap(p[:, 1:, 1:] - p[:, 1:, :-1]) + _wrap(p[:, :-1, 1:] - p[:, 1:, 1:])
        + _wrap(p[:, :-1, :-1] - p[:, :-1, 1:]) + _wrap(p[:, 1:, :-1] - p[:, :-1, :-1])
    ) / (2 * np.pi)
    q = np.rint(q).astype(int)
    core = truth["spiral_cores"][0]
    # plaquette (r, c) spans rows r..r+1, cols c..c+1: the one holding the core position
    r, c = int(core["y_um"] // script.PIXEL_SIZE_UM), int(core["x_um"] // script.PIXEL_SIZE_UM)
    assert np.count_nonzero(q) == script.SHAPE_TYX[0]
    assert np.all(q[:, r, c] == 1)
