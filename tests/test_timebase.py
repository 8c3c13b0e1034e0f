"""The uniform time grid against exact arithmetic: known dropped indices, gaps,
jitter, excluded frames, block-wise resampling, and the refused times."""

from __future__ import annotations

import numpy as np
import pytest

from waves.analyse.segments import drop_invalid_arrivals, intervals_outside, valid_windows
from waves.errors import InputError
from waves.preprocess.timebase import (
    GAP_MIN_FRAMES,
    GridResampler,
    build_timebase,
    describe_times,
    resample,
    runs,
)

DT = 15.0


def _movie_linear_in_time(times_s, shape=(3, 4)):
    """Frames whose every pixel is a + b * t: linear interpolation in time
    reproduces it exactly (exact arithmetic)."""
    a = np.arange(np.prod(shape), dtype=np.float64).reshape(shape)
    b = 0.01 * (1.0 + a)
    return (a[None] + b[None] * np.asarray(times_s)[:, None, None]).astype(np.float32), a, b


def _times(n_grid, missing, jitter=None):
    keep = np.setdiff1d(np.arange(n_grid), missing)
    t = keep * DT
    if jitter is not None:
        t = t + jitter[: keep.size] * DT
    return keep, t


def test_dropped_frames_and_gap_on_the_grid():
    missing = [3, 7, 8, 12, 13, 14, 15]  # singles, a pair, one gap of 4 frames
    keep, t = _times(20, missing)
    tb = build_timebase(t)
    # exact: the grid is the nominal frame numbering
    assert tb.interval_s == DT and tb.n_grid == 20 and tb.n_recorded == 13
    assert tb.slot.tolist() == keep.tolist()
    assert tb.dropped.tolist() == missing
    assert tb.gaps == [(12, 16)]
    assert np.flatnonzero(~tb.valid).tolist() == [12, 13, 14, 15]  # the pair and singles stay valid
    # grid frame 3 is halfway between recorded frames 2 and 4 (indices 2 and 3 of the recording)
    assert tb.source[3].tolist() == [2, 3] and tb.weight[3] == pytest.approx(0.5)
    # grid frame 8 lies between grid 6 and grid 9 (recording indices 5 and 6), 2/3 of the way
    assert tb.source[8].tolist() == [5, 6] and tb.weight[8] == pytest.approx(2 / 3)
    movie, a, b = _movie_linear_in_time(t)
    grid = resample(movie, tb)
    exact = a[None] + b[None] * (np.arange(20) * DT)[:, None, None]  # exact arithmetic
    np.testing.assert_allclose(grid, exact, rtol=1e-6, atol=1e-5)


@pytest.mark.parametrize("block", [1, 2, 3, 5, 64])
def test_blockwise_resampling_equals_the_whole(block):
    rng = np.random.default_rng(block)
    keep, t = _times(40, [1, 2, 9, 10, 11, 12, 13, 20, 30, 31])
    excluded = np.zeros(keep.size, dtype=bool)
    excluded[[4, 5, 17]] = True
    tb = build_timebase(t, excluded=excluded)
    movie = rng.normal(size=(keep.size, 5, 6)).astype(np.float32)
    whole = resample(movie, tb)
    r = GridResampler(tb)
    parts = []
    for t0 in range(0, keep.size, block):
        g0, out = r.push(t0, movie[t0 : t0 + block])
        assert g0 == sum(len(p) for p in parts)
        parts.append(out)
    assert r.done
    np.testing.assert_array_equal(np.concatenate(parts), whole)  # same arithmetic, same bits


def test_jitter_goes_to_the_nearest_slot():
    rng = np.random.default_rng(3)
    jitter = rng.uniform(-0.3, 0.3, size=50)
    missing = [5, 6, 21, 22, 23, 40]
    keep, t = _times(50, missing, jitter)
    tb = build_timebase(t, nominal_interval_s=DT)
    # exact: |jitter| < half an interval puts every frame on its own nominal slot
    assert tb.slot.tolist() == (keep - keep[0]).tolist()
    assert tb.dropped.tolist() == missing
    assert tb.gaps == [(21, 24)]


