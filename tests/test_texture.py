"""waves.preprocess.texture: tile shifts against an exactly shifted texture, the
texture-motion estimate against the stream speed the generator was given, no
correction where nothing streams, the wave left by the moving-background removal
against the same field rendered without texture, and the plaquette rule."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from streaming_fields import DT, NT, PERIOD, PX, SPEED, streaming_recording

from waves import preprocess
from waves.preprocess import texture as tx
from waves.render import DarkfieldStyle, Degradations
from waves.synthetic import SpiralSource, synthetic_movie, synthetic_recording

FACTOR, SIGMA = 2, 2.5  # the analysis grid of these fields: 2x binning, wavelength / 12 smoothing


def _cleaned(data):
    """What the pipeline's cleaning leaves: binned, temporal mean removed, smoothed."""
    b = preprocess.bin_frames(np.asarray(data), FACTOR)
    return preprocess.smooth_space(b - b.mean(axis=0), sigma_px=SIGMA)


def _reader(movie):
    return lambda t0, t1: movie[t0:t1]


def _truth_velocity(rec):
    """Velocity (analysis px per frame) of the cells at every analysis pixel: the
    generator's displacement law over one frame (synthetic truth)."""
    off = rec.truth.stream_offset_px(DT / 60.0)  # where the texture was one frame earlier
    v = -off[:, :: FACTOR, :: FACTOR] / FACTOR
    return v[:, : rec.data.shape[1] // FACTOR, : rec.data.shape[2] // FACTOR]


@pytest.mark.parametrize("shift", [(0.3, -0.7), (1.6, 2.2), (-3.4, 0.1)])
def test_tile_shifts_recover_an_exact_subpixel_shift(shift):
    rng = np.random.default_rng(3)
    base = ndimage.gaussian_filter(rng.standard_normal((128, 128)), 2.5, mode="wrap")
    # exact sub-pixel shift of a periodic field (Fourier shift theorem): the truth
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(base), shift)).real
    sh, coef, rows, cols = tx.tile_shifts(base, moved, tile_px=16, search_px=6)
    err = sh - np.array(shift)
    # measured on this texture: mean error <= 0.04 px, 95th percentile of a tile <= 0.27 px
    assert np.abs(err.reshape(-1, 2).mean(axis=0)).max() < 0.06
    assert np.percentile(np.abs(err), 95) < 0.4
    assert coef.min() > 0.9  # the same texture: normalised correlation near 1
    assert rows.size == sh.shape[0] and cols.size == sh.shape[1]


def test_tile_shifts_refuse_frames_too_small():
    with pytest.raises(tx.WavesError):
        tx.tile_shifts(np.zeros((10, 10)), np.zeros((10, 10)), tile_px=16, search_px=4)


