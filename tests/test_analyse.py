"""`waves analyse` against synthetic fields of known truth (waves.synthetic).

Tolerances follow the issue: period 3 %, speed and wavelength 5 %, core
position a tenth of a wavelength.  The truth comes from the closed-form
fields, not from the analyser.
"""

import numpy as np
import pytest
import scipy.ndimage

from waves import synthetic as S
from waves.analyse import AnalysisOptions, analyse_movie
from waves.errors import InputError
from waves.render import DarkfieldStyle
from waves.units import Calibration

PX_UM = 10.0
DT_S = 20.0
SPEED = 100.0  # um/min
PERIOD = 6.0  # min
WAVELENGTH = SPEED * PERIOD  # 600 um = 60 px


def _movie(sources, *, shape=(200, 200, 200), pulse_width=0.5, style=None, seed=1, speed=SPEED):
    return S.synthetic_movie(
        shape,
        pixel_size_um=PX_UM,
        frame_interval_s=DT_S,
        speed_um_per_min=speed,
        sources=sources,
        pulse_width=pulse_width,
        style=DarkfieldStyle() if style is None else style,
        seed=seed,
    )


def _analyse(movie, **opts):
    return analyse_movie(movie.data, calibration=movie.calibration, options=AnalysisOptions(**opts))


NOISY = DarkfieldStyle(noise=0.03, illumination=0.3, texture=0.2, drift=0.1, drift_period_frames=150)


@pytest.mark.parametrize("pulse_width", [0.5, 0.15])
@pytest.mark.parametrize("charge", [1, -1])
def test_single_spiral_period_speed_wavelength_core(pulse_width, charge):
    m = _movie([S.SpiralSource(1000.0, 1000.0, PERIOD, charge=charge)], pulse_width=pulse_width, style=NOISY)
    s = _analyse(m).summary
    assert s["period_min"]["median"] == pytest.approx(PERIOD, rel=0.03)
    assert s["front_speed_um_per_min"]["median"] == pytest.approx(SPEED, rel=0.05)
    assert s["wavelength_um"]["median"] == pytest.approx(WAVELENGTH, rel=0.05)
    cores = s["spiral_cores"]
    assert len(cores) == 1
    c = cores[0]
    assert np.hypot(c["x_um"] - 1000.0, c["y_um"] - 1000.0) < WAVELENGTH / 10
    assert c["charge"] == charge
    # phase increases in time, so charge +1 turns clockwise as displayed (derived in waves.synthetic)
    assert c["rotation"] == ("clockwise" if charge == 1 else "counterclockwise")


@pytest.mark.parametrize("polarity", ["bright", "dark"])
def test_target_pacemaker_both_polarities(polarity):
    style = DarkfieldStyle(polarity=polarity, noise=0.02)
    m = _movie([S.TargetSource(900.0, 1100.0, PERIOD)], style=style)
    s = _analyse(m).summary
    assert s["period_min"]["median"] == pytest.approx(PERIOD, rel=0.03)
    assert s["front_speed_um_per_min"]["median"] == pytest.approx(SPEED, rel=0.05)
    assert s["wavelength_um"]["median"] == pytest.approx(WAVELENGTH, rel=0.05)
    assert s["spiral_cores"] == []


def test_counter_rotating_pair_gives_opposite_charges():
    # pair placed one above the other so each spiral's branch ray reaches the
    # field edge inside its own territory (see waves.synthetic's caveat)
    m = _movie([S.SpiralSource(1000.0, 650.0, PERIOD, charge=1), S.SpiralSource(1000.0, 1350.0, PERIOD, charge=-1)])
    cores = _analyse(m).summary["spiral_cores"]
    assert sorted(c["charge"] for c in cores) == [-1, 1]
    for c in cores:
        y_true = 650.0 if c["charge"] == 1 else 1350.0
        assert np.hypot(c["x_um"] - 1000.0, c["y_um"] - y_true) < WAVELENGTH / 10


def test_planar_wave_exact_speed_and_direction():
    # exact plane wave travelling at 30 degrees counterclockwise as displayed
    phase, truth = S.planar_wave(
        (150, 96, 96), pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=SPEED,
        period_min=PERIOD, direction_deg=30.0,
    )
    data = (100 + 50 * np.cos(phase)).astype(np.float32)
    cal = Calibration(PX_UM, DT_S, "simulation", "simulation")
    a = analyse_movie(data, calibration=cal, options=AnalysisOptions(smooth_sigma_um=0, flatten=False))
    assert a.summary["front_speed_um_per_min"]["median"] == pytest.approx(SPEED, rel=0.005)
    d = a.maps["direction_deg"]
    assert np.nanmedian(np.abs(((d - 30.0) + 180) % 360 - 180)) < 0.5


