"""waves.measure.medians against numpy's own nanmedian (the reference library)."""

import warnings

import numpy as np
import pytest

from waves.measure.medians import nanmedian_last


@pytest.mark.parametrize("shape", [(7,), (5, 7, 1), (100, 3), (4, 5, 6), (300, 40), (3, 2)])
@pytest.mark.parametrize("nan_fraction", [0.0, 0.4, 1.0])
def test_same_numbers_as_numpy_nanmedian(shape, nan_fraction):
    rng = np.random.default_rng(sum(shape))
    a = rng.normal(size=shape)
    a[rng.random(shape) < nan_fraction] = np.nan
    a[..., 0] = np.round(a[..., 0], 1)  # some ties
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # numpy warns on all-NaN rows
        ref = np.nanmedian(a, axis=-1)
    np.testing.assert_array_equal(nanmedian_last(a), ref)


def test_empty_last_axis_is_nan():
    assert np.isnan(nanmedian_last(np.empty((3, 0)))).all()


def test_window_medians_equal_the_masked_median():
    # against np.nanmedian of the values masked to each window (numpy, the reference)
    from waves.measure.medians import window_medians

    rng = np.random.default_rng(7)
    ny, nx, m = 9, 11, 8
    times = np.sort(rng.uniform(0, 100, size=(ny, nx, m)), axis=2)
    counts = rng.integers(0, m + 1, size=(ny, nx))
    times[np.arange(m)[None, None, :] >= counts[..., None]] = np.nan  # NaN-padded at the end
    values = rng.normal(size=(ny, nx, m))
    values[rng.random(values.shape) < 0.2] = np.nan
    windows = [(0, 30), (15, 45), (40, 41), (90, 130), (200, 230)]
    got = window_medians(times, values, windows)
    for i, (w0, w1) in enumerate(windows):
        with np.errstate(invalid="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            ref = np.nanmedian(np.where((times >= w0) & (times < w1), values, np.nan), axis=2)
        np.testing.assert_allclose(got[i], ref, equal_nan=True)
