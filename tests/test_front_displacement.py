"""Front speed from each front's displacement along its normal
(waves.measure.displacement) against exact arrival-time fields."""

import numpy as np
import pytest

from waves.errors import WavesError
from waves.measure.displacement import front_displacement_speed, front_displacement_speed_numpy
from waves.measure.speed import activation_fit_speed


def _arrivals(t_map, period, waves=3):
    times = np.stack([t_map + k * period for k in range(waves)], axis=2).astype(np.float32)
    return times, np.full(t_map.shape, waves, dtype=np.int32)


@pytest.mark.parametrize("angle_deg", [0.0, 30.0, 135.0, -100.0])
def test_plane_wave_speed_is_exact_along_its_normal(angle_deg):
    # exact plane wave T = (x cos a - y sin a) / v (+y up = -row): the speed is v in every direction
    ny, nx, v, period = 40, 40, 1.7, 50.0
    a = np.deg2rad(angle_deg)
    rr, cc = np.mgrid[0:ny, 0:nx].astype(float)
    times, counts = _arrivals((cc * np.cos(a) - rr * np.sin(a)) / v, period)
    direction = np.full(times.shape, a, dtype=np.float32)
    sp = front_displacement_speed(times, counts, direction, max_dt_frames=period / 3)
    sp2 = front_displacement_speed_numpy(times, counts, direction, max_dt_frames=period / 3)
    np.testing.assert_allclose(sp, sp2, rtol=1e-4, equal_nan=True)
    assert np.isfinite(sp).mean() > 0.5  # the last 3 px downstream have no room
    np.testing.assert_allclose(sp[np.isfinite(sp)], v, rtol=1e-4)


def test_walks_stop_at_a_collision_line_and_follow_a_target():
    # two plane waves meet head-on on column 20: T = min of the two (eikonal: the first wave to
    # arrive excites).  A walk whose second half runs back down (past the line) gives nothing.  A target's fronts T = r / v: along the radius the speed is v exactly
    # (a bilinear arrival between pixels is within a few 1e-3 px of the circle at r > 5)
    ny, nx, v, period = 20, 41, 1.5, 60.0
    rr, cc = np.mgrid[0:ny, 0:nx].astype(float)
    times, counts = _arrivals(np.minimum(cc, nx - 1 - cc) / v, period)
    direction = np.where(cc < 20, 0.0, np.pi)[:, :, None] * np.ones(times.shape)
    sp = front_displacement_speed(times, counts, direction, max_dt_frames=period / 3)
    np.testing.assert_allclose(sp[np.isfinite(sp)], v, rtol=1e-4)
    assert np.isnan(sp[:, 17:24]).all()  # the line within the walk's second half
    assert np.isfinite(sp[:, 10]).all() and np.isfinite(sp[:, 30]).all()
    ny = nx = 50
    rr, cc = np.mgrid[0:ny, 0:nx].astype(float)
    r = np.hypot(rr - 24.3, cc - 25.6)
    times, counts = _arrivals(r / v, period)
    direction = np.arctan2(-(rr - 24.3), cc - 25.6)[:, :, None] * np.ones(times.shape)
    sp = front_displacement_speed(times, counts, direction, max_dt_frames=period / 3)
    ok = np.isfinite(sp[:, :, 0]) & (r > 5)
    assert ok.sum() > 300
    np.testing.assert_allclose(np.median(sp[:, :, 0][ok]), v, rtol=2e-3)


def test_longer_walks_are_less_biased_by_arrival_jitter_than_plane_fits():
    # plane wave with Gaussian arrival-time jitter (0.4 frames): a 5 x 5 plane fit's gradient
    # is steeper on average (|g + noise| > |g|), the speed low; the displacement over 6 px
    # less so.  Truth: v.  (The bias of 1/|g| is second order in the noise; measured here.)
    ny, nx, v, period = 80, 80, 1.5, 50.0
    rr, cc = np.mgrid[0:ny, 0:nx].astype(float)
    rng = np.random.default_rng(4)
    times, counts = _arrivals(cc / v + 0.4 * rng.normal(size=cc.shape), period, waves=1)
    fit, direction = activation_fit_speed(times, counts, max_dt_frames=period / 3)
    walk = front_displacement_speed(times, counts, direction, max_dt_frames=period / 3)
    fit_err = abs(np.nanmedian(fit) / v - 1)
    walk_err = abs(np.nanmedian(walk) / v - 1)
    assert walk_err < 0.5 * fit_err


def test_bad_shapes_are_refused():
    with pytest.raises(WavesError):
        front_displacement_speed(np.zeros((3, 3, 2)), np.zeros((3, 3), np.int32), np.zeros((3, 3, 1)),
                                 max_dt_frames=1.0)
