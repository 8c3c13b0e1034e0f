"""Degraded recordings, camera side: the clean rendering against the stated level
formula, lamp fade and flicker against their gain laws, illumination fields
against their stated shapes, shot + read noise (variance linear in the mean),
bit depth and clipping, texture modulation, determinism, user errors and the
OME-TIFF writer's per-plane times.  Every truth is the generated field or the
stated law, recomputed here."""

from __future__ import annotations

import math

import numpy as np
import pytest

from waves.errors import WavesError
from waves.render import Degradations
from waves.synthetic import (
    PlanarSource,
    Recording,
    SpiralSource,
    excitation,
    planar_wave,
    synthetic_recording,
    write_recording,
)

PX, DT, SPEED = 10.0, 15.0, 300.0


def _planar(shape, deg, *, period_min=200.0 / SPEED, direction_deg=0.0, seed=0, **kw) -> Recording:
    """Plane wave of wavelength 200 um = 20 px: an integer number of wavelengths
    across a field of 20 n columns, so the frame mean of e is the same in every frame."""
    return synthetic_recording(
        shape, pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
        sources=[PlanarSource(direction_deg, period_min)], degradations=deg, seed=seed, **kw,
    )


def test_clean_recording_follows_the_level_formula():
    rec = _planar((12, 40, 60), Degradations())
    phase, _ = planar_wave((12, 40, 60), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                           period_min=200.0 / SPEED, direction_deg=0.0)
    e = excitation(phase).astype(np.float64)
    # stated model: counts = round(255 * (background + band * (e - 0.5))), band 0.25, background 0.45
    expected = np.rint(255.0 * (0.45 + 0.25 * (e - 0.5)))
    diff = np.abs(rec.data.astype(np.float64) - expected)
    assert diff.max() <= 1.0  # float32 rounding at .5 boundaries (achieved: max 1 count, rare)
    assert np.mean(diff > 0) < 0.01
    assert rec.times_s.tolist() == [i * DT for i in range(12)]
    assert rec.truth.cell_mask.all() and not rec.truth.speck_mask.any()
    np.testing.assert_array_equal(rec.truth.gain_t, np.ones(12))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_same_seed_same_movie_other_seed_other_movie(seed):
    deg = Degradations(texture_contrast=0.4, full_well_e=3000, read_noise_counts=1.0, drift_px=2.0,
                       flicker_count=2, drop_fraction=0.1)
    a = _planar((20, 40, 40), deg, seed=seed)
    b = _planar((20, 40, 40), deg, seed=seed)
    c = _planar((20, 40, 40), deg, seed=seed + 10)
    np.testing.assert_array_equal(a.data, b.data)
    np.testing.assert_array_equal(a.truth.drift_px, b.truth.drift_px)
    assert a.truth.dropped_frames == b.truth.dropped_frames
    assert not np.array_equal(a.truth.drift_px, c.truth.drift_px)


@pytest.mark.parametrize("law, texture, seed", [("linear", 0.0, 0), ("exponential", 0.5, 1),
                                                 ("linear", 0.5, 2), ("exponential", 0.0, 3)])
def test_lamp_fade_and_flicker_follow_the_gain_law(law, texture, seed):
    nt = 80
    deg = Degradations(texture_contrast=texture, lamp_fade=0.4, lamp_fade_law=law, flicker_count=4,
                       flicker_gain=0.1, read_noise_counts=0.5)
    rec = _planar((nt, 40, 60), deg, seed=seed, dtype="uint16", background=0.3)
    assert rec.truth.saturated_fraction == 0.0
    means = rec.data.reshape(rec.data.shape[0], -1).mean(axis=1)
    u = np.arange(nt) / (nt - 1)
    # the stated laws (from the issue's -40 % fade): 1 - 0.4 u, or 0.6 ** u
    lamp = 1.0 - 0.4 * u if law == "linear" else 0.6 ** u
    ratio = (means / means[0]) / lamp
    # the band's frame mean is the same in every frame (integer wavelengths); the
    # texture's is not: the wave crosses different grains (measured: 0.05-0.17 %
    # peak to peak over 3 seeds); achieved max error 3e-6 (band) and 7e-4 (texture)
    tol = 2e-5 if texture == 0.0 else 2.5e-3
    # flicker frames found independently: more than 5 % off the lamp law
    found = np.flatnonzero(np.abs(ratio - 1.0) > 0.05)
    assert found.tolist() == list(rec.truth.flicker_frames)
    assert len(found) == 4
    np.testing.assert_allclose(np.abs(ratio[found] - 1.0), 0.1, atol=tol)
    steady = np.setdiff1d(np.arange(nt), found)
    np.testing.assert_allclose(ratio[steady], 1.0, atol=tol)
    np.testing.assert_allclose(rec.truth.lamp_t, lamp, rtol=1e-12)
    np.testing.assert_allclose(rec.truth.gain_t[found] / lamp[found], 1.0 + np.sign(ratio[found] - 1) * 0.1)