def test_period_drift_followed_by_timecourse():
    # period falls linearly from 8 to 5 min over the movie (closed-form phase)
    src = S.TargetSource(1000.0, 1000.0, 8.0, period_end_min=5.0)
    m = _movie([src], shape=(480, 120, 120), style=DarkfieldStyle(noise=0.01))
    s = _analyse(m, period_band_min=(3.0, 15.0)).summary
    course = s["period_timecourse"]
    assert len(course) >= 5
    duration = 480 * DT_S / 60.0
    for row in course:
        # the source's period at the window centre, delayed by travel from the
        # source to a typical pixel (about 0.4 mm at 100 um/min: 4 min)
        t_src = max(0.0, row["t_min"] - 4.0)
        truth = 8.0 + (5.0 - 8.0) * min(t_src, duration) / duration
        assert row["period_min"] == pytest.approx(truth, rel=0.05)


def test_tiled_equals_whole():
    m = _movie([S.SpiralSource(800.0, 900.0, PERIOD)], shape=(120, 100, 100), style=DarkfieldStyle(noise=0.02))
    big = _analyse(m, memory_budget_mb=2000)
    small = _analyse(m, memory_budget_mb=1)  # forces many small tiles
    for key in ("period_min", "front_speed_um_per_min", "amplitude", "front_speed_activation_fit_um_per_min"):
        np.testing.assert_allclose(small.maps[key], big.maps[key], rtol=1e-5, atol=1e-5, equal_nan=True)
    assert small.summary["spiral_cores"] == big.summary["spiral_cores"]


def test_drift_registration_recovers_core_position():
    # stage drift of up to 6 px, applied with scipy.ndimage.shift (reference library)
    m = _movie([S.SpiralSource(1000.0, 1000.0, PERIOD)], style=DarkfieldStyle(texture=0.3, noise=0.02))
    t = np.arange(m.data.shape[0])
    shifts = np.stack([3 * np.sin(2 * np.pi * t / 200), 6 * t / t[-1]], axis=1)
    drifted = np.stack(
        [scipy.ndimage.shift(f.astype(np.float32), s, order=1, mode="nearest") for f, s in zip(m.data, shifts, strict=True)]
    )
    cores = analyse_movie(drifted, calibration=m.calibration, options=AnalysisOptions(register=True)).summary[
        "spiral_cores"
    ]
    assert len(cores) == 1
    # positions are in the frame of the registration reference (the temporal
    # median), which sits near the mean shift
    mean_shift_um = shifts.mean(axis=0) * PX_UM
    assert np.hypot(cores[0]["x_um"] - 1000.0 - mean_shift_um[1], cores[0]["y_um"] - 1000.0 - mean_shift_um[0]) < (
        WAVELENGTH / 10
    )


def test_noise_only_movie_warns_and_reports_nothing():
    rng = np.random.default_rng(5)
    data = rng.normal(100, 5, size=(150, 64, 64)).astype(np.float32)
    cal = Calibration(PX_UM, DT_S, "simulation", "simulation")
    s = analyse_movie(data, calibration=cal).summary
    assert s["period_min"] is None and s["front_speed_um_per_min"] is None
    assert s["spiral_cores"] == []
    assert any("no waves" in w for w in s["warnings"])


def test_flat_movie_is_refused():
    data = np.full((100, 32, 32), 7, dtype=np.uint8)
    cal = Calibration(PX_UM, DT_S, "simulation", "simulation")
    with pytest.raises(InputError, match="flat"):
        analyse_movie(data, calibration=cal)


def test_too_few_frames_is_refused():
    m = _movie([S.TargetSource(500.0, 500.0, PERIOD)], shape=(40, 64, 64))
    with pytest.raises(InputError, match="too few frames"):
        _analyse(m)


def test_delay_embedding_phase_agrees_with_hilbert():
    # Gray, Pertsov & Jalife 1998 [memory]: delay embedding with a quarter-period
    # lag gives the same period and phase singularity as the analytic signal
    m = _movie([S.SpiralSource(1000.0, 1000.0, PERIOD, charge=1)], style=NOISY)
    s = _analyse(m, phase_method="delay").summary
    assert s["period_min"]["median"] == pytest.approx(PERIOD, rel=0.03)
    assert s["front_speed_um_per_min"]["median"] == pytest.approx(SPEED, rel=0.05)
    (core,) = s["spiral_cores"]
    assert core["charge"] == 1 and np.hypot(core["x_um"] - 1000.0, core["y_um"] - 1000.0) < WAVELENGTH / 10
