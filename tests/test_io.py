"""waves.io against files written by tifffile itself, and our writers against tifffile.

Truths used here: the arrays written (exact), calibrations computed in the
test from the values written, numpy reshape-means, hashlib, json.  Unit
factors are the SI prefixes (common practice, no source); the BT.709 luma
weights are from ITU-R Recommendation BT.709 (from memory: 0.2126, 0.7152,
0.0722).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import pathlib

import numpy as np
import pytest
import tifffile
from hypothesis import given, settings
from hypothesis import strategies as st

from waves import io
from waves.errors import CalibrationError, InputError, WavesError
from waves.units import Calibration, length_to_um, normalise_length_unit, time_to_s

HYP = settings(derandomize=True, database=None, deadline=None, max_examples=60)


def _no_temp_files(folder: pathlib.Path) -> bool:
    return not any(p.name.endswith(".part") for p in folder.iterdir())


# --------------------------------------------------------------------------- ImageJ


@pytest.mark.parametrize(
    "unit, per_unit, expected_um",
    [
        # pixel size 0.65 um expressed in each unit; factors are SI prefixes (common practice, no source)
        ("um", 1 / 0.65, 0.65),
        ("\u00b5m", 1 / 0.65, 0.65),  # micro sign
        ("\u03bcm", 1 / 0.65, 0.65),  # Greek small letter mu
        ("\\u00B5m", 1 / 0.65, 0.65),  # ImageJ's escaped micro sign
        ("micron", 1 / 0.65, 0.65),
        ("nm", 1 / 650.0, 0.65),
        ("mm", 1 / 0.00065, 0.65),
        ("cm", 1 / 0.000065, 0.65),
    ],
)
def test_imagej_pixel_size_units(tiff_factory, rng, unit, per_unit, expected_um):
    data = rng.integers(0, 255, size=(4, 12, 10), dtype=np.uint8)
    ascii_unit = unit if unit.isascii() else "um"
    path = tiff_factory(
        "ij.tif", data, imagej=True, resolution=(per_unit, per_unit),
        metadata={"axes": "TYX", "unit": ascii_unit, "finterval": 2.5},
    )
    if not unit.isascii():
        # tifffile writes ASCII descriptions; other writers store the sign as UTF-8
        with tifffile.TiffFile(path, mode="r+b") as tif:
            tag = tif.pages[0].tags["ImageDescription"]
            tag.overwrite(tag.value.replace("unit=um", f"unit={unit}").encode("utf-8"))
        with tifffile.TiffFile(path) as tif:
            assert tif.imagej_metadata["unit"] == unit
    stack = io.read_stack(path)
    np.testing.assert_array_equal(stack.data, data)
    assert stack.calibration.pixel_size_um == pytest.approx(expected_um, rel=1e-6)
    assert stack.calibration.frame_interval_s == pytest.approx(2.5)
    assert stack.calibration.origin == "imagej"
    assert stack.info.format == "imagej"


@pytest.mark.parametrize(
    "tunit, expected_s",
    # seconds per unit (common practice, no source)
    [(None, 10.0), ("s", 10.0), ("sec", 10.0), ("min", 600.0), ("ms", 0.01), ("h", 36000.0)],
)
def test_imagej_frame_interval_units(tiff_factory, tunit, expected_s):
    metadata = {"axes": "TYX", "unit": "um", "finterval": 10.0}
    if tunit is not None:
        metadata["tunit"] = tunit
    path = tiff_factory("t.tif", np.zeros((3, 8, 8), np.uint16), imagej=True,
                        resolution=(2.0, 2.0), metadata=metadata)
    stack = io.read_stack(path)
    assert stack.calibration.frame_interval_s == pytest.approx(expected_s)
    assert stack.calibration.pixel_size_um == pytest.approx(0.5)


@pytest.mark.parametrize("dtype", ["uint8", "uint16", "float32"])
def test_native_dtypes_are_kept(imagej_stack, rng, dtype):
    data = (rng.random((5, 9, 7)) * 200).astype(dtype)
    path = imagej_stack("d.tif", data, pixel_size_um=1.0, frame_interval_s=1.0)
    stack = io.read_stack(path)
    assert stack.data.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(stack.data, data)
    assert stack.info.dtype == dtype


def test_hyperstack_channel_and_zslice(imagej_stack, rng):
    data = rng.integers(0, 4000, size=(6, 3, 2, 10, 11), dtype=np.uint16)
    path = imagej_stack("h.tif", data, pixel_size_um=0.8, frame_interval_s=30.0, axes="TZCYX")
    stack = io.read_stack(path, channel=1, zslice=2)
    np.testing.assert_array_equal(stack.data, data[:, 2, 1])
    assert stack.info.axes == "TZCYX"
    assert stack.info.shape_tyx == (6, 10, 11)


def test_hyperstack_ambiguous_is_refused_with_axes_and_options(imagej_stack):
    data = np.zeros((4, 3, 2, 8, 8), np.uint8)
    path = imagej_stack("h.tif", data, pixel_size_um=1.0, frame_interval_s=1.0, axes="TZCYX")
    with pytest.raises(InputError) as exc:
        io.read_stack(path)
    msg = str(exc.value)
    assert "TZCYX" in msg and "Z=3" in msg and "C=2" in msg
    assert "channel=0..1" in msg and "zslice=0..2" in msg
    with pytest.raises(InputError, match="zslice"):
        io.inspect_stack(path, channel=0)
    with pytest.raises(InputError, match="out of range"):
        io.read_stack(path, channel=2, zslice=0)


def test_channels_only_hyperstack_selects_channel(imagej_stack, rng):
    data = rng.integers(0, 255, size=(5, 3, 8, 9), dtype=np.uint8)
    path = imagej_stack("tc.tif", data, pixel_size_um=1.0, frame_interval_s=1.0, axes="TCYX")
    np.testing.assert_array_equal(io.read_stack(path, channel=2).data, data[:, 2])
    with pytest.raises(InputError, match="channel=0..2"):
        io.read_stack(path)


def test_stack_labelled_as_slices_reads_as_time_with_warning(imagej_stack, rng):
    # ImageJ labels a plain stack's images as slices (from memory)
    data = rng.integers(0, 255, size=(7, 8, 8), dtype=np.uint8)
    path = imagej_stack("z.tif", data, pixel_size_um=1.0, frame_interval_s=1.0, axes="ZYX")
    stack = io.read_stack(path)
    np.testing.assert_array_equal(stack.data, data)
    assert any("z-slices" in w for w in stack.warnings)


def test_resolution_without_unit_is_uncalibrated(tiff_factory):
    path = tiff_factory("nounit.tif", np.zeros((3, 8, 8), np.uint8), imagej=True,
                        resolution=(2.0, 2.0), metadata={"axes": "TYX", "finterval": 5.0})
    info = io.inspect_stack(path)
    assert info.calibration is None
    assert "no length unit" in info.calibration_problem
    with pytest.raises(CalibrationError, match="--pixel-size"):
        io.read_stack(path)
    stack = io.read_stack(path, pixel_size_um=1.5)
    assert stack.calibration.pixel_size_um == 1.5
    assert stack.calibration.frame_interval_s == 5.0
    assert stack.calibration.origin == "options"
    assert stack.calibration.frame_interval_origin == "imagej"


def test_non_square_pixels(tiff_factory):
    data = np.zeros((3, 8, 8), np.uint8)
    md = {"axes": "TYX", "unit": "um", "finterval": 1.0}
    far = tiff_factory("far.tif", data, imagej=True, resolution=(1 / 0.5, 1 / 0.6), metadata=md)
    with pytest.raises(CalibrationError, match="square"):
        io.read_stack(far)
    # declaring the pixel size makes them square
    assert io.read_stack(far, pixel_size_um=0.5).calibration.pixel_size_um == 0.5
    near = tiff_factory("near.tif", data, imagej=True, resolution=(1 / 0.5, 1 / 0.503), metadata=md)
    stack = io.read_stack(near)
    assert stack.calibration.pixel_size_um == pytest.approx(0.5, rel=1e-6)  # the x size
    assert any("differ slightly" in w for w in stack.warnings)


# --------------------------------------------------------------------------- OME, plain, BigTIFF


def test_ome_physical_size_and_time_increment(tiff_factory, rng):
    data = rng.integers(0, 60000, size=(5, 2, 12, 8), dtype=np.uint16)
    path = tiff_factory(
        "a.ome.tif", data, ome=True,
        metadata={"axes": "TCYX", "PhysicalSizeX": 650.0, "PhysicalSizeXUnit": "nm",
                  "PhysicalSizeY": 650.0, "PhysicalSizeYUnit": "nm",
                  "TimeIncrement": 0.5, "TimeIncrementUnit": "min"},
    )
    stack = io.read_stack(path, channel=1)
    np.testing.assert_array_equal(stack.data, data[:, 1])
    assert stack.info.format == "ome"
    assert stack.calibration.pixel_size_um == pytest.approx(0.65)  # 650 nm
    assert stack.calibration.frame_interval_s == pytest.approx(30.0)  # 0.5 min
    assert stack.calibration.origin == "ome"


def test_ome_plane_delta_t_median(tiff_factory):
    delta = [0.0, 30.0, 61.0, 90.0, 120.0]  # median of differences = 30 s
    path = tiff_factory(
        "dt.ome.tif", np.zeros((5, 8, 8), np.uint8), ome=True,
        metadata={"axes": "TYX", "PhysicalSizeX": 2.0, "PhysicalSizeY": 2.0,
                  "Plane": {"DeltaT": delta, "DeltaTUnit": ["s"] * 5}},
    )
    cal = io.read_stack(path).calibration
    assert cal.frame_interval_s == pytest.approx(float(np.median(np.diff(delta))))
    assert cal.pixel_size_um == pytest.approx(2.0)  # OME default unit is um (OME schema, from memory)


def test_plain_multipage_needs_calibration_options(tiff_factory, rng):
    data = rng.integers(0, 255, size=(6, 10, 12), dtype=np.uint8)
    path = tiff_factory("plain.tif", data)
    with pytest.raises(CalibrationError) as exc:
        io.read_stack(path)
    assert "--pixel-size" in str(exc.value) and "--frame-interval" in str(exc.value)
    info = io.inspect_stack(path)
    assert info.calibration is None and info.format == "tiff"
    stack = io.read_stack(path, pixel_size_um=1.3, frame_interval_s=20)
    np.testing.assert_array_equal(stack.data, data)
    assert stack.calibration.origin == "options"


def test_separately_written_pages(tmp_path, rng):
    data = rng.integers(0, 255, size=(4, 6, 5), dtype=np.uint8)
    with tifffile.TiffWriter(tmp_path / "pages.tif") as tw:
        for frame in data:
            tw.write(frame)
    stack = io.read_stack(tmp_path / "pages.tif", pixel_size_um=1, frame_interval_s=1)
    np.testing.assert_array_equal(stack.data, data)


def test_bigtiff(tiff_factory, rng):
    data = rng.integers(0, 65535, size=(4, 16, 16), dtype=np.uint16)
    path = tiff_factory("big.tif", data, bigtiff=True, photometric="minisblack")
    with tifffile.TiffFile(path) as tif:
        assert tif.is_bigtiff
    stack = io.read_stack(path, pixel_size_um=1, frame_interval_s=1)
    np.testing.assert_array_equal(stack.data, data)
    assert stack.info.bigtiff


@pytest.mark.parametrize("compression", ["zlib", "lzw"])
def test_compressed(imagej_stack, rng, compression):
    data = rng.integers(0, 65535, size=(5, 20, 24), dtype=np.uint16)
    path = imagej_stack("c.tif", data, pixel_size_um=1.0, frame_interval_s=2.0, compression=compression)
    info = io.inspect_stack(path)
    assert info.compression == compression
    assert not info.memory_mapped
    stack = io.read_stack(path, frames=(1, 5, 2))
    assert not isinstance(stack.data, np.memmap)
    np.testing.assert_array_equal(stack.data, data[1:5:2])


def test_compressed_hyperstack_selection(imagej_stack, rng):
    data = rng.integers(0, 255, size=(4, 2, 3, 8, 8), dtype=np.uint8)
    path = imagej_stack("ch.tif", data, pixel_size_um=1.0, frame_interval_s=1.0, axes="TZCYX",
                        compression="zlib")
    np.testing.assert_array_equal(io.read_stack(path, channel=2, zslice=1).data, data[:, 1, 2])


# --------------------------------------------------------------------------- sequences


def test_folder_sequence_in_natural_order(tmp_path, rng):
    folder = tmp_path / "frames"
    folder.mkdir()
    frames = rng.integers(0, 60000, size=(12, 6, 7), dtype=np.uint16)
    for k in range(12):  # frame1 .. frame12: plain sorting would put frame10 after frame1
        tifffile.imwrite(folder / f"frame{k + 1}.tif", frames[k])
    (folder / "notes.txt").write_text("not a frame")
    stack = io.read_stack(folder, pixel_size_um=1, frame_interval_s=1)
    np.testing.assert_array_equal(stack.data, frames)
    assert stack.info.format == "sequence"
    glob_stack = io.read_stack(str(folder / "frame*.tif"), pixel_size_um=1, frame_interval_s=1,
                               frames=(2, 11, 3))
    np.testing.assert_array_equal(glob_stack.data, frames[2:11:3])
    # hash of a sequence = sha256 of the files concatenated in natural order (documented rule)
    h = hashlib.sha256()
    for k in range(12):
        h.update((folder / f"frame{k + 1}.tif").read_bytes())
    assert io.file_sha256(folder) == h.hexdigest()


def test_sequence_takes_pixel_size_from_imagej_frames(tmp_path):
    for k in range(3):
        tifffile.imwrite(tmp_path / f"f{k}.tif", np.full((4, 4), k, np.uint8), imagej=True,
                         resolution=(4.0, 4.0), metadata={"unit": "um"})
    stack = io.read_stack(tmp_path, frame_interval_s=15.0)
    assert stack.calibration.pixel_size_um == pytest.approx(0.25)
    assert stack.calibration.pixel_size_origin == "imagej"


def test_sequence_errors(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(InputError, match="no .tif"):
        io.read_stack(empty, pixel_size_um=1, frame_interval_s=1)
    with pytest.raises(InputError, match="matches no files"):
        io.read_stack(str(tmp_path / "nothing*.tif"), pixel_size_um=1, frame_interval_s=1)
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    tifffile.imwrite(mixed / "a1.tif", np.zeros((4, 4), np.uint8))
    tifffile.imwrite(mixed / "a2.tif", np.zeros((5, 4), np.uint8))
    with pytest.raises(InputError, match="frames differ"):
        io.inspect_stack(mixed)
    multi = tmp_path / "multi"
    multi.mkdir()
    tifffile.imwrite(multi / "a1.tif", np.zeros((3, 5, 6), np.uint8), photometric="minisblack")
    with pytest.raises(InputError, match="single-frame"):
        io.inspect_stack(multi)


# --------------------------------------------------------------------------- conversions


@pytest.mark.parametrize("samples", [3, 4])
def test_rgb_to_bt709_luminance(tiff_factory, rng, samples):
    data = rng.integers(0, 255, size=(3, 6, 5, samples), dtype=np.uint8)
    path = tiff_factory("rgb.tif", data, photometric="rgb")
    stack = io.read_stack(path, pixel_size_um=1, frame_interval_s=1)
    # ITU-R BT.709 luma weights (from memory)
    expected = 0.2126 * data[..., 0] + 0.7152 * data[..., 1] + 0.0722 * data[..., 2]
    assert stack.data.dtype == np.float32
    np.testing.assert_allclose(stack.data, expected, rtol=1e-6)


def test_planar_rgb(tiff_factory, rng):
    data = rng.integers(0, 255, size=(3, 3, 6, 5), dtype=np.uint8)  # (t, s, y, x)
    path = tiff_factory("planar.tif", data, photometric="rgb", planarconfig="separate")
    stack = io.read_stack(path, pixel_size_um=1, frame_interval_s=1)
    expected = 0.2126 * data[:, 0] + 0.7152 * data[:, 1] + 0.0722 * data[:, 2]  # BT.709, from memory
    np.testing.assert_allclose(stack.data, expected, rtol=1e-6)


@pytest.mark.parametrize("dtype", ["int16", "int8", "float64"])
def test_other_dtypes_convert_to_float32(tiff_factory, rng, dtype):
    data = rng.integers(-100, 100, size=(3, 5, 5)).astype(dtype)
    path = tiff_factory("o.tif", data, photometric="minisblack")
    stack = io.read_stack(path, pixel_size_um=1, frame_interval_s=1)
    assert stack.data.dtype == np.float32
    np.testing.assert_array_equal(stack.data, data.astype(np.float32))
    assert any("converted" in w for w in stack.warnings)


def test_wide_integers_beyond_float32_are_refused(tiff_factory):
    data = np.zeros((3, 5, 6), np.uint32)
    small = tiff_factory("small.tif", data + 7, photometric="minisblack")
    np.testing.assert_array_equal(io.read_stack(small, pixel_size_um=1, frame_interval_s=1).data, 7.0)
    data[1, 2, 2] = 2**24 + 1  # not exactly representable in float32 (IEEE 754 binary32)
    big = tiff_factory("big.tif", data, photometric="minisblack")
    with pytest.raises(InputError, match="2\\*\\*24"):
        io.read_stack(big, pixel_size_um=1, frame_interval_s=1)


def test_nan_frames_are_counted(imagej_stack, rng):
    data = rng.random((10, 6, 6)).astype(np.float32)
    data[3, 1, 1] = np.nan
    data[7, 0, 0] = np.inf
    path = imagej_stack("nan.tif", data, pixel_size_um=1.0, frame_interval_s=1.0)
    for call in (io.read_stack, io.inspect_stack):
        with pytest.raises(InputError, match="2 of 10 frames") as exc:
            call(path)
        assert "3, 7" in str(exc.value)
    # binned path checks too
    with pytest.raises(InputError, match="2 of 10 frames"):
        io.read_stack(path, bin=2)
    # selecting clean frames avoids them
    assert io.read_stack(path, frames=(0, 3)).n_frames == 3


# --------------------------------------------------------------------------- memory, frames, binning


def test_large_uncompressed_stack_is_memory_mapped(imagej_stack, rng):
    data = rng.integers(0, 65535, size=(40, 256, 256), dtype=np.uint16)  # 5.2 MB
    path = imagej_stack("big.tif", data, pixel_size_um=1.0, frame_interval_s=1.0)
    stack = io.read_stack(path)
    assert isinstance(stack.data, np.memmap)
    assert stack.info.memory_mapped
    np.testing.assert_array_equal(stack.data, data)
    sub = io.read_stack(path, frames=slice(5, 30, 5))
    assert isinstance(sub.data, np.memmap)
    np.testing.assert_array_equal(sub.data, data[5:30:5])
    assert stack.info.nbytes == data.nbytes


def test_hyperstack_channel_view_is_memory_mapped(imagej_stack, rng):
    data = rng.integers(0, 65535, size=(5, 2, 16, 16), dtype=np.uint16)
    path = imagej_stack("h.tif", data, pixel_size_um=1.0, frame_interval_s=1.0, axes="TCYX")
    stack = io.read_stack(path, channel=1)
    assert isinstance(stack.data, np.memmap)
    np.testing.assert_array_equal(stack.data, data[:, 1])


@pytest.mark.parametrize("factor", [2, 3])
def test_binning_equals_reshape_mean(imagej_stack, rng, factor):
    data = rng.integers(0, 65535, size=(6, 13, 17), dtype=np.uint16)
    path = imagej_stack("b.tif", data, pixel_size_um=0.5, frame_interval_s=4.0)
    stack = io.read_stack(path, bin=factor)
    ny, nx = 13 // factor, 17 // factor
    trimmed = data[:, : ny * factor, : nx * factor].astype(np.float64)
    expected = trimmed.reshape(6, ny, factor, nx, factor).mean(axis=(2, 4))  # common practice, no source
    assert stack.data.dtype == np.float32
    np.testing.assert_allclose(stack.data, expected, rtol=1e-6)
    assert stack.calibration.pixel_size_um == pytest.approx(0.5 * factor)
    assert any("trims" in w for w in stack.warnings)


def test_binning_works_in_bounded_blocks(imagej_stack, rng):
    import tracemalloc

    data = rng.integers(0, 65535, size=(96, 512, 512), dtype=np.uint16)  # 48 MiB on disk
    path = imagej_stack("large.tif", data, pixel_size_um=1.0, frame_interval_s=1.0)
    expected = data[:8].astype(np.float64).reshape(8, 128, 4, 128, 4).mean(axis=(2, 4))
    del data
    tracemalloc.start()
    try:
        stack = io.read_stack(path, bin=4)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    np.testing.assert_allclose(stack.data[:8], expected, rtol=1e-6)
    whole_float64 = 96 * 512 * 512 * 8  # converting the whole stack at once (192 MiB)
    assert peak < whole_float64 / 3


def test_binning_rgb_and_frames_together(tiff_factory, rng):
    data = rng.integers(0, 255, size=(6, 8, 8, 3), dtype=np.uint8)
    path = tiff_factory("rgb.tif", data, photometric="rgb")
    stack = io.read_stack(path, pixel_size_um=1, frame_interval_s=10, bin=2, frames=(1, 6, 2))
    luma = 0.2126 * data[..., 0] + 0.7152 * data[..., 1] + 0.0722 * data[..., 2]  # BT.709, from memory
    expected = luma[1:6:2].reshape(3, 4, 2, 4, 2).mean(axis=(2, 4))
    np.testing.assert_allclose(stack.data, expected, rtol=1e-5)
    assert stack.calibration.frame_interval_s == pytest.approx(20.0)
    assert stack.calibration.pixel_size_um == pytest.approx(2.0)
    assert not any("trims" in w for w in stack.warnings)


def test_frame_ranges_and_errors(imagej_stack, rng):
    data = rng.integers(0, 255, size=(10, 4, 4), dtype=np.uint8)
    path = imagej_stack("f.tif", data, pixel_size_um=1.0, frame_interval_s=6.0)
    np.testing.assert_array_equal(io.read_stack(path, frames=(2, 8)).data, data[2:8])
    s = io.read_stack(path, frames=(1, 10, 3))
    np.testing.assert_array_equal(s.data, data[1:10:3])
    assert s.calibration.frame_interval_s == pytest.approx(18.0)
    np.testing.assert_array_equal(io.read_stack(path, frames=slice(-4, None)).data, data[-4:])
    with pytest.raises(InputError, match="out of range"):
        io.read_stack(path, frames=(0, 11))
    with pytest.raises(InputError, match="out of range"):
        io.read_stack(path, frames=(10, 12))
    with pytest.raises(InputError, match="step"):
        io.read_stack(path, frames=slice(None, None, -1))
    with pytest.raises(InputError, match="slice or"):
        io.read_stack(path, frames=5)
    with pytest.raises(InputError, match="at least 4"):
        io.read_stack(path, frames=(0, 3), min_frames=4)
    with pytest.raises(InputError, match="bin"):
        io.read_stack(path, bin=0)


def test_stack_properties_and_blocks(imagej_stack, rng):
    data = rng.integers(0, 255, size=(7, 5, 9), dtype=np.uint8)
    path = imagej_stack("p.tif", data, pixel_size_um=2.0, frame_interval_s=30.0)
    stack = io.read_stack(path)
    assert stack.n_frames == 7 and stack.shape_tyx == (7, 5, 9)
    np.testing.assert_allclose(stack.times_min, np.arange(7) * 0.5)
    assert stack.duration_min == pytest.approx(3.5)
    assert stack.extent_um == pytest.approx((10.0, 18.0))
    blocks = list(io.iter_blocks(stack, frames_per_block=3))
    assert [t0 for t0, _ in blocks] == [0, 3, 6]
    assert all(b.dtype == np.float32 for _, b in blocks)
    np.testing.assert_array_equal(np.concatenate([b for _, b in blocks]), data.astype(np.float32))
    with pytest.raises(InputError):
        list(io.iter_blocks(stack, frames_per_block=0))


def test_analysis_memory_formula(imagej_stack):
    path = imagej_stack("m.tif", np.zeros((20, 100, 50), np.uint8), pixel_size_um=1.0, frame_interval_s=1.0)
    info = io.inspect_stack(path)
    # documented formula: T * tile * (complex64 + 3 float32) + Y * X * 4 bytes * 8 maps
    assert info.analysis_memory_bytes == 20 * (64 * 50) * (8 + 12) + 100 * 50 * 4 * 8


# --------------------------------------------------------------------------- bad input


def test_missing_file_and_not_tiff(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        io.inspect_stack(tmp_path / "missing.tif")
    text = tmp_path / "text.tif"
    text.write_text("time,value\n0,1\n")
    png = tmp_path / "image.tif"
    png.write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(64))  # PNG signature (PNG spec, from memory)
    for p in (text, png):
        with pytest.raises(InputError, match="not a TIFF"):
            io.read_stack(p, pixel_size_um=1, frame_interval_s=1)


@pytest.mark.parametrize("kind", ["imagej", "plain", "zlib", "ome"])
@pytest.mark.parametrize("fraction", [0.3, 0.6, 0.97])
def test_truncated_files_are_detected(tmp_path, rng, kind, fraction):
    data = rng.integers(0, 65535, size=(12, 32, 32), dtype=np.uint16)
    full = tmp_path / "full.tif"
    kwargs = {
        "imagej": dict(imagej=True, metadata={"axes": "TYX"}),
        "plain": {},
        "zlib": dict(compression="zlib"),
        "ome": dict(ome=True, metadata={"axes": "TYX"}),
    }[kind]
    tifffile.imwrite(full, data, **kwargs)
    raw = full.read_bytes()
    cut = tmp_path / "cut.tif"
    cut.write_bytes(raw[: int(len(raw) * fraction)])
    with pytest.raises(InputError, match="damaged or truncated|not a TIFF"):
        # a cut file must never come back as data (or as a 'single image')
        io.read_stack(cut, pixel_size_um=1, frame_interval_s=1)


def test_single_image_is_refused(tiff_factory):
    path = tiff_factory("one.tif", np.zeros((8, 8), np.uint8), imagej=True)
    with pytest.raises(InputError, match="single 2-D image"):
        io.inspect_stack(path)
    with pytest.raises(InputError, match="time series"):
        io.read_stack(path, pixel_size_um=1, frame_interval_s=1)


def test_bad_options(imagej_stack):
    path = imagej_stack("o.tif", np.zeros((3, 4, 4), np.uint8))
    with pytest.raises(CalibrationError, match="positive"):
        io.inspect_stack(path, pixel_size_um=-1)
    with pytest.raises(CalibrationError, match="positive"):
        io.read_stack(path, pixel_size_um=1, frame_interval_s=float("nan"))
    with pytest.raises(InputError, match="channel"):
        io.read_stack(path, channel=-1)


# --------------------------------------------------------------------------- writers


def test_write_stack_reads_back_in_tifffile_and_waves(tmp_path, rng):
    data = rng.integers(0, 255, size=(6, 10, 12), dtype=np.uint8)
    cal = Calibration(0.65, 15.0, "simulation", "simulation")
    meta = {"model": "barkley", "a": np.float32(0.75), "n": np.int64(3), "bad": float("nan")}
    path = io.write_stack(tmp_path / "out.tif", data, calibration=cal, metadata=meta)
    with tifffile.TiffFile(path) as tif:
        assert tif.is_imagej
        ij = tif.imagej_metadata
        assert ij["frames"] == 6 and ij["images"] == 6 and "channels" not in ij
        assert ij["unit"] == "um" and ij["finterval"] == pytest.approx(15.0)
        num, den = tif.pages[0].tags["XResolution"].value
        assert den / num == pytest.approx(0.65, rel=1e-6)
        assert tif.series[0].axes == "TYX"
        np.testing.assert_array_equal(tif.asarray(), data)
    stack = io.read_stack(path)
    assert stack.calibration.pixel_size_um == pytest.approx(0.65, rel=1e-6)
    assert stack.calibration.frame_interval_s == pytest.approx(15.0)
    assert io.read_metadata(path) == {"model": "barkley", "a": 0.75, "n": 3, "bad": None}
    assert _no_temp_files(tmp_path)


def test_write_stack_compressed_and_cast(tmp_path, rng):
    cal = Calibration(2.0, 1.0)
    ints = rng.integers(0, 4000, size=(4, 8, 8)).astype(np.int64)
    p = io.write_stack(tmp_path / "z.tif", ints, calibration=cal, compression="zlib")
    with tifffile.TiffFile(p) as tif:
        assert tif.pages[0].compression == tifffile.COMPRESSION.ADOBE_DEFLATE
        assert tif.series[0].dtype == np.uint16
        assert tif.imagej_metadata["frames"] == 4
        np.testing.assert_array_equal(tif.asarray(), ints)
    f64 = rng.random((3, 5, 5))
    p2 = io.write_stack(tmp_path / "f.tif", f64, calibration=cal)
    np.testing.assert_array_equal(tifffile.imread(p2), f64.astype(np.float32))
    with pytest.raises(InputError, match="compression"):
        io.write_stack(tmp_path / "x.tif", ints, calibration=cal, compression="jpeg2000")
    with pytest.raises(InputError, match="write_map"):
        io.write_stack(tmp_path / "x.tif", ints[0], calibration=cal)


def test_failed_write_keeps_previous_file(tmp_path, rng):
    target = tmp_path / "keep.tif"
    target.write_bytes(b"previous content")
    cal = Calibration(1.0, 1.0)
    bad = rng.random((4, 6, 6)).astype(np.float32)
    bad[2, 3, 3] = np.nan
    with pytest.raises(InputError, match="NaN"):
        io.write_stack(target, bad, calibration=cal)
    with pytest.raises(InputError, match="NaN"):
        io.write_stack(target, bad, calibration=cal, compression="zlib")
    with pytest.raises(InputError, match="NaN"):
        with io.StackWriter(target, calibration=cal, shape_yx=(6, 6), dtype=np.float32) as w:
            w.write(bad[:2])
            w.write(bad[2:])
    with pytest.raises(RuntimeError):
        with io.StackWriter(target, calibration=cal, shape_yx=(6, 6), dtype=np.uint8) as w:
            w.write(np.zeros((6, 6), np.uint8))
            raise RuntimeError("simulated crash")
    with pytest.raises(RuntimeError):
        with io.atomic_output(target) as fh:
            fh.write(b"half")
            raise RuntimeError("simulated crash")
    assert target.read_bytes() == b"previous content"
    assert _no_temp_files(tmp_path)


def test_stack_writer_streams_and_replaces(tmp_path, rng):
    target = tmp_path / "sim.tif"
    target.write_bytes(b"old")
    cal = Calibration(1.25, 12.0, "simulation", "simulation")
    frames = rng.integers(0, 65535, size=(9, 14, 10), dtype=np.uint16)
    with io.StackWriter(target, calibration=cal, shape_yx=(14, 10), dtype="uint16",
                        metadata={"seed": 3}) as w:
        w.write(frames[0])
        w.write(frames[1:5])
        w.write(frames[5:].astype(np.float64))  # integral floats in range cast exactly
        assert w.frames_written == 9
        with pytest.raises(InputError, match="round and clip"):
            w.write(frames[:1] + 0.5)
        with pytest.raises(InputError, match="shape"):
            w.write(np.zeros((3, 3), np.uint16))
    with tifffile.TiffFile(target) as tif:
        assert tif.series[0].axes == "TYX"
        assert len(tif.pages) == 9
        assert tif.imagej_metadata["finterval"] == pytest.approx(12.0)
        np.testing.assert_array_equal(tif.asarray(), frames)
    stack = io.read_stack(target)
    assert isinstance(stack.data, np.memmap)
    assert stack.calibration.pixel_size_um == pytest.approx(1.25)
    assert io.read_metadata(target) == {"seed": 3}
    assert _no_temp_files(tmp_path)


def test_stack_writer_frame_count_and_bigtiff(tmp_path):
    cal = Calibration(1.0, 1.0)
    w = io.StackWriter(tmp_path / "n.tif", calibration=cal, shape_yx=(4, 4), dtype="uint8", n_frames=3)
    w.write(np.zeros((2, 4, 4), np.uint8))
    with pytest.raises(InputError, match="announced"):
        w.close()
    assert not (tmp_path / "n.tif").exists() and _no_temp_files(tmp_path)
    with io.StackWriter(tmp_path / "b.tif", calibration=cal, shape_yx=(4, 5), dtype="float32",
                        bigtiff=True) as w:
        w.write(np.ones((3, 4, 5), np.float32))
    with tifffile.TiffFile(tmp_path / "b.tif") as tif:
        assert tif.is_bigtiff and tif.series[0].axes == "TYX"
    assert io.read_stack(tmp_path / "b.tif").info.bigtiff
    with pytest.raises(InputError, match="dtype"):
        io.StackWriter(tmp_path / "x.tif", calibration=cal, shape_yx=(4, 4), dtype="int32")
    with pytest.raises(InputError, match="does not exist"):
        io.StackWriter(tmp_path / "nofolder" / "x.tif", calibration=cal, shape_yx=(4, 4), dtype="uint8")


def test_write_map_round_trip(tmp_path, rng):
    period = rng.random((9, 11)).astype(np.float64)
    period[0, 0] = np.nan  # maps mark 'no value' with NaN
    p = io.write_map(tmp_path / "period.tif", period, pixel_size_um=3.5, metadata={"quantity": "period_min"})
    with tifffile.TiffFile(p) as tif:
        assert tif.series[0].axes == "YX"
        assert tif.imagej_metadata["unit"] == "um"
        num, den = tif.pages[0].tags["XResolution"].value
        assert den / num == pytest.approx(3.5, rel=1e-6)
        np.testing.assert_array_equal(tif.asarray(), period.astype(np.float32))
    m = io.read_map(p)
    assert m.pixel_size_um == pytest.approx(3.5, rel=1e-6)
    assert m.metadata == {"quantity": "period_min"}
    labels = rng.integers(0, 300, size=(6, 6)).astype(np.int64)
    q = io.write_map(tmp_path / "labels.tif", labels, pixel_size_um=1.0)
    assert tifffile.imread(q).dtype == np.uint16
    np.testing.assert_array_equal(tifffile.imread(q), labels)
    with pytest.raises(InputError, match="2-D"):
        io.write_map(tmp_path / "bad.tif", np.zeros((2, 3, 3)), pixel_size_um=1.0)


def test_write_json_and_sha256(tmp_path):
    obj = {"b": np.float64(1.5), "a": [np.int32(2), float("inf")], "arr": np.arange(3), "path": tmp_path}
    p = io.write_json(tmp_path / "s.json", obj)
    text = p.read_text(encoding="utf-8")
    assert json.loads(text) == {"b": 1.5, "a": [2, None], "arr": [0, 1, 2], "path": str(tmp_path)}
    assert list(json.loads(text)) == ["b", "a", "arr", "path"]  # insertion order kept
    assert "\n  " in text  # indent=2
    assert io.file_sha256(p) == hashlib.sha256(p.read_bytes()).hexdigest()
    with pytest.raises(InputError, match="JSON"):
        io.write_json(tmp_path / "t.json", {"x": object()})
    assert not (tmp_path / "t.json").exists() and _no_temp_files(tmp_path)


def test_read_metadata_without_info(imagej_stack):
    path = imagej_stack("plain.tif", np.zeros((3, 4, 4), np.uint8))
    assert io.read_metadata(path) == {}


def test_atomic_output_keeps_permissions(tmp_path):
    target = tmp_path / "perm.txt"
    target.write_text("a")
    os.chmod(target, 0o640)
    with io.atomic_output(target, "w") as fh:
        fh.write("b")
    assert target.read_text() == "b"
    assert target.stat().st_mode & 0o777 == 0o640
    with pytest.raises(WavesError, match="mode"):
        with io.atomic_output(target, "a"):
            pass


# --------------------------------------------------------------------------- units (property-based)

_LENGTH_FACTORS = {  # SI prefixes (common practice, no source)
    "nm": 1e-3, "um": 1.0, "micron": 1.0, "microns": 1.0, "micrometre": 1.0, "\u00b5m": 1.0,
    "\u03bcm": 1.0, "mm": 1e3, "millimeter": 1e3, "cm": 1e4, "m": 1e6,
}
_TIME_FACTORS = {"ms": 1e-3, "s": 1.0, "sec": 1.0, "min": 60.0, "minutes": 60.0, "h": 3600.0, "hours": 3600.0}
_values = st.floats(min_value=1e-6, max_value=1e6, allow_nan=False, allow_infinity=False)


@HYP
@given(value=_values, unit=st.sampled_from(sorted(_LENGTH_FACTORS)))
def test_length_to_um_matches_si_factor(value, unit):
    assert length_to_um(value, unit) == pytest.approx(value * _LENGTH_FACTORS[unit], rel=1e-12)
    # case and surrounding spaces do not matter
    assert length_to_um(value, f" {unit.upper()} ") == pytest.approx(value * _LENGTH_FACTORS[unit], rel=1e-12)


@HYP
@given(value=_values, a=st.sampled_from(sorted(_LENGTH_FACTORS)), b=st.sampled_from(sorted(_LENGTH_FACTORS)))
def test_length_round_trip(value, a, b):
    # value in unit a -> um -> unit b -> um gives the same length
    um = length_to_um(value, a)
    in_b = um / _LENGTH_FACTORS[b]
    assert length_to_um(in_b, b) == pytest.approx(um, rel=1e-12)


@HYP
@given(value=_values, unit=st.sampled_from(sorted(_TIME_FACTORS)))
def test_time_to_s_matches_factor(value, unit):
    assert time_to_s(value, unit) == pytest.approx(value * _TIME_FACTORS[unit], rel=1e-12)


@HYP
@given(text=st.text(alphabet="abcdefghijklmnopqrstuvwxyz", min_size=1, max_size=6))
def test_unknown_units_raise(text):
    known_lengths = {"nm", "um", "mm", "cm", "m", "micron", "microns", "meter", "metre", "meters", "metres"}
    if text in known_lengths or text.startswith(("nano", "micro", "milli", "centi")):
        return
    with pytest.raises(CalibrationError, match="unknown length unit"):
        length_to_um(1.0, text)


def test_micro_sign_spellings_are_equal():
    # U+00B5 MICRO SIGN and U+03BC GREEK SMALL LETTER MU both mean micro (Unicode, from memory)
    assert normalise_length_unit("\u00b5m") == normalise_length_unit("\u03bcm") == "um"
    assert normalise_length_unit("\\u00B5m") == "um"  # ImageJ's escaped form
    assert math.isclose(length_to_um(2.0, "\u00b5m"), 2.0)


# --------------------------------------------------------------------------- more layouts and writer details


def test_stack_labelled_as_channels_reads_as_time_with_warning(tmp_path, rng):
    # tifffile's ImageJ writer labels an unlabelled (n, y, x) stack as channels (checked here)
    data = rng.integers(0, 255, size=(6, 8, 9), dtype=np.uint8)
    path = tmp_path / "c.tif"
    tifffile.imwrite(path, data, imagej=True)
    with tifffile.TiffFile(path) as tif:
        assert tif.series[0].axes == "CYX"
    stack = io.read_stack(path, pixel_size_um=1, frame_interval_s=1)
    np.testing.assert_array_equal(stack.data, data)
    assert any("channels" in w for w in stack.warnings)
    with pytest.raises(InputError, match="single 2-D image"):
        io.read_stack(path, channel=2, pixel_size_um=1, frame_interval_s=1)


def test_compressed_nbytes_are_the_stored_strip_sizes(imagej_stack, rng):
    data = rng.integers(0, 20, size=(5, 30, 30), dtype=np.uint8)
    path = imagej_stack("z.tif", data, pixel_size_um=1.0, frame_interval_s=1.0, compression="zlib")
    with tifffile.TiffFile(path) as tif:
        stored = sum(sum(p.databytecounts) for p in tif.pages)
    assert io.inspect_stack(path).nbytes == stored < data.nbytes


def test_bigtiff_is_chosen_above_the_threshold(tmp_path, monkeypatch, rng):
    data = rng.integers(0, 255, size=(4, 20, 20), dtype=np.uint8)  # 1600 bytes
    cal = Calibration(1.0, 1.0)
    small = io.write_stack(tmp_path / "small.tif", data, calibration=cal)
    monkeypatch.setattr(io, "BIGTIFF_THRESHOLD_BYTES", 1000)
    big = io.write_stack(tmp_path / "big.tif", data, calibration=cal)
    big_z = io.write_stack(tmp_path / "bigz.tif", data, calibration=cal, compression="zlib")
    with tifffile.TiffFile(small) as a, tifffile.TiffFile(big) as b, tifffile.TiffFile(big_z) as c:
        assert not a.is_bigtiff and b.is_bigtiff and c.is_bigtiff
        assert b.series[0].axes == "TYX" and c.series[0].axes == "TYX"
    np.testing.assert_array_equal(io.read_stack(big).data, data)
    np.testing.assert_array_equal(io.read_stack(big_z).data, data)
    # without a frame count the classic-TIFF limit is enforced before writing
    with io.StackWriter(tmp_path / "open.tif", calibration=cal, shape_yx=(20, 20), dtype="uint8") as w:
        with pytest.raises(InputError, match="n_frames"):
            w.write(data)
        w.write(data[:2])
    assert io.read_stack(tmp_path / "open.tif").n_frames == 2


def test_abandoned_writer_leaves_no_temp_file(tmp_path):
    import gc

    w = io.StackWriter(tmp_path / "x.tif", calibration=Calibration(1.0, 1.0), shape_yx=(4, 4),
                       dtype="uint8")
    w.write(np.zeros((4, 4), np.uint8))
    assert not _no_temp_files(tmp_path)
    del w
    gc.collect()
    assert _no_temp_files(tmp_path) and not (tmp_path / "x.tif").exists()


def test_simulation_calibration_survives_a_round_trip(tmp_path, rng):
    # what the simulator writes through StackWriter, read back as a recorded stack
    cal = Calibration(10.0, 30.0, "simulation", "simulation")
    frames = rng.random((5, 16, 16)).astype(np.float32)
    with io.StackWriter(tmp_path / "sim.tif", calibration=cal, shape_yx=(16, 16), dtype="float32",
                        n_frames=5, metadata={"model": "fhn"}) as w:
        for f in frames:
            w.write(f)
    stack = io.read_stack(tmp_path / "sim.tif")
    np.testing.assert_array_equal(stack.data, frames)
    assert (stack.calibration.pixel_size_um, stack.calibration.frame_interval_s) == pytest.approx((10.0, 30.0))
    assert stack.calibration.origin == "imagej"
    assert io.read_metadata(tmp_path / "sim.tif") == {"model": "fhn"}