def _flat(shape_yx, deg, **kw) -> Recording:
    """No band, no texture: the recorded frame is background x illumination."""
    return _planar((3,) + shape_yx, deg, dtype="uint16", background=0.4, **kw)


@pytest.mark.parametrize("direction_deg", [0.0, 90.0, 45.0, 180.0])
def test_illumination_ramp_spans_low_to_high_in_its_direction(direction_deg):
    ny, nx = 50, 70
    deg = Degradations(band_contrast=0.0, ramp=(0.3, 2.0), ramp_direction_deg=direction_deg)
    rec = _flat((ny, nx), deg)
    level = rec.data[0].astype(np.float64) / (65535 * 0.4)
    y, x = np.mgrid[0:ny, 0:nx].astype(np.float64)
    a = math.radians(direction_deg)
    s = x * math.cos(a) - y * math.sin(a)  # distance along the direction, +y on screen is up
    expected = 0.3 + 1.7 * (s - s.min()) / (s.max() - s.min())  # the stated ramp 0.3 -> 2.0
    np.testing.assert_allclose(level, expected, atol=1e-4)  # 16-bit rounding (achieved 2e-5)


def test_vignetting_and_spot_have_their_stated_shape():
    ny, nx = 41, 61
    deg = Degradations(band_contrast=0.0, vignetting=0.3, spot_gain=0.5, spot_center_frac=(0.25, 0.75),
                       spot_sd_frac=0.2)
    level = _flat((ny, nx), deg).data[0].astype(np.float64) / (65535 * 0.4)
    cy, cx = (ny - 1) / 2, (nx - 1) / 2
    y, x = np.mgrid[0:ny, 0:nx].astype(np.float64)
    vig = 1.0 - 0.3 * ((y - cy) ** 2 + (x - cx) ** 2) / (cy ** 2 + cx ** 2)  # stated radial law
    sd = 0.2 * nx
    spot = 1.0 + 0.5 * np.exp(-0.5 * ((y - 0.25 * (ny - 1)) ** 2 + (x - 0.75 * (nx - 1)) ** 2) / sd ** 2)
    np.testing.assert_allclose(level, vig * spot, atol=1e-4)
    assert abs(level[0, 0] / level[int(cy), int(cx)] - 0.7 / (1 + 0.5 * np.exp(-0.5 * ((cy - 10) ** 2 + (cx - 45) ** 2) / sd ** 2))) < 0.02


@pytest.mark.parametrize("dtype, bits, full_well, read, seed", [
    ("uint8", 8, 400.0, 1.5, 0),
    ("uint16", 12, 5000.0, 3.0, 1),
    ("uint16", 12, 20000.0, 6.0, 2),
])
def test_noise_variance_is_linear_in_the_mean(dtype, bits, full_well, read, seed):
    """Shot + read noise: var = mean * full_scale / full_well + read^2 + 1/12
    (Poisson variance = mean, Gaussian read noise, uniform rounding: common practice, no source)."""
    nt, ny, nx = 120, 16, 40
    deg = Degradations(band_contrast=0.0, ramp=(0.2, 1.6), full_well_e=full_well,
                       read_noise_counts=read, bits=bits)
    rec = _planar((nt, ny, nx), deg, dtype=dtype, background=0.5, seed=seed)
    fs = rec.truth.full_scale
    assert fs == (1 << bits) - 1
    d = rec.data.astype(np.float64)
    mean = d.mean(axis=0).ravel()
    var = d.var(axis=0, ddof=1).ravel()
    ok = mean < 0.95 * fs
    slope = np.polyfit(mean[ok], var[ok] - read ** 2 - 1 / 12, 1)[0]
    # sampling error of a variance from 120 frames is ~13 % per pixel, ~0.6 % over 600 pixels
    assert slope == pytest.approx(fs / full_well, rel=0.04)  # achieved 0.3 %, 0.8 %, 1.2 %
    # read noise alone: a flat variance read^2 + 1/12 at every level
    rd = _planar((nt, ny, nx), Degradations(band_contrast=0.0, ramp=(0.2, 1.6), read_noise_counts=read,
                                            bits=bits), dtype=dtype, background=0.5, seed=seed).data
    v = rd.astype(np.float64).var(axis=0, ddof=1)
    assert v.mean() == pytest.approx(read ** 2 + 1 / 12, rel=0.03)  # achieved 0.6 %, 0.2 %, 1.1 %
    assert abs(np.polyfit(rd.mean(axis=0).ravel(), v.ravel(), 1)[0]) < 2e-3 * read ** 2


