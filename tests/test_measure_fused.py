"""The fused per-pixel kernel against its numpy twins (period_from_cycles,
windowed_phase_velocity), STYLE.md practice: kernels are tested against a
readable numpy version on random input."""

import numpy as np
import pytest

from waves.measure.fused import pixel_measures
from waves.measure.period import period_from_cycles, phase_advance
from waves.measure.speed import windowed_phase_velocity
from waves.phase.analytic import analytic_signal, phase_and_amplitude


@pytest.mark.parametrize("noise", [0.0, 0.3, 2.0])
def test_fused_equals_numpy_twins(noise):
    rng = np.random.default_rng(7)
    nt, ny, nx = 150, 18, 23
    t, y, x = np.meshgrid(np.arange(nt), np.arange(ny), np.arange(nx), indexing="ij")
    theta = np.arctan2(-(y - 8.3), x - 10.7)
    r = np.hypot(y - 8.3, x - 10.7)
    sig = np.cos(2 * np.pi * t / 17 - 2 * np.pi * r / 12 + theta) + noise * rng.normal(size=t.shape)
    z = analytic_signal(sig)[10:-10]
    phase, amp = phase_and_amplitude(z)
    windows = [(0, 60), (30, 90), (60, 130)]
    rows = (2, ny - 2)
    pm = pixel_measures(phase, amp, rows=rows, windows=windows)
    twins = windowed_phase_velocity(z, windows=[(0, z.shape[0])] + windows)
    adv = phase_advance(z)
    inner = slice(*rows)
    for i, (a, b) in enumerate([(0, z.shape[0])] + windows):
        np.testing.assert_allclose(
            pm.period_frames[i], period_from_cycles(adv[a : b - 1])[inner], rtol=1e-4, atol=1e-4, equal_nan=True
        )
        tw = twins[i]
        np.testing.assert_allclose(pm.speed_px_per_frame[i], tw.speed_px_per_frame[inner], rtol=1e-4, atol=1e-5)
        np.testing.assert_allclose(pm.coherence[i], tw.coherence[inner], rtol=1e-4, atol=1e-5)
        np.testing.assert_allclose(pm.omega_rad_per_frame[i], tw.omega_rad_per_frame[inner], rtol=1e-4, atol=1e-6)
        d = np.angle(np.exp(1j * (pm.direction_rad[i] - tw.direction_rad[inner])))
        assert np.abs(d).max() < 1e-3
    np.testing.assert_allclose(pm.amplitude, amp.mean(axis=0)[inner], rtol=1e-5)


def test_fused_whole_block_gradient_edges_match_twin():
    # rows (0, ny): the block edges use one-sided differences, as the twin
    rng = np.random.default_rng(8)
    sig = rng.normal(size=(60, 9, 11)).cumsum(axis=0)
    z = analytic_signal(sig)
    phase, amp = phase_and_amplitude(z)
    pm = pixel_measures(phase, amp, rows=(0, 9), windows=[])
    tw = windowed_phase_velocity(z, windows=[(0, 60)])[0]
    np.testing.assert_allclose(pm.coherence[0], tw.coherence, rtol=1e-4, atol=1e-5)