def test_a_long_jittered_movie_keeps_its_slots():
    """The median step of jittered times is a little off; the interval fitted
    frame by frame keeps 1500 frames on their slots (exact)."""
    rng = np.random.default_rng(7)
    missing = np.sort(rng.choice(np.arange(1, 1599), 100, replace=False))
    keep, t = _times(1600, missing, rng.uniform(-0.25, 0.25, size=1600))
    tb = build_timebase(t)
    assert tb.slot.tolist() == keep.tolist() and tb.dropped.tolist() == missing.tolist()
    assert tb.interval_s == pytest.approx(DT, rel=1e-3)


def test_gap_threshold_is_three_missing_frames():
    assert GAP_MIN_FRAMES == 3
    _, t2 = _times(12, [4, 5])
    _, t3 = _times(12, [4, 5, 6])
    assert build_timebase(t2).valid.all() and build_timebase(t2).gaps == []
    tb3 = build_timebase(t3)
    assert tb3.gaps == [(4, 7)] and np.flatnonzero(~tb3.valid).tolist() == [4, 5, 6]


def test_excluded_frames_are_interpolated_and_invalid():
    t = np.arange(16) * DT
    excluded = np.zeros(16, dtype=bool)
    excluded[[0, 6, 10, 11]] = True  # the first frame too: it takes its good neighbour
    tb = build_timebase(t, excluded=excluded)
    assert tb.dropped.size == 0 and tb.n_grid == 16
    assert np.flatnonzero(tb.excluded).tolist() == [0, 6, 10, 11]
    assert np.flatnonzero(~tb.valid).tolist() == [0, 6, 10, 11]  # excluded: invalid even alone
    assert tb.interpolated.tolist() == [0, 6, 10, 11]
    movie, a, b = _movie_linear_in_time(t)
    movie[excluded] = 1e6  # garbage that must not leak
    grid = resample(movie, tb)
    exact = a[None] + b[None] * t[:, None, None]  # exact arithmetic
    np.testing.assert_allclose(grid[1:], exact[1:], rtol=1e-6, atol=1e-5)
    np.testing.assert_array_equal(grid[0], movie[1])  # before the first good frame: the nearest


def test_interval_from_calibration_when_it_agrees():
    t = np.arange(20) * DT
    assert build_timebase(t, nominal_interval_s=15.05).interval_s == 15.05  # agrees, same slots
    assert build_timebase(t, nominal_interval_s=20.0).interval_s == DT  # disagrees: the median step
    # within 5 % but 30 x 0.3 s puts the late frames a slot off: the median step
    assert build_timebase(np.arange(30) * DT, nominal_interval_s=15.3).interval_s == DT
    # the median step survives 20 % dropped frames: exact nominal grid
    keep, t = _times(30, [2, 5, 9, 14, 20, 25])
    assert build_timebase(t).interval_s == DT


@pytest.mark.parametrize(
    ("times", "message"),
    [
        ([0, 15, 30, 30, 45], "frame 3 at 30 s repeats frame 2"),
        ([0, 15, 30, 20, 45], "frame 3 at 20 s goes back from frame 2"),
        ([0, 15, np.nan, 45], "not finite"),
        ([0, 15, 22, 45, 60], "frames 1 and 2"),  # 15 and 22 s share slot 1 of the 15 s grid
        ([0], "at least 2"),
    ],
)
def test_bad_times_are_refused_naming_the_frames(times, message):
    with pytest.raises(InputError, match=message):
        build_timebase(np.asarray(times, dtype=np.float64))


def test_excluded_count_must_match():
    with pytest.raises(InputError, match="valid_frames"):
        build_timebase(np.arange(5) * DT, excluded=np.zeros(4, dtype=bool))
    with pytest.raises(InputError, match="every frame"):
        build_timebase(np.arange(5) * DT, excluded=np.ones(5, dtype=bool))


def test_runs_and_windows_in_valid_stretches():
    valid = np.ones(30, dtype=bool)
    valid[10:14] = False
    assert runs(~valid) == [(10, 14)]
    # windows of 6 every 3 frames: [0, 10) holds starts 0, 3; [14, 30) holds 14, 17, 20, 23
    assert valid_windows(valid, win=6, step=3) == [(0, 6), (3, 9), (14, 20), (17, 23), (20, 26), (23, 29)]
    # none fits: the longest stretch is the one window
    assert valid_windows(valid, win=20, step=10) == [(14, 30)]


