"""Degraded recordings, sample side: stage drift recovered by scikit-image's
phase_cross_correlation, borders that continue the texture, dropped frames whose
content matches their true times, streaming texture displacement against the stated
speed, the dish edge, cleared strip, mounds and dust against their masks.  Every
truth is the generated field or the stated law, recomputed here."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage
from skimage.feature import match_template
from skimage.filters import window
from skimage.registration import phase_cross_correlation

from waves.render import Degradations
from waves.synthetic import PlanarSource, TargetSource, synthetic_recording

PX, DT, SPEED = 10.0, 15.0, 300.0


def _xcorr_shift(reference, moving):
    """scikit-image's upsampled cross-correlation (normalization=None) of Hann-windowed,
    mean-free images: the window removes the wrap-around edge bias and plain
    correlation does not whiten the noise (phase normalisation measured 0.15-0.2 px
    off on these frames, plain 0.03 px): common practice, no source."""
    w = window("hann", reference.shape)
    a = np.asarray(reference, dtype=np.float64)
    b = np.asarray(moving, dtype=np.float64)
    shift, _, _ = phase_cross_correlation((a - a.mean()) * w, (b - b.mean()) * w,
                                          upsample_factor=100, normalization=None)
    return shift


def _template_shift(a_frame, b_frame, r0, c0, size, search=6):
    """Motion of the patch a_frame[r0:r0+size, c0:c0+size] into b_frame: scikit-image's
    normalised cross-correlation (match_template) over +-search px and a parabola
    through the peak and its neighbours on each axis (common practice, no source).
    No window, so no pull toward zero shift."""
    tpl = a_frame[r0 : r0 + size, c0 : c0 + size].astype(np.float64)
    reg = b_frame[r0 - search : r0 + size + search, c0 - search : c0 + size + search].astype(np.float64)
    cc = match_template(reg, tpl)
    i, j = np.unravel_index(np.argmax(cc), cc.shape)

    def vertex(m, z, p):
        return 0.5 * (m - p) / (m - 2 * z + p)

    return np.array([i + vertex(cc[i - 1, j], cc[i, j], cc[i + 1, j]) - search,
                     j + vertex(cc[i, j - 1], cc[i, j], cc[i, j + 1]) - search])


def _rec(shape, deg, *, sources=None, seed=0, **kw):
    sources = sources or [TargetSource(0.5 * shape[2] * PX, 0.5 * shape[1] * PX, 4.0)]
    return synthetic_recording(shape, pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                               sources=sources, degradations=deg, seed=seed, **kw)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_drift_is_recovered_by_phase_cross_correlation(seed):
    deg = Degradations(texture_contrast=0.5, drift_px=3.0, drift_jump_px=1.5, full_well_e=4000,
                       read_noise_counts=1.0)
    rec = _rec((60, 96, 96), deg, seed=seed, background=0.3)
    truth = rec.truth.drift_px
    assert np.abs(truth).max() > 2.5 and rec.truth.drift_jump_frames
    j = rec.truth.drift_jump_frames[0]
    assert np.hypot(*(truth[j] - truth[j - 1])) > 1.3  # the 1.5 px jump, plus a little smooth drift
    errs = []
    for k in range(1, rec.data.shape[0], 3):
        shift = _xcorr_shift(rec.data[0], rec.data[k])
        # skimage returns the shift that registers the moving frame onto the reference: -drift
        errs.append(np.abs(shift + truth[k]).max())
    # the target: within 0.1 px (achieved max 0.030, 0.030, 0.031 px over the three seeds)
    assert max(errs) < 0.1


def test_drifted_borders_continue_the_texture():
    """Rendered on a larger field and cropped: the rows a shift brings in carry texture
    like the interior, never a constant fill (the std of the edge row stays close)."""
    deg = Degradations(texture_contrast=0.5, drift_px=4.0)
    rec = _rec((30, 64, 64), deg, seed=5, background=0.3)
    k = int(np.argmax(np.abs(rec.truth.drift_px).sum(axis=1)))
    frame = rec.data[k].astype(np.float64)
    interior = frame[8:-8, 8:-8].std()
    for edge in (frame[0], frame[-1], frame[:, 0], frame[:, -1]):
        assert edge.std() > 0.5 * interior  # a constant or nearest fill gives ~0 along its row/col
        assert np.mean(np.diff(edge) == 0) < 0.2


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_dropped_frames_and_gaps_have_their_true_times(seed):
    nt, frac, gap = 100, 0.05, 8
    deg = Degradations(drop_fraction=frac, gap_frames=gap)
    period = 400.0 / SPEED  # wavelength 400 um: exactly the 40 columns
    rec = _rec((nt, 20, 40), deg, seed=seed, sources=[PlanarSource(0.0, period)])
    n_missing = round(frac * nt) + gap
    assert rec.data.shape[0] == nt - n_missing == rec.times_s.size
    step = np.diff(rec.times_s) / DT
    assert np.allclose(step, np.rint(step)) and step.min() == 1
    assert int(step.max()) == gap + 1  # the gap (random drops never touch it: they are kept apart)
    # gaps found independently from the times: runs of >= gap missing frames
    runs = [(rec.times_s[i] / 60 + DT / 60, rec.times_s[i + 1] / 60)
            for i in np.flatnonzero(step >= gap + 1)]
    np.testing.assert_allclose(np.array(rec.truth.gaps), np.array(runs))
    missing = sorted(set(range(nt)) - set(np.rint(rec.times_s / DT).astype(int)))
    assert missing == list(rec.truth.dropped_frames)
    # content: the plane wave's phase in each recorded frame is omega * t of its true time
    # (phase of the spatial Fourier component at the wave's wavenumber: exact for a cosine band)
    x = np.arange(40) * PX
    k_um = 2 * math.pi / (SPEED * period)
    prof = rec.data.astype(np.float64).mean(axis=1)
    measured = np.angle((prof * np.exp(1j * k_um * x)[None, :]).sum(axis=1))
    expected = 2 * math.pi * (rec.times_s / 60.0) / period
    err = np.angle(np.exp(1j * (measured - expected)))
    # achieved 2e-14 rad (the rounding of a sampled cosine is symmetric); one frame is 0.39 rad
    assert np.abs(err).max() < 1e-3


@pytest.mark.parametrize("speed", [5.0, 10.0, 15.0])
def test_streaming_texture_moves_toward_the_centre_at_the_stated_speed(speed):
    deg = Degradations(texture_contrast=0.5, stream_speed_um_per_min=speed, stream_core_um=50.0,
                       read_noise_counts=0.5)
    n = 160
    rec = _rec((41, n, n), deg, seed=int(speed), background=0.3, dtype="uint16")
    lag = int(round(120.0 / speed))  # frames: 3 px of motion, well inside a 32 px patch
    c = (n - 1) / 2
    disp = speed * lag * DT / 60 / PX  # stated: far from the centre the cells move at `speed`
    found = []
    for dy, dx in ((0, -55), (0, 55), (-55, 0), (55, 0)):
        r0, c0 = int(round(c + dy)) - 16, int(round(c + dx)) - 16
        shift = _template_shift(rec.data[0], rec.data[lag], r0, c0, 32)
        inward = -np.array([dy, dx]) / 55.0
        found.append(float(shift @ inward))
        assert abs(float(shift @ np.array([inward[1], -inward[0]]))) < 0.2  # no sideways motion (achieved < 0.15)
    # achieved -4.3 % .. +0.2 % per patch over 3 speeds (the parabola's sub-pixel bias and
    # the shear of converging texture); the waves (4 % modulation) do not move with it
    np.testing.assert_allclose(found, disp, rtol=0.08)
    assert np.mean(found) == pytest.approx(disp, rel=0.04)
    # the truth's displacement field says the same at the patch centres
    off = rec.truth.stream_offset_px(lag * DT / 60)
    assert off[1, int(c), int(c) + 55] == pytest.approx(disp, rel=1e-3)


def test_cleared_strip_has_no_texture_and_no_signal():
    n = 120
    deg = Degradations(texture_contrast=0.4, stream_speed_um_per_min=8.0, strip_width_um=120.0,
                       strip_angle_deg=0.0, read_noise_counts=1.0)
    rec = _rec((40, n, n), deg, seed=2, background=0.3, dtype="uint16")
    mask = rec.truth.cell_mask
    c = (n - 1) / 2
    # the strip: 12 px wide from the stream centre to the right edge, no cells (stated geometry)
    strip = ~mask
    assert strip[int(c), int(c) + 10 :].all() and mask[int(c) + 10, : int(c) - 10].all()
    assert strip.sum() == pytest.approx(12 * (n - c), rel=0.03)  # achieved -0.8 %
    inner = ndimage.binary_erosion(strip, iterations=2)
    d = rec.data.astype(np.float64)
    # no texture, no signal inside: level 0.1 x background, only read noise (sd 1 count;
    # the largest of ~300 pixel sds over 40 frames measured 1.33)
    assert np.median(d[:, inner]) == pytest.approx(0.1 * 0.3 * 65535, rel=0.001)
    assert d[:, inner].std(axis=0).max() < 1.6
    assert d[:, mask].std(axis=0).mean() > 50  # the cells beside it carry texture motion and waves


@pytest.mark.parametrize("seed", [0, 1])
def test_mounds_grow_by_their_stated_gain(seed):
    n = 100
    deg = Degradations(texture_contrast=0.4, mound_count=3, mound_radius_um=60.0, mound_gain=1.0,
                       read_noise_counts=1.0)
    rec = _rec((41, n, n), deg, seed=seed, background=0.15, dtype="uint16")  # bright grains x2 do not clip
    assert rec.truth.saturated_fraction == 0.0
    d = rec.data.astype(np.float64)
    yy, xx = np.mgrid[0:n, 0:n]
    centres = rec.truth.mound_centres_px
    assert centres.shape == (3, 2)
    prof = sum(np.exp(-0.5 * ((yy - r) ** 2 + (xx - cc) ** 2) / 6.0 ** 2) for r, cc in centres)
    for r, cc in centres:
        disk = (yy - r) ** 2 + (xx - cc) ** 2 < 9
        # stated law: brightness x (1 + gain * t / t_last * profile); the texture under the
        # disk is the same grains in every frame and frames 16 and 32 are whole periods
        # (4 min = 16 frames) after frame 0, so the waves are the same too
        w = d[0, disk]
        for k in (16, 32):
            expected = (w * (1 + k / 40 * prof[disk])).sum() / w.sum()
            assert d[k, disk].sum() / w.sum() == pytest.approx(expected, rel=1e-4)  # achieved 1.3e-5


@pytest.mark.parametrize("edge", ["circle", "line"])
def test_dish_edge_leaves_no_signal_outside_the_cells(edge):
    n = 100
    deg = Degradations(texture_contrast=0.4, dish_edge=edge, dish_radius_frac=0.4, dish_line_frac=0.5,
                       dish_line_angle_deg=0.0, rim_gain=1.5, dust_count=6, read_noise_counts=0.7)
    rec = _rec((40, n, n), deg, seed=3, background=0.3, dtype="uint16")
    mask = rec.truth.cell_mask
    yy, xx = np.mgrid[0:n, 0:n]
    if edge == "circle":  # geometric truth: a disk of radius 40 px about the centre
        assert mask.sum() == pytest.approx(math.pi * 40 ** 2, rel=0.01)
        assert mask[50, 50] and not mask[0, 0]
    else:  # the left half of the field (normal pointing to +x) has cells
        assert mask[:, :49].all() and not mask[:, 51:].any()
    d = rec.data.astype(np.float64)
    far = ~ndimage.binary_dilation(mask, iterations=10) & ~ndimage.binary_dilation(rec.truth.speck_mask, iterations=3)
    inside = ndimage.binary_erosion(mask, iterations=3)
    # temporal fluctuation of the region means: the waves modulate the cells by ~4 %,
    # outside only noise averages down (read sd 0.7 / sqrt(pixels))
    out_mean = d[:, far].mean(axis=1)
    in_mean = d[:, inside].mean(axis=1)
    assert out_mean.std() < 0.04  # achieved 0.016 (circle), 0.011 (line) counts
    assert in_mean.std() > 1000 * out_mean.std()  # achieved 246 and 211 counts inside
    assert np.median(d[:, far]) == pytest.approx(0.1 * 0.3 * 65535, rel=0.01)  # empty_level x background
    # the rim: brighter than the cells' mean just outside the edge
    ring = ndimage.binary_dilation(mask, iterations=4) & ~mask
    assert d[0, ring].max() > 1.2 * 0.3 * 65535
    # dust: camera-fixed specks, brighter than their surroundings in every frame
    specks = rec.truth.speck_mask
    assert 1 <= ndimage.label(specks)[1] <= 6
    ring_s = ndimage.binary_dilation(specks, iterations=3) & ~specks
    assert (d[:, specks].max(axis=1) > d[:, ring_s].mean(axis=1) + 0.3 * 65535).all()