@pytest.mark.parametrize("speed", [5.0, 15.0])
def test_uniform_cell_motion_is_measured_at_the_stream_speed(speed):
    # stream centre far outside the field: the cells translate at `speed` everywhere
    rec = streaming_recording("spiral", speed, 4, strip=False, mounds=0, center_frac=(-20.0, -20.0))
    m = _cleaned(rec.data)
    mo = tx.estimate_cell_motion(_reader(m), NT, m.shape[1:], smoothing_px=SIGMA, max_lag_frames=NT // 3)
    got = mo.speed_px_per_frame * FACTOR * PX / (DT / 60.0)
    truth = float(np.median(np.hypot(*_truth_velocity(rec)))) * FACTOR * PX / (DT / 60.0)
    assert truth == pytest.approx(speed, rel=0.01)  # synthetic truth: far from its centre the stream has `speed`
    # achieved -0.4 % / +0.2 %; 3 %: the sub-pixel fit's bias over a 2.5 px shift
    assert got == pytest.approx(truth, rel=0.03)
    assert mo.valid_fraction > 0.9


@pytest.mark.parametrize("speed", [5.0, 15.0])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_converging_cell_motion_is_measured_near_the_stream_speed(speed, seed):
    rec = streaming_recording("spiral", speed, seed)
    m = _cleaned(rec.data)
    mo = tx.estimate_cell_motion(_reader(m), NT, m.shape[1:], smoothing_px=SIGMA, max_lag_frames=NT // 3)
    got = mo.speed_px_per_frame * FACTOR * PX / (DT / 60.0)
    # synthetic truth: the generator's stream speed (its median over the field is within
    # 2 % of it: the inflow slows only within ~100 um of the centre).  Converging texture is
    # compressed across the flow within a tile (achieved -12 % .. -2 % over these fields);
    # 15 %: a tenth of the speed either way changes the background's warp by < 0.3 px
    assert got == pytest.approx(speed, rel=0.15)
    assert mo.valid_fraction >= tx.MIN_VALID_FRACTION


def test_static_texture_is_not_corrected():
    deg = Degradations(texture_contrast=0.4, full_well_e=8000, read_noise_counts=0.5)
    rec = synthetic_recording((NT, 96, 96), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                              sources=[SpiralSource(480.0, 480.0, PERIOD)], degradations=deg, seed=1,
                              background=0.3)
    m = _cleaned(rec.data)
    before = m.copy()
    block, note = tx.correct_streaming(_reader(m), lambda t0, b: m.__setitem__(slice(t0, t0 + len(b)), b),
                                       m.shape, smoothing_px=SIGMA, pixel_size_um=FACTOR * PX,
                                       frame_interval_s=DT, period_band_min=(2.0, 20.0))
    # synthetic truth: nothing streams (the cleaning's mean removal took the static
    # texture out; what the tiles see are the waves, which do not move steadily)
    assert block["corrected"] is False and note is None
    assert block["cell_motion_um_per_min"] is None or block["cell_motion_um_per_min"] < 0.5
    np.testing.assert_array_equal(m, before)


@pytest.mark.parametrize("dt_s", [5.0, 20.0])
def test_waves_without_texture_are_not_taken_for_streaming_cells(dt_s):
    # an untextured field (additive bands, noise): at short frame intervals the tiles follow
    # the waves steadily; they run at 100 um/min, far faster than cells crawl
    m0 = synthetic_movie((NT, 96, 96), pixel_size_um=PX, frame_interval_s=dt_s, speed_um_per_min=SPEED,
                         sources=[SpiralSource(480.0, 480.0, PERIOD)], style=DarkfieldStyle(texture=0.0, noise=0.01),
                         seed=2)
    m = _cleaned(m0.data)
    before = m.copy()
    block, note = tx.correct_streaming(_reader(m), lambda t0, b: m.__setitem__(slice(t0, t0 + len(b)), b),
                                       m.shape, smoothing_px=SIGMA, pixel_size_um=FACTOR * PX,
                                       frame_interval_s=dt_s, period_band_min=(2.0, 20.0))
    assert block["corrected"] is False and note is None  # synthetic truth: no cells at all
    np.testing.assert_array_equal(m, before)


@pytest.mark.parametrize("speed", [5.0, 15.0])
def test_moving_background_removal_leaves_the_wave(speed):
    """The corrected movie against the same wave field rendered without texture
    (same sources, modulation 4 %): per-pixel correlation of the band-passed signals."""
    rec = streaming_recording("spiral", speed, 5, mounds=0)
    bare = synthetic_recording(
        (NT, 128, 128), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
        sources=[SpiralSource(rec.truth.sources[0].x_um, rec.truth.sources[0].y_um, PERIOD)],
        degradations=Degradations(texture_modulation=0.04, band_contrast=0.0), dtype="uint16",
        seed=5, background=0.3)
    wave = _cleaned(bare.data.astype(np.float32))
    m = _cleaned(rec.data)

    def corr(x):
        band = dict(frame_interval_s=DT, period_min_range=(3.0, 12.0))
        a = preprocess.bandpass_time(x, **band)[30:-30]
        b = preprocess.bandpass_time(wave, **band)[30:-30]
        return (a * b).sum(axis=0) / np.sqrt((a * a).sum(axis=0) * (b * b).sum(axis=0) + 1e-30)

    before = corr(m)
    left_out = tx.remove_moving_background(
        _reader(m), lambda t0, b: m.__setitem__(slice(t0, t0 + len(b)), b), NT, m.shape[1:],
        _truth_velocity(rec).astype(np.float32), sigma_frames=0.19 * 20.0 / (DT / 60.0), rim_px=3)
    after = corr(m)
    kept = ~left_out & rec.truth.cell_mask[::FACTOR, ::FACTOR]
    # achieved after: median 0.997 / 0.995, 10th percentile 0.992 / 0.991 (5 / 15 um/min)
    assert np.median(after[kept]) > 0.98 and np.percentile(after[kept], 10) > 0.95
    if speed >= 15.0:  # at 5 um/min most grain fluctuation is slower than this band (before: 0.997)
        assert np.median(before[kept]) < 0.9  # achieved 0.86, 10th percentile 0.73
    assert (m[:, left_out] == 0).all()  # left-out pixels carry no signal


def test_plaquettes_inside_needs_all_four_corners():
    mask = np.ones((5, 6), dtype=bool)
    mask[2, 3] = False
    got = tx.plaquettes_inside(mask)
    expected = np.zeros((5, 6), dtype=bool)
    expected[:-1, :-1] = True
    expected[1:3, 2:4] = False  # the four plaquettes that have (2, 3) as a corner
    np.testing.assert_array_equal(got, expected)