def test_arrivals_inside_invalid_frames_are_dropped_and_intervals_across_them_too():
    valid = np.ones(40, dtype=bool)
    valid[18:24] = False
    times = np.full((1, 2, 5), np.nan, np.float32)
    times[0, 0, :4] = [2.5, 10.5, 20.5, 30.5]  # the third inside the invalid run
    times[0, 1, :3] = [5.0, 12.0, 26.0]
    counts = np.array([[4, 3]], dtype=np.int32)
    t, c = drop_invalid_arrivals(times, counts, valid)
    assert c.tolist() == [[3, 3]]
    np.testing.assert_array_equal(t[0, 0, :3], [2.5, 10.5, 30.5])  # packed and sorted
    gaps = intervals_outside(t, valid)
    # exact: 10.5 -> 30.5 and 12 -> 26 straddle frames 18-23; the others do not
    np.testing.assert_array_equal(gaps[0, 0, :2], [8.0, np.nan])
    np.testing.assert_array_equal(gaps[0, 1, :2], [7.0, np.nan])


def test_describe_times_names_drops_and_gaps():
    _, t = _times(40, [3, 20, 21, 22, 23])
    text = describe_times(t, DT, "ome")
    assert "35 recorded frames on a grid of 40 x 15 s" in text
    assert "5 dropped frames, 1 gap (4 frames at 5.0-6.0 min)" in text


def test_settle_margins_widen_gaps_only():
    from waves.analyse.segments import settle_margins

    valid = np.ones(60, dtype=bool)
    valid[10] = False  # an excluded single frame: not widened
    valid[20:28] = False  # an 8-frame gap: widened by 8 (shorter than the period)
    valid[45:48] = False  # a 3-frame gap: widened by 3
    out = settle_margins(valid, period_frames=16.0, min_run=3)
    # exact
    assert np.flatnonzero(~out).tolist() == [10] + list(range(12, 36)) + list(range(42, 51))
    valid[20:40] = False  # a 20-frame gap: widened by one period (16)
    out = settle_margins(valid, period_frames=16.0, min_run=3)
    assert (~out[4:56]).all() and out[3] and out[56]  # exact: 20..40 widened by 16 each side


def test_combining_stretches_counts_cycles():
    from waves.analyse.segments import combine_stretches, measure_stretches

    nan = np.nan
    w = 2 * np.pi / 8.0
    per = np.array([[10.0, nan, nan], [20.0, nan, nan]])
    om = np.array([[2 * np.pi / 10, w, w], [2 * np.pi / 20, w, w]])
    sp = np.array([[1.0, 2.0, 2.0], [3.0, 2.0, 2.0]])
    d = np.array([[0.1, 0.0, 0.0], [0.3, 0.0, 0.0]])
    p, s, dd, c, o = combine_stretches(per, sp, d, sp, om, [50, 40])
    # exact: 5 + 2 whole cycles in 90 frames; speeds weighted by length
    assert p[0] == pytest.approx(90 / 7) and s[0] == pytest.approx((50 * 1 + 40 * 3) / 90)
    assert dd[0] == pytest.approx(np.arctan2(50 * np.sin(0.1) + 40 * np.sin(0.3), 50 * np.cos(0.1) + 40 * np.cos(0.3)))
    # no stretch with two whole cycles: 2 pi / omega, if the stretches span two periods
    assert p[1] == pytest.approx(8.0)
    p2, *_ = combine_stretches(per[:, 1:], sp[:, 1:], d[:, 1:], sp[:, 1:], om[:, 1:], [7, 7])
    assert np.isnan(p2).all()  # 14 frames < 2 x 8
    # single bad frames do not split the cycle count; a 3-frame run does
    valid = np.ones(40, dtype=bool)
    valid[[5, 12, 13]] = False
    valid[25:28] = False
    assert measure_stretches(valid) == [(0, 25), (28, 40)]
