"""The dominant period of the cleaned movie (waves.analyse.look._dominant_period_frames)
and the per-pixel noise behind the signal-to-noise map (waves.analyse.strips), against
fields of known truth: a sinusoidal wave of known period under a red-noise continuum,
a pulse train (strong harmonics), white noise through the band-pass."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from waves.analyse.clean import clean_buffer
from waves.analyse.look import _dominant_period_frames
from waves.analyse.strips import _noise_sd, noise_amplitude_factor
from waves.phase.analytic import analytic_signal

NT, NY, NX = 480, 24, 24
PERIOD = 18.0  # frames


def _movie(x):
    m = clean_buffer(x.shape)
    m.write(0, x.astype(np.float32))
    return m


def _wave(amp=1.0, shape="sine"):
    t = np.arange(NT)[:, None, None]
    phase = 2 * np.pi * t / PERIOD - 0.3 * np.arange(NX)[None, None, :]  # a plane wave along x
    if shape == "sine":
        return amp * np.cos(phase) * np.ones((1, NY, 1))
    return amp * (np.cos(phase) > 0.9).astype(np.float64) * np.ones((1, NY, 1))  # narrow pulses


def test_period_stands_out_of_a_red_continuum():
    # slowly changing texture: an AR(1) process (alpha 0.97 per frame, sd 3x the wave) whose
    # spectrum rises toward the band's low end, where many single pixels peak (truth: 18 frames)
    rng = np.random.default_rng(2)
    red = scipy.signal.lfilter([1.0], [1.0, -0.97], rng.normal(0, 1, (NT, NY, NX)), axis=0)
    red *= 3.0 / red.std()
    x = _wave() + red
    band = (1 / 60.0, 1 / 6.0)
    per, frac = _dominant_period_frames(_movie(x), band)
    # within the Hann peak's refinement (common practice); the median of the single pixels'
    # spectral peaks (the former rule) gives 54 frames here
    assert per == pytest.approx(PERIOD, rel=0.02)


def test_spiky_waves_give_their_fundamental():
    # a pulse train: its harmonics at 9 and 6 frames stand out as much as the fundamental
    rng = np.random.default_rng(3)
    x = _wave(shape="pulses") + 0.05 * rng.normal(0, 1, (NT, NY, NX))
    per, _ = _dominant_period_frames(_movie(x), (1 / 60.0, 1 / 4.0))
    assert per == pytest.approx(PERIOD, rel=0.02)


def test_noise_sd_and_band_noise_gain_against_white_noise():
    # white noise: var of the second difference is 6 sigma^2 (exact), and the analytic signal's
    # mean amplitude through the band-pass is what noise_amplitude_factor says (Rayleigh mean;
    # checked against analytic_signal itself on the same noise)
    rng = np.random.default_rng(4)
    sigma = 2.5
    x = rng.normal(0, sigma, (NT, NY, NX)).astype(np.float32)
    slow = 10.0 * np.sin(2 * np.pi * np.arange(NT) / 200.0)[:, None, None]  # slow drift: no second difference to speak of
    est = _noise_sd((x + slow).astype(np.float32))
    assert float(np.median(est)) == pytest.approx(sigma, rel=0.02)  # 11 000 samples a pixel: ~1 % sd
    band = (0.5 / PERIOD, 1.6 / PERIOD)
    z = analytic_signal(x.copy(), passband=band)
    measured = float(np.abs(z[60:-60]).mean()) / sigma
    assert measured == pytest.approx(noise_amplitude_factor(NT, band), rel=0.03)


def test_compiled_noise_sd_and_sparse_nonzero_equal_their_numpy_forms():
    from waves.analyse.strips import _noise_sd_numpy, _sparse_nonzero

    rng = np.random.default_rng(5)
    x = (100 + 30 * rng.normal(0, 1, (40, 9, 13))).astype(np.float32)
    for movie in (x, x[:, 2:7], x[:3]):
        assert np.array_equal(_noise_sd(movie), _noise_sd_numpy(movie))
    for shape in [(30, 7, 11), (4, 3, 2), (0, 5, 5)]:
        q = np.zeros(shape, dtype=np.int8)
        if q.size:
            q.flat[rng.integers(0, q.size, q.size // 5 + 1)] = rng.choice([-2, -1, 1, 2], q.size // 5 + 1)
        for view in (q, q[:, : max(shape[1] - 1, 0)]):
            got, want = _sparse_nonzero(view), np.nonzero(view)
            assert all(np.array_equal(a, b) for a, b in zip(got, want, strict=True))
