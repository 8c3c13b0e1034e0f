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
