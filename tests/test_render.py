"""Dark-field rendering: polarity, determinism, streaming = whole movie, no
clipping at defaults, measured noise and gain against the stated model."""

from __future__ import annotations

import numpy as np
import pytest

from waves.errors import WavesError
from waves.render import DarkfieldRenderer, DarkfieldStyle


def _bands(shape_tyx, *, seed=3):
    """Smooth moving bands in [0, 1] (the test's own field)."""
    nt, ny, nx = shape_tyx
    t = np.arange(nt)[:, None, None]
    x = np.arange(nx)[None, None, :]
    y = np.arange(ny)[None, :, None]
    rng = np.random.default_rng(seed)
    k = rng.uniform(0.1, 0.3)
    return (0.5 + 0.5 * np.cos(k * x + 0.05 * y - 0.4 * t)).astype(np.float32)


@pytest.mark.parametrize("polarity, sign", [("bright", 1), ("dark", -1)])
def test_polarity_sets_sign_of_band_contrast(polarity, sign):
    e = _bands((6, 64, 96))
    movie = DarkfieldRenderer((64, 96), style=DarkfieldStyle(polarity=polarity), seed=1).movie(e)
    r = np.corrcoef(movie.ravel().astype(np.float64), e.ravel().astype(np.float64))[0, 1]
    # Pearson correlation sign (common practice, no source); texture and noise keep |r| below 1
    assert sign * r > 0.6


def test_frame_equals_movie_slice_and_is_deterministic():
    e = _bands((7, 40, 50))
    style = DarkfieldStyle(dtype="uint16")
    a = DarkfieldRenderer((40, 50), style=style, seed=11)
    b = DarkfieldRenderer((40, 50), style=style, seed=11)
    movie = a.movie(e)
    for i in range(7):
        np.testing.assert_array_equal(b.frame(e[i], i), movie[i])
    np.testing.assert_array_equal(b.movie(e), movie)
    other = DarkfieldRenderer((40, 50), style=style, seed=12).movie(e)
    assert np.mean(other != movie) > 0.5
    # the same frame index gives the same frame whatever was rendered before
    np.testing.assert_array_equal(a.frame(e[3], 3), movie[3])


@pytest.mark.parametrize("dtype, full", [("uint8", 255), ("uint16", 65535)])
def test_dtype_and_no_clipping_at_default_style(dtype, full):
    style = DarkfieldStyle(dtype=dtype)
    r = DarkfieldRenderer((128, 128), style=style, seed=5)
    lo = np.zeros((128, 128), np.float32)
    hi = np.ones((128, 128), np.float32)
    # cover a whole drift period in steps of 25 frames
    for i in range(0, int(style.drift_period_frames) + 1, 25):
        for e in (lo, hi):
            f = r.frame(e, i)
            assert f.dtype == np.dtype(dtype)
            assert f.min() > 0 and f.max() < full
    # the noise-free range the style reports is inside full scale by a margin of several noise sd
    low, high = style.level_range()
    assert low - 5 * style.noise > 0 and high + 5 * style.noise < 1


@pytest.mark.parametrize("dtype", ["uint8", "uint16"])
def test_measured_noise_matches_stated_sd(dtype):
    style = DarkfieldStyle(dtype=dtype, drift=0.0, noise=0.02)
    r = DarkfieldRenderer((256, 256), style=style, seed=9)
    e = np.full((256, 256), 0.5, np.float32)
    # static parts cancel in the difference of two frames of the same field
    diff = r.frame(e, 1).astype(np.float64) - r.frame(e, 2).astype(np.float64)
    sd = 0.02 * style.full_scale
    # rounding to integers adds variance 1/12 per frame (Sheppard's correction, common practice)
    expected = np.sqrt(2 * (sd**2 + 1 / 12))
    # sample sd of 65536 values: relative standard error ~ 0.3 %; achieved 0.15 %
    assert diff.std() == pytest.approx(expected, rel=0.01)
    # standard error of the mean 0.4 % of expected; achieved 0.95 %
    assert abs(diff.mean()) < 0.03 * expected


