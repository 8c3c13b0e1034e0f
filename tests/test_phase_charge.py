"""Topological charge: compiled kernel, numpy twin and exact vortices."""

import numpy as np
import pytest

from waves.phase.charge import plaquette_charge, plaquette_charge_numpy


def test_kernel_equals_numpy_twin_on_random_phase():
    # STYLE.md practice: every kernel is tested against its numpy twin
    rng = np.random.default_rng(2)
    p = rng.uniform(-np.pi, np.pi, size=(6, 33, 41)).astype(np.float32)
    p[1, 5, 7] = np.nan
    np.testing.assert_array_equal(plaquette_charge(p), plaquette_charge_numpy(p))


@pytest.mark.parametrize("q", [1, -1])
def test_single_vortex_charge_and_place(q):
    # exact: phase = q * polar angle (counterclockwise as displayed) winds by
    # 2 pi q around the centre and not around any other plaquette
    y, x = np.mgrid[0:30, 0:30].astype(float)
    r0, c0 = 12.5, 17.5
    theta = np.arctan2(-(y - r0), x - c0)
    phase = np.angle(np.exp(1j * q * theta))
    charge = plaquette_charge(phase)
    assert charge.sum() == q
    assert charge[12, 17] == q
    assert np.count_nonzero(charge) == 1


def test_counter_rotating_pair():
    # exact: a + and a - vortex give one charge of each sign
    y, x = np.mgrid[0:40, 0:60].astype(float)
    th1 = np.arctan2(-(y - 20.5), x - 15.5)
    th2 = np.arctan2(-(y - 20.5), x - 44.5)
    charge = plaquette_charge(np.angle(np.exp(1j * (th1 - th2))))
    assert charge[20, 15] == 1 and charge[20, 44] == -1
    assert np.count_nonzero(charge) == 2


def test_smooth_field_has_no_charge():
    # a plane wave has no singularity
    y, x = np.mgrid[0:20, 0:20].astype(float)
    phase = np.angle(np.exp(1j * (0.7 * x - 0.3 * y)))
    assert not plaquette_charge(phase).any()
