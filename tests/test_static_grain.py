"""Each pixel's static grain (waves.analyse.clean.static_grain): the cell texture's
multiplicative grain is divided out where it stands still and left alone where it
moves.  Truth: the synthetic grain the test makes (smoothed Gaussian noise)."""

import numpy as np
from scipy import ndimage

from waves.analyse.clean import static_grain


def _grain(shape, seed, amp=0.12):
    rng = np.random.default_rng(seed)
    g = ndimage.gaussian_filter(rng.normal(size=shape), 1.0)
    return 1.0 + amp * g / g.std()


def test_a_static_grain_is_found_and_a_moving_one_left_alone():
    shape, level, n = (96, 96), 80.0, 200
    grain = _grain(shape, 1)
    # static: both halves of the movie hold the same texture (a smooth residue of waves on top)
    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]]
    waves = 0.5 * np.cos(2 * np.pi * xx / 40.0)
    ref = level * grain + waves
    got = static_grain(ref, level * grain - waves, n_frames=n, level=level)
    inner = (slice(8, -8), slice(8, -8))
    assert np.median(np.abs(got - grain)[inner]) < 0.01  # grain sd 0.12
    # streaming: the texture moved 6 px between the halves' centres (more than a grain)
    first = level * np.roll(grain, 3, axis=1)
    second = level * np.roll(grain, -3, axis=1)
    got = static_grain(0.5 * (first + second), first, n_frames=n, level=level)
    assert np.median(np.abs(got - 1.0)[inner]) < 0.3 * np.median(np.abs(grain - 1.0)[inner])
    # no grain, only each half's noise: nothing to divide
    rng = np.random.default_rng(2)
    first = level + rng.normal(scale=1.0, size=shape)
    second = level + rng.normal(scale=1.0, size=shape)
    got = static_grain(0.5 * (first + second), first, n_frames=n, level=level)
    assert np.median(np.abs(got - 1.0)[inner]) < 0.004  # the noise alone would be 0.006