def test_noise_free_levels_follow_the_multiplicative_model():
    style = DarkfieldStyle(dtype="uint16", noise=0.0, drift=0.0, contrast=0.3, background=0.5)
    r = DarkfieldRenderer((60, 70), style=style, seed=2)
    f0 = r.frame(np.zeros((60, 70), np.float32), 0).astype(np.float64)
    f1 = r.frame(np.ones((60, 70), np.float32), 4).astype(np.float64)
    # level = gain * (background + contrast * (e - 0.5)): ratio (0.65 / 0.35) everywhere (module docstring)
    np.testing.assert_allclose(f1 / f0, 0.65 / 0.35, rtol=2e-4)  # rounding of ~1e4 counts
    np.testing.assert_allclose(f0, np.rint(65535 * r.gain_yx.astype(np.float64) * 0.35), atol=1)


def test_illumination_and_texture_span_their_stated_ranges():
    only_light = DarkfieldRenderer((80, 90), style=DarkfieldStyle(texture=0.0, illumination=0.2), seed=4)
    g = only_light.gain_yx.astype(np.float64)
    assert g.max() == pytest.approx(1.0, abs=1e-6) and g.min() == pytest.approx(0.8, abs=1e-6)
    # smooth: neighbouring pixels differ by far less than the full range
    assert np.abs(np.diff(g, axis=1)).max() < 0.02
    only_tex = DarkfieldRenderer(
        (200, 200), style=DarkfieldStyle(texture=0.2, illumination=0.0, texture_scale_px=3.0), seed=4
    )
    t = only_tex.gain_yx.astype(np.float64)
    assert t.min() >= 0.8 - 1e-6 and t.max() <= 1.2 + 1e-6 and t.std() > 0.05
    # Gaussian-smoothed white noise of sd s has correlation exp(-d^2 / (4 s^2)) at lag d
    # (from memory); tanh bends it a little (achieved -0.035 and -0.052), so a loose tolerance
    z = t - t.mean()
    for lag in (3, 6):
        rho = np.mean(z[:, lag:] * z[:, :-lag]) / np.mean(z * z)
        assert rho == pytest.approx(np.exp(-(lag**2) / (4 * 3.0**2)), abs=0.08)


def test_drift_changes_baseline_slowly_within_its_range():
    style = DarkfieldStyle(noise=0.0, drift=0.1, drift_period_frames=100.0, dtype="uint16")
    r = DarkfieldRenderer((20, 20), style=style, seed=8)
    e = np.full((20, 20), 0.5, np.float32)
    means = np.array([r.frame(e, i).mean() for i in range(100)])
    rel = means / means.mean()
    # achieved 1e-6 (integer rounding of ~3e4 counts)
    assert rel.max() == pytest.approx(1.1, abs=5e-6) and rel.min() == pytest.approx(0.9, abs=5e-6)
    # one sinusoidal cycle over 100 frames: a single spectral line at 1 cycle (common practice, no source)
    spectrum = np.abs(np.fft.rfft(rel - rel.mean()))
    assert np.argmax(spectrum) == 1


def test_bad_style_and_inputs_are_refused():
    with pytest.raises(WavesError, match="polarity"):
        DarkfieldStyle(polarity="white")
    with pytest.raises(WavesError, match="dtype"):
        DarkfieldStyle(dtype="float32")
    with pytest.raises(WavesError, match="contrast"):
        DarkfieldStyle(contrast=-0.1)
    with pytest.raises(WavesError, match="noise"):
        DarkfieldStyle(noise=float("nan"))
    with pytest.raises(WavesError, match="clip"):
        DarkfieldStyle(background=0.8, contrast=0.4)
    r = DarkfieldRenderer((10, 12))
    with pytest.raises(WavesError, match="shape"):
        r.frame(np.zeros((12, 10), np.float32), 0)
    with pytest.raises(WavesError, match="outside \\[0, 1\\]"):
        r.frame(np.full((10, 12), 2.0, np.float32), 0)
    with pytest.raises(WavesError, match="NaN"):
        r.frame(np.full((10, 12), np.nan, np.float32), 0)
    with pytest.raises(WavesError, match="index"):
        r.frame(np.zeros((10, 12), np.float32), -1)
    with pytest.raises(WavesError, match="movie"):
        r.movie(np.zeros((10, 12), np.float32))
    with pytest.raises(WavesError, match="seed"):
        DarkfieldRenderer((10, 12), seed=-3)
    with pytest.raises(WavesError, match="shape_yx"):
        DarkfieldRenderer((10, 0))