def test_bit_depth_clips_at_full_scale():
    # background 0.6 x ramp up to 2.0: the bright side is over full scale
    deg = Degradations(band_contrast=0.0, ramp=(0.3, 2.0), bits=12, read_noise_counts=2.0)
    rec = _planar((4, 20, 60), deg, dtype="uint16", background=0.6)
    assert rec.data.dtype == np.uint16 and int(rec.data.max()) == 4095
    over = rec.truth.illumination_yx * 0.6 > 1.0 + 6 * 2.0 / 4095
    assert over.any() and (rec.data[:, over] == 4095).all()
    assert rec.truth.saturated_fraction == pytest.approx(np.mean(rec.data == 4095))
    with pytest.raises(WavesError, match="uint16"):
        Degradations(bits=12).full_scale("uint8")


@pytest.mark.parametrize("seed", [0, 3])
def test_wave_signal_is_a_modulation_of_the_texture(seed):
    """With texture the band is off and every pixel's signal is its own scattering
    x (1 + m e): the temporal peak-to-peak over the mean is m / (1 + m / 2)."""
    deg = Degradations(texture_contrast=0.5)
    rec = _planar((20, 30, 40), deg, dtype="uint16", seed=seed, background=0.3)  # 20 frames = one period
    d = rec.data.astype(np.float64)
    mean = d.mean(axis=0)
    rel = (d.max(axis=0) - d.min(axis=0)) / mean
    m = 0.04  # the default modulation with texture (issue: 3-5 %)
    # e spans [0, 1] over a period sampled in 20 frames: peak-to-peak of 1 + m e over its mean
    expected = m / (1 + m / 2)
    bright = mean > 0.2 * 65535 * 0.3  # away from the darkest continuum, where rounding matters
    # achieved -1.3 % for both seeds: 20 frames per period miss the exact crest (cos(pi/20))
    assert np.median(rel[bright]) == pytest.approx(expected, rel=0.03)
    # texture: relative sd of the temporal mean near texture_contrast (achieved 0.46, 0.50)
    assert mean.std() / mean.mean() == pytest.approx(0.5, rel=0.15)


def test_bad_settings_raise_waves_errors():
    for bad in (dict(lamp_fade=1.5), dict(ramp=(0.0, 2.0)), dict(bits=10), dict(lamp_fade_law="cubic"),
                dict(dish_edge="square"), dict(drop_fraction=-0.1), dict(flicker_count=-1),
                dict(texture_grain_px="big")):
        with pytest.raises(WavesError):
            Degradations(**bad)
    with pytest.raises(WavesError, match="degradations"):
        synthetic_recording((3, 8, 8), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                            sources=[PlanarSource(0.0, 1.0)], degradations={"drift_px": 1})


def test_write_recording_stores_true_per_plane_times(tmp_path):
    import tifffile  # the reference reader

    deg = Degradations(drop_fraction=0.1, gap_frames=4, texture_contrast=0.3)
    rec = synthetic_recording((40, 32, 48), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                              sources=[SpiralSource(240.0, 160.0, 3.0)], degradations=deg, seed=4)
    path = write_recording(rec, tmp_path / "rec.ome.tif")
    with tifffile.TiffFile(path) as tif:
        np.testing.assert_array_equal(tif.asarray(), rec.data)
        xml = tif.ome_metadata
    import xml.etree.ElementTree as ET

    root = ET.fromstring(xml)
    planes = [el.attrib for el in root.iter() if el.tag.endswith("Plane")]
    assert [int(p["TheT"]) for p in planes] == list(range(rec.data.shape[0]))
    np.testing.assert_allclose([float(p["DeltaT"]) for p in planes], rec.times_s)
    pixels = next(el for el in root.iter() if el.tag.endswith("Pixels"))
    assert float(pixels.attrib["PhysicalSizeX"]) == PX and "TimeIncrement" not in pixels.attrib
    with pytest.raises(WavesError, match="ome"):
        write_recording(rec, tmp_path / "rec.tif")
