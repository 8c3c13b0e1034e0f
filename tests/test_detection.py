"""Honest detection (issue 13): the red-noise test, no waves where there are none,
and waves found when they are faint.

Truths: AR(1) series made by scipy.signal.lfilter (their periodogram bins over
the expected spectrum are chi^2_2 / 2 distributed: Torrence & Compo 1998, Bull.
Am. Meteor. Soc. 79:61-78, eq. 17), sines of known period, and synthetic
recordings (waves.synthetic_recording) with and without waves.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.signal
from recording_classes import CAMERA, DT, PX

from waves.analyse import analyse_movie
from waves.measure.significance import ar1_expected_power, band_threshold, peak_test
from waves.render import Degradations
from waves.synthetic import SpiralSource, TargetSource, synthetic_recording

BAND = (1 / 60, 1 / 6)  # cycles per frame: 2-20 min at 20 s per frame


def _ar1(alpha: float, n: int, m: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((n + 400, m))
    return scipy.signal.lfilter([1.0], [1.0, -alpha], e, axis=0)[400:]


@pytest.mark.parametrize("alpha", [0.0, 0.7, 0.95, 0.995])
@pytest.mark.parametrize("n", [160, 600])
def test_red_noise_passes_no_more_often_than_the_level(alpha, n):
    # Torrence & Compo 1998: AR(1) noise exceeds the 95 % level of the band's maximum in at
    # most 5 % of series; 3000 series give a binomial sd of 0.4 %, so 5 % + 3 sd bounds it
    x = _ar1(alpha, n, 3000, seed=int(1000 * alpha) + n)
    res = peak_test(x, BAND)
    assert res.significant.mean() <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / 3000)
    # the fitted coefficient: within the known small-sample bias of a lag-1 estimate,
    # about (1 + 4 alpha) / n (Kendall 1954, from memory), plus the series' own spread; for
    # white noise sqrt(alpha_2) of a lag-2 correlation scattered about 0 (sd 1 / sqrt(n)) lifts
    # the estimate by up to about half of n^-1/4 / 2: redder, the conservative side
    if alpha == 0.0:
        assert 0.0 <= np.median(res.alpha) <= 0.5 * n**-0.25
    else:
        assert abs(np.median(res.alpha) - alpha) <= (1 + 4 * alpha) / n + 0.02 + (0.03 if alpha > 0.99 else 0.0)


def test_windowed_red_noise_expectation_matches_simulation():
    # the exact Hann-windowed expectation against the mean periodogram of 4000 simulated
    # AR(1) series (scipy.signal.lfilter): the mean of 4000 Exp(1) bins has a relative sd of
    # 1.6 %, so 6 % holds every in-band bin
    n, alpha = 200, 0.9
    x = _ar1(alpha, n, 4000, seed=5)
    x = x - x.mean(axis=0)
    w = np.hanning(n)
    spec = np.abs(np.fft.rfft(x * w[:, None], axis=0)) ** 2
    expected = ar1_expected_power(np.array(alpha), np.array(1.0 / (1 - alpha**2)), w)
    f = np.fft.rfftfreq(n)
    band = (f >= BAND[0]) & (f <= BAND[1])
    rel = spec.mean(axis=1)[band] / expected[band] - 1.0
    assert np.abs(rel).max() < 0.06
    # far from the low bins the taper's leakage is negligible: Torrence & Compo eq. 16 times
    # the taper's energy (sum w^2)
    p16 = (1 - alpha**2) / (1 + alpha**2 - 2 * alpha * np.cos(2 * np.pi * f)) / (1 - alpha**2)
    mid = (f > 0.1) & (f < 0.4)
    np.testing.assert_allclose(expected[mid], p16[mid] * np.sum(w**2), rtol=0.01)


def test_band_threshold_is_the_sidak_level():
    # the largest of K Exp(1) variables exceeds c with probability 1 - (1 - e^-c)^K
    for k in (1, 24, 90):
        c = band_threshold(k, 0.95)
        assert (1 - np.exp(-c)) ** k == pytest.approx(0.95, rel=1e-9)


def test_a_sine_in_noise_is_found_at_its_period():
    # amplitude 0.5 of a unit-sd white noise over 600 frames: the peak bin holds about
    # (a N / 4)^2 / (3 N / 8) = 37 times the noise's expectation (Hann), far over 7.5
    n = 600
    rng = np.random.default_rng(2)
    t = np.arange(n)
    x = 0.5 * np.sin(2 * np.pi * t / 18.0)[:, None] + rng.standard_normal((n, 2000))
    res = peak_test(x, BAND)
    assert res.significant.mean() >= 0.95
    assert np.median(1.0 / res.frequency[res.significant]) == pytest.approx(18.0, rel=0.03)


# ------------------------------------------------------------------ recordings without waves

SHAPE = (160, 64, 72)  # 53 min of 0.96 x 1.08 mm
NO_WAVE_KINDS = {
    "static texture and noise": dict(),
    "drifting texture": dict(drift_px=3.0, drift_jump_px=1.5),
    "flicker and lamp warm-up": dict(lamp_fade=0.4, lamp_fade_law="exponential", flicker_count=4, flicker_gain=0.1),
    "red noise": dict(texture_wander=0.05, wander_time_min=8.0),
    "moving texture": dict(stream_speed_um_per_min=10.0, mound_count=1),
}


def _no_wave_movie(kind: str, seed: int):
    # texture_modulation 0: the sources shape nothing the camera sees
    deg = Degradations(**(CAMERA | NO_WAVE_KINDS[kind] | dict(texture_modulation=0.0)))
    return synthetic_recording(SHAPE, pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=150.0,
                               sources=[TargetSource(0.5 * SHAPE[2] * PX, 0.5 * SHAPE[1] * PX, 6.0)],
                               degradations=deg, seed=seed)


@pytest.mark.slow
@pytest.mark.parametrize("kind", list(NO_WAVE_KINDS))
def test_no_waves_reported_where_there_are_none(kind):
    # issue 13: no period, no cores, no centres in at least 19 of 20 seeded movies of each kind
    hits, fractions = [], []
    for seed in range(20):
        rec = _no_wave_movie(kind, seed)
        s = analyse_movie(rec.data, calibration=rec.calibration, times_s=rec.times_s).summary
        claimed = bool(s.get("period_min")) or bool(s.get("spiral_cores")) or bool(s.get("centres"))
        hits.append(claimed)
        fractions.append(s["detection"]["significant_fraction"])
        if not claimed:
            assert s["detection"]["waves_detected"] is False
            assert s["front_speed_um_per_min"] is None and s["wavelength_um"] is None
    assert sum(hits) <= 1, (kind, hits, fractions)


# ------------------------------------------------------------------ faint waves


def test_faint_waves_are_detected_with_the_right_period():
    # issue 13's power test: the bands' contrast about one noise sigma per pixel per frame.
    # Noise at the 0.45 background: shot sqrt(0.45 * 4000) e / 4000 e * 255 = 2.7 counts and
    # read 1.5 counts, 3.1 in all; contrast 0.45 * m * 255 counts, so m = 0.027 is one sigma
    ny, nx = 96, 112
    deg = Degradations(**(CAMERA | dict(texture_modulation=0.027)))
    rec = synthetic_recording((200, ny, nx), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=150.0,
                              sources=[SpiralSource(0.45 * nx * PX, 0.5 * ny * PX, 6.0, charge=1)],
                              degradations=deg, seed=4)
    noise = np.std(np.diff(rec.data[:, 40:56, 40:56].astype(float), axis=0)) / np.sqrt(2)
    contrast = 0.45 * 0.027 * 255
    assert 0.7 < contrast / noise < 1.3  # the field is as faint as asked
    s = analyse_movie(rec.data, calibration=rec.calibration, times_s=rec.times_s).summary
    assert s["detection"]["waves_detected"] is True
    assert s["detection"]["significant_fraction"] >= 0.5
    assert s["period_min"]["median"] == pytest.approx(6.0, rel=0.05)  # issue 12's period tolerance


def test_cli_says_no_waves_detected_and_exits_0(tmp_path, capsys):
    from waves.cli import main
    from waves.synthetic import write_recording

    rec = _no_wave_movie("red noise", 0)
    path = tmp_path / "quiet.ome.tif"
    write_recording(rec, path)
    assert main(["analyse", str(path), "--out", str(tmp_path / "out"), "--no-report"]) == 0
    printed = capsys.readouterr()
    assert "no waves detected" in printed.out + printed.err
    s = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert s["detection"]["waves_detected"] is False
    assert s["detection"]["statement"].startswith("no waves detected")
    assert s["period_min"] is None and s["spiral_cores"] == [] and s["centres"] == []
    assert (tmp_path / "out" / "significant_wave.tif").exists()
