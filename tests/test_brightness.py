"""Per-frame brightness (waves.preprocess.brightness): the lamp gain and the
flicker frames against the synthetic recording's truth (`truth.gain_t`,
`truth.lamp_t`, `truth.flicker_frames`), exact solutions for the removal and
the interpolation, the detrend and padding of the analytic signal, and user
errors."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from waves.errors import InputError
from waves.phase.analytic import analytic_signal
from waves.preprocess.brightness import (
    FLICKER_MIN_JUMP,
    brightness_correction,
    estimate_brightness,
    frame_brightness,
    interpolate_frames,
    remove_brightness,
)
from waves.render import Degradations
from waves.synthetic import SpiralSource, TargetSource, synthetic_recording

PX, DT, SPEED, PERIOD = 10.0, 20.0, 100.0, 6.0
CAMERA = dict(texture_contrast=0.3, full_well_e=4000.0, read_noise_counts=1.0, bits=8)
SLOW = 20.0 * 60.0 / DT  # the default band's longest period (20 min), frames


def _rec(kind, seed, **deg):
    src = [SpiralSource(640.0, 640.0, PERIOD)] if kind == "spiral" else [TargetSource(500.0, 800.0, PERIOD)]
    return synthetic_recording((128, 96, 96) if kind == "target" else (128, 128, 128), pixel_size_um=PX,
                               frame_interval_s=DT, speed_um_per_min=SPEED, sources=src,
                               degradations=Degradations(**CAMERA, **deg), seed=seed)


@pytest.mark.parametrize("kind, seed, law", [("target", 0, "linear"), ("spiral", 1, "linear"),
                                             ("target", 2, "exponential"), ("spiral", 3, "exponential")])
def test_gain_follows_the_lamp_and_flicker_truth(kind, seed, law):
    rec = _rec(kind, seed, lamp_fade=0.4, lamp_fade_law=law, flicker_count=4, flicker_gain=0.1)
    b = estimate_brightness(rec.data, slow_frames=SLOW)
    # synthetic truth: the flicker frames and the gain of every frame (lamp x flicker)
    assert b.flicker_frames == list(rec.truth.flicker_frames)
    steady = ~b.flicker
    truth = rec.truth.gain_t / np.mean(rec.truth.gain_t[steady])
    # measured max error 0.6-1.2 % (the field's mean brightness rises and falls with the waves,
    # 8-bit rounding and clipping); 1.5 %, while the fade itself is 40 %
    np.testing.assert_allclose(b.gain_raw, truth, rtol=0.015)
    lamp = rec.truth.lamp_t / np.mean(rec.truth.lamp_t[steady])
    np.testing.assert_allclose(b.gain[steady], lamp[steady], rtol=0.015)  # the slow trend is the lamp
    fade = 100.0 * (rec.truth.lamp_t[-1] / rec.truth.lamp_t[0] - 1.0)  # -40 %
    assert abs(b.fade_percent - fade) < 1.5
    # the flicker frames keep their own gain (0.9 or 1.1 x the lamp)
    np.testing.assert_allclose(b.gain[~steady] / lamp[~steady], rec.truth.flicker_gain, rtol=0.015)


@pytest.mark.parametrize("strength", [0.08, 0.12, 0.15])
@pytest.mark.parametrize("seed", [4, 5, 6])
def test_flicker_frames_are_found_exactly(seed, strength):
    rec = _rec("spiral" if seed % 2 else "target", seed, lamp_fade=0.3, flicker_count=3 + seed % 3,
               flicker_gain=strength)
    b = estimate_brightness(rec.data, slow_frames=SLOW)
    assert len(rec.truth.flicker_frames) == 3 + seed % 3
    assert b.flicker_frames == list(rec.truth.flicker_frames)  # synthetic truth


@pytest.mark.parametrize("kind, seed, fade", [("target", 0, 0.0), ("spiral", 1, 0.0), ("target", 2, 0.4),
                                              ("spiral", 3, 0.4)])
def test_no_false_flicker_on_noisy_movies(kind, seed, fade):
    # synthetic truth: no flicker; shot, read noise and 8-bit rounding only (and a smooth fade)
    rec = _rec(kind, seed, lamp_fade=fade)
    b = estimate_brightness(rec.data, slow_frames=SLOW)
    assert b.flicker_frames == [] == list(rec.truth.flicker_frames)
    # the largest steady-frame score stays far below the threshold (measured |z| <= 3.6)
    assert np.abs(b.z).max() < 5.0


def test_gain_and_offset_fit_is_exact_on_a_linear_model():
    # exact solution: frame = g_t * R + o_t with 5 % of the pixels wild (specks, bands);
    # against the temporal mean the fit returns g_t / mean(g) and o_t - g_t / mean(g) * mean(o)
    rng = np.random.default_rng(0)
    nt, n = 40, 5000
    ref_true = rng.uniform(20.0, 200.0, n)
    g = 1.0 - 0.3 * np.linspace(0, 1, nt)
    o = 5.0 + 3.0 * np.sin(np.linspace(0, 2, nt))
    frames = g[:, None] * ref_true[None, :] + o[:, None]
    wild = rng.random((nt, n)) < 0.05
    frames[wild] += rng.uniform(-80, 80, wild.sum())
    clean = g[:, None] * ref_true[None, :] + o[:, None]
    ref = clean.mean(axis=0)
    gain, offset = frame_brightness(frames, ref)
    a = g / g.mean()
    np.testing.assert_allclose(gain, a, rtol=2e-3)  # Huber weights: the wild 5 % barely pull
    np.testing.assert_allclose(offset, o - a * o.mean(), atol=0.3)


def test_removal_and_interpolation_are_exact():
    # exact solution: after removing the gain and offset every frame is the reference;
    # a frame linear in time between its good neighbours is restored exactly
    rng = np.random.default_rng(1)
    ref = rng.uniform(10, 100, (6, 7))
    g = 1.2 * (0.8 / 1.2) ** (np.arange(9) / 8)  # exponential fade: the slow trend (of log g) is exact
    o = np.linspace(-2.0, 3.0, 9)
    frames = (g[:, None, None] * ref + o[:, None, None]).astype(np.float32)
    b = brightness_correction(g, o, slow_frames=1e6)
    out = remove_brightness(frames, b)
    level = float(np.mean(g))  # gain is normalised to mean 1
    np.testing.assert_allclose(out * 1.0, np.broadcast_to(ref * level, out.shape), rtol=1e-4)
    movie = np.stack([np.full((3, 3), float(i)) for i in range(8)]).astype(np.float32)
    movie[3] = 99.0
    movie[4] = -5.0
    movie[7] = 42.0  # last frame: the nearest good one
    bad = np.zeros(8, bool)
    bad[[3, 4, 7]] = True

    def write(i, f):
        movie[i] = f

    assert interpolate_frames(lambda i: movie[i], write, bad) == [3, 4, 7]
    np.testing.assert_allclose(movie[:, 0, 0], [0, 1, 2, 3, 4, 5, 6, 6])


def test_small_jumps_are_not_flicker():
    # a 0.5 % single-frame wobble on an otherwise exact gain: below FLICKER_MIN_JUMP, kept
    g = np.ones(60)
    g[20] = 1.005
    g[40] = 1.0 + 3 * FLICKER_MIN_JUMP  # a 3 % jump is flicker
    b = brightness_correction(g, np.zeros(60), slow_frames=60)
    assert b.flicker_frames == [40]


def test_user_errors():
    with pytest.raises(InputError, match="mask is empty"):
        estimate_brightness(np.ones((5, 4, 4)), mask=np.zeros((4, 4), bool), slow_frames=10)
    with pytest.raises(InputError, match="no light"):
        brightness_correction(np.array([0.0, 0.0, 1.0]), np.zeros(3), slow_frames=10)
    # a single blank frame is no error: it is flagged (and interpolated by the pipeline)
    g = np.ones(30)
    g[7] = 0.0
    assert brightness_correction(g, np.zeros(30), slow_frames=10).flicker_frames == [7]
    with pytest.raises(InputError, match="no light"):
        frame_brightness(np.zeros((3, 4)), np.zeros(4))


# ----------------------------------------------------------------- trend before the FFT


def test_detrend_removes_a_quadratic_and_keeps_the_wave():
    # exact solution: a quadratic trend is removed completely; a wave of many cycles keeps
    # its phase in the middle of the series (the band's trimmed ends excluded)
    n = 200
    t = np.arange(n, dtype=np.float64)
    trend = 50.0 - 0.3 * t + 1e-3 * t**2
    z = analytic_signal(trend[:, None].astype(np.float32), detrend_degree=2)
    assert np.abs(z).max() < 1e-3 * np.abs(trend).max()
    period = 18.0
    wave = np.cos(2 * np.pi * t / period)
    band = (0.5 / period, 1.6 / period)
    mid = slice(30, n - 30)
    exact = np.angle(scipy.signal.hilbert(wave))[mid]  # scipy reference on the trend-free wave
    with_trend = (wave + 40 * (1 - t / n))[:, None].astype(np.float32)  # a 40 x wave-amplitude fade
    on = np.angle(analytic_signal(with_trend, passband=band, detrend_degree=2)[mid, 0])
    off = np.angle(analytic_signal(with_trend, passband=band)[mid, 0])
    err_on = np.abs(np.angle(np.exp(1j * (on - exact)))).max()
    err_off = np.abs(np.angle(np.exp(1j * (off - exact)))).max()
    assert err_on < 0.05  # radians; measured 0.01
    assert err_off > 0.3  # the sawtooth at the wrap-around rings through the band without the detrend


def test_padding_is_cut_off_and_defaults_match_scipy():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(64, 3)).astype(np.float32)
    h = scipy.signal.hilbert(x - x.mean(axis=0), axis=0)  # scipy reference
    np.testing.assert_allclose(analytic_signal(x), h, atol=1e-5)
    z = analytic_signal(x, pad_frames=16, detrend_degree=1)
    assert z.shape == x.shape and z.dtype == np.complex64
    y = x.copy()
    analytic_signal(y, detrend_degree=2)
    np.testing.assert_array_equal(y, x)  # the input is left alone unless overwrite_x


def test_detrend_equals_a_least_squares_polynomial_fit():
    from waves.phase.analytic import _detrend_poly

    rng = np.random.default_rng(3)
    x = rng.normal(size=(50, 70, 90)).astype(np.float32)  # 6300 pixels: more than one chunk
    t = np.linspace(-1, 1, 50)
    v = np.vander(t, 3, increasing=True)
    coef = np.linalg.lstsq(v, x.reshape(50, -1).astype(np.float64), rcond=None)[0]  # numpy reference
    expected = x.reshape(50, -1) - v @ coef
    np.testing.assert_allclose(_detrend_poly(x.copy(), 2).reshape(50, -1), expected, atol=1e-5)
