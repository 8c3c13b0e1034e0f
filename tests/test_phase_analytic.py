"""Analytic signal and phase against scipy and exact identities."""

import numpy as np
import pytest
import scipy.signal

from waves.errors import WavesError
from waves.phase.analytic import (
    analytic_signal,
    delay_embedding_phase,
    passband_from_periods,
    phase_and_amplitude,
)


@pytest.mark.parametrize("n", [64, 65, 200])
def test_equals_scipy_hilbert_of_mean_removed_signal(n):
    # reference library: scipy.signal.hilbert on the mean-removed signal
    rng = np.random.default_rng(1)
    x = rng.normal(size=(n, 7, 5)).astype(np.float32) + 3.0
    ours = analytic_signal(x)
    ref = scipy.signal.hilbert(x - x.mean(axis=0), axis=0)
    np.testing.assert_allclose(ours, ref, atol=2e-5 * np.abs(ref).max())


def test_cosine_and_sine_identities():
    # scipy.signal.hilbert docs: cos(w t) -> phase w t, sin(w t) -> w t - pi/2
    n, cycles = 400, 10
    t = np.arange(n)
    w = 2 * np.pi * cycles / n
    z = analytic_signal(np.stack([np.cos(w * t), np.sin(w * t)], axis=1))
    phase, amp = phase_and_amplitude(z)
    expect = np.angle(np.exp(1j * np.stack([w * t, w * t - np.pi / 2], axis=1)))
    diff = np.angle(np.exp(1j * (phase - expect)))
    assert np.abs(diff).max() < 1e-4
    np.testing.assert_allclose(amp, 1.0, atol=1e-4)


def test_passband_removes_out_of_band_component():
    # common practice, no source: an ideal band-pass keeps the in-band tone only
    n = 512
    t = np.arange(n)
    slow = np.cos(2 * np.pi * 4 * t / n)  # 4 cycles: below the band
    tone = np.cos(2 * np.pi * 32 * t / n)  # in band
    z = analytic_signal((slow + tone)[:, None], passband=(16 / n, 64 / n))
    ref = scipy.signal.hilbert(tone)
    np.testing.assert_allclose(z[:, 0], ref, atol=1e-4)


def test_passband_from_periods_units_and_refusals():
    # arithmetic: 6 min period at 20 s frames is 18 frames -> 1/18 cycles per frame
    f_lo, f_hi = passband_from_periods((6.0, 12.0), frame_interval_s=20.0, n_frames=300)
    assert f_hi == pytest.approx(1 / 18)
    assert f_lo == pytest.approx(1 / 36)
    with pytest.raises(WavesError, match="too far apart"):
        passband_from_periods((0.5, 10.0), frame_interval_s=20.0, n_frames=300)
    with pytest.raises(WavesError, match="too few frames"):
        passband_from_periods((6.0, 12.0), frame_interval_s=20.0, n_frames=10)


def test_delay_embedding_matches_hilbert_phase_for_a_sinusoid():
    # Gray, Pertsov & Jalife 1998 (from memory) with the sign flipped so the
    # phase increases in time: for cos(w t) and lag T/4 it is w t
    n, period = 400, 40
    t = np.arange(n)
    x = np.cos(2 * np.pi * t / period)[:, None]
    ph = delay_embedding_phase(x, lag_frames=period // 4)
    valid = ~np.isnan(ph[:, 0])
    diff = np.angle(np.exp(1j * (ph[valid, 0] - 2 * np.pi * t[valid] / period)))
    assert np.abs(diff).max() < 1e-4
    assert np.isnan(ph[-period // 4 :]).all()


def test_compiled_phase_and_amplitude_equal_numpy_twin():
    # STYLE.md practice: compiled kernel against its numpy twin
    from waves.phase.analytic import phase_and_amplitude_numpy

    rng = np.random.default_rng(4)
    z = (rng.normal(size=(50, 7, 9)) + 1j * rng.normal(size=(50, 7, 9))).astype(np.complex64)
    p1, a1 = phase_and_amplitude(z)
    p2, a2 = phase_and_amplitude_numpy(z)
    np.testing.assert_allclose(p1, p2, atol=1e-6)
    np.testing.assert_allclose(a1, a2, rtol=1e-6)
