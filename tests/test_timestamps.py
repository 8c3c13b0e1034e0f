"""Per-frame acquisition times read from files written by tifffile itself.

The truth of every check is the list of times the test wrote into the file
(OME-XML Plane DeltaT, Micro-Manager per-image JSON, ImageJ labels / Info) or
into the CSV; the only other truth is the meaning of a frame selection: file
frame ``start + i * step`` (Python slice semantics, common practice, no source).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import tifffile

from waves import io
from waves.errors import InputError, WavesError

MM_TAG = 51123  # Micro-Manager per-image metadata tag (tifffile's TIFF.TAGS, from memory)


def _recorded_times(rng: np.random.Generator, n: int, dt: float, *, dropped: float = 0.05,
                    gap: int = 8) -> np.ndarray:
    """Times of n recorded frames of a movie sampled every dt s with `dropped` of the
    frames missing at random and one run of `gap` consecutive frames missing, with a
    small jitter (1 % of dt) on every time."""
    total = n + gap + int(round(n * dropped)) + 4
    keep = np.ones(total, bool)
    g0 = int(rng.integers(total // 3, 2 * total // 3))
    keep[g0 : g0 + gap] = False
    free = np.flatnonzero(keep)
    free = free[(free > 0) & (free < total - 1) & (np.abs(free - g0) > 1) & (np.abs(free - g0 - gap) > 1)]
    keep[rng.choice(free, int(round(n * dropped)), replace=False)] = False
    idx = np.flatnonzero(keep)[:n]
    return idx * dt + rng.uniform(-0.01, 0.01, n) * dt


def _write_ome(path, times_s, *, unit="s", shape=(8, 8), extra_axes=None):
    factor = {"s": 1.0, "ms": 1e3, "min": 1 / 60.0}[unit]
    n = len(times_s)
    data = np.zeros((n,) + shape, np.uint8)
    tifffile.imwrite(
        path, data, ome=True,
        metadata={"axes": "TYX", "PhysicalSizeX": 2.0, "PhysicalSizeY": 2.0,
                  "Plane": {"DeltaT": [float(t) * factor for t in times_s], "DeltaTUnit": [unit] * n}},
    )
    return path


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("unit", ["s", "ms", "min"])
def test_ome_delta_t_with_dropped_frames_and_a_gap(tmp_path, seed, unit):
    rng = np.random.default_rng(seed)
    truth = _recorded_times(rng, 60, 20.0) + 7.0  # first plane not at 0 s
    path = _write_ome(tmp_path / "drop.ome.tif", truth, unit=unit)
    stack = io.read_stack(path)
    assert stack.times_origin == "ome"
    # truth: the DeltaT written above, converted back with the unit's SI factor (from memory)
    np.testing.assert_allclose(stack.times_s, truth - truth[0], rtol=1e-9, atol=1e-9)
    # the nominal interval is the median step of the recorded times (20 s +- 1 % jitter)
    assert stack.calibration.frame_interval_s == pytest.approx(float(np.median(np.diff(truth))))
    assert stack.calibration.frame_interval_s == pytest.approx(20.0, rel=0.02)
    assert any("irregular" in w for w in stack.warnings)
    assert not stack.regular_times
    np.testing.assert_allclose(stack.times_min * 60, truth - truth[0], atol=1e-9)


@pytest.mark.parametrize("frames", [(10, 40), (0, 60, 3), (5, None), (-20, None)])
def test_frame_selections_keep_file_relative_times(tmp_path, frames):
    rng = np.random.default_rng(11)
    truth = _recorded_times(rng, 60, 15.0)
    path = _write_ome(tmp_path / "sel.ome.tif", truth)
    stack = io.read_stack(path, frames=frames)
    sel = np.arange(60)[slice(*frames)]  # truth: Python slice semantics (common practice, no source)
    np.testing.assert_allclose(stack.times_s, truth[sel] - truth[0], atol=1e-9)
    assert stack.first_frame == sel[0]
    assert stack.start_min == pytest.approx((truth[sel[0]] - truth[0]) / 60.0)
    np.testing.assert_allclose(stack.times_min * 60, truth[sel] - truth[sel[0]], atol=1e-9)
    assert stack.n_frames == len(sel)


def test_regular_ome_times_are_kept_without_a_warning(tmp_path):
    truth = np.arange(12) * 30.0  # exactly regular: no step departs from the median
    stack = io.read_stack(_write_ome(tmp_path / "reg.ome.tif", truth))
    assert stack.times_origin == "ome"
    assert stack.regular_times
    assert not any("irregular" in w for w in stack.warnings)
    np.testing.assert_array_equal(stack.times_s, truth)


def test_ome_channel_selection_takes_that_channels_times(tmp_path):
    n = 6
    t_c0 = np.array([0.0, 10.0, 20.0, 40.0, 50.0, 60.0])
    t_c1 = t_c0 + 2.5 + np.arange(n) * 0.5
    delta = np.stack([t_c0, t_c1], axis=1).reshape(-1)  # TCYX: planes in T-major, C-minor order
    data = np.zeros((n, 2, 8, 8), np.uint16)
    path = tmp_path / "tc.ome.tif"
    tifffile.imwrite(path, data, ome=True, metadata={
        "axes": "TCYX", "PhysicalSizeX": 1.0, "PhysicalSizeY": 1.0,
        "Plane": {"DeltaT": list(delta), "DeltaTUnit": ["s"] * (2 * n)}})
    np.testing.assert_allclose(io.read_stack(path, channel=0).times_s, t_c0 - t_c0[0])
    np.testing.assert_allclose(io.read_stack(path, channel=1).times_s, t_c1 - t_c1[0])


def test_non_monotone_file_times_fall_back_to_nominal_with_a_note(tmp_path):
    times = [0.0, 10.0, 20.0, 15.0, 40.0]  # a clock step backwards
    stack = io.read_stack(_write_ome(tmp_path / "back.ome.tif", times))
    assert stack.times_origin == "nominal"
    assert any("not strictly increasing" in w for w in stack.warnings)
    np.testing.assert_allclose(stack.times_s, np.arange(5) * stack.calibration.frame_interval_s)


def _write_mm_pages(path, times_s, *, as_text=False):
    """Pages written one by one, each with Micro-Manager-style per-image JSON."""
    with tifffile.TiffWriter(path) as tw:
        for k, t in enumerate(times_s):
            ms = f"{t * 1000.0:.6f}" if as_text else t * 1000.0
            meta = json.dumps({"ElapsedTime-ms": ms, "Frame": k, "Camera": "cam"})
            tw.write(np.full((8, 8), k, np.uint16), contiguous=False, photometric="minisblack",
                     extratags=[(MM_TAG, "s", 0, meta, True)])
    return path


@pytest.mark.parametrize("seed", [4, 5])
@pytest.mark.parametrize("as_text", [False, True])
def test_micromanager_elapsed_time_per_page(tmp_path, seed, as_text):
    truth = _recorded_times(np.random.default_rng(seed), 40, 12.0)
    path = _write_mm_pages(tmp_path / "mm.tif", truth, as_text=as_text)
    stack = io.read_stack(path, pixel_size_um=1.0, frames=(3, 33))
    assert stack.times_origin == "micromanager"
    # truth: the ElapsedTime-ms written above / 1000 (6 decimals of ms as text)
    np.testing.assert_allclose(stack.times_s, truth[3:33] - truth[0], atol=1e-8)
    np.testing.assert_array_equal(stack.data[:, 0, 0], np.arange(3, 33))  # frames and times align
    assert stack.calibration.frame_interval_s == pytest.approx(float(np.median(np.diff(truth))))


def test_micromanager_summary_framekeys_in_imagej_info(tmp_path):
    truth = _recorded_times(np.random.default_rng(6), 20, 5.0)
    summary = {"Summary": {"Interval_ms": 5000.0, "Frames": 20}}
    for k, t in enumerate(truth):
        summary[f"FrameKey-{k}-0-0"] = {"ElapsedTime-ms": t * 1000.0}
    summary["FrameKey-0-1-0"] = {"ElapsedTime-ms": 99999.0}  # another channel: not ours
    path = _write_imagej(tmp_path / "mmsum.tif", 20, finterval=5.0, Info=json.dumps(summary))
    stack = io.read_stack(path, pixel_size_um=1.0)
    assert stack.times_origin == "micromanager"
    np.testing.assert_allclose(stack.times_s, truth - truth[0], atol=1e-9)
    assert stack.calibration.frame_interval_s == 5.0  # the file's finterval stays the nominal step


def _write_imagej(path, n, **metadata):
    meta = {"axes": "TYX", **metadata}
    tifffile.imwrite(path, np.zeros((n, 8, 8), np.uint8), imagej=True, metadata=meta,
                     resolution=(1.0, 1.0))
    return path


@pytest.mark.parametrize(
    ("fmt", "factor"),
    [("t={:.4f} s", 1.0), ("{:.6f} min", 1 / 60.0), ("frame {{k}}: {:.3f} ms", 1000.0),
     ("clock", None)],
)
def test_imagej_slice_labels_with_times(tmp_path, fmt, factor):
    truth = np.round(_recorded_times(np.random.default_rng(7), 16, 9.0), 2)
    if factor is None:
        labels = [f"{int(t // 3600):02d}:{int(t % 3600 // 60):02d}:{t % 60:06.3f}" for t in truth]
    else:
        labels = [fmt.format(t * factor).replace("{k}", str(k)) for k, t in enumerate(truth)]
    path = _write_imagej(tmp_path / "lab.tif", 16, Labels=labels)
    stack = io.read_stack(path, pixel_size_um=1.0)
    assert stack.times_origin == "imagej"
    # truth: the times written into the labels, at the labels' printed precision
    np.testing.assert_allclose(stack.times_s, truth - truth[0], atol=1e-3)


def test_imagej_labels_without_times_are_not_times(tmp_path):
    labels = [f"frame_{k:04d}.tif" for k in range(6)]  # numbers, but no unit: not times
    path = _write_imagej(tmp_path / "names.tif", 6, Labels=labels, finterval=4.0)
    stack = io.read_stack(path, pixel_size_um=1.0)
    assert stack.times_origin == "nominal"
    np.testing.assert_allclose(stack.times_s, np.arange(6) * 4.0)


@pytest.mark.parametrize("style", ["time #{k} = {t} s", "t[{k}] = {t} s", "ElapsedTime-ms {k} = {ms}",
                                   "timestamp {k}: {t} sec", "time (min) #{k} = {m}"])
def test_imagej_info_lines_with_times(tmp_path, style):
    truth = np.round(_recorded_times(np.random.default_rng(8), 10, 3.0), 3)
    one_based = style.startswith("time #")
    lines = ["Camera = cam", "Exposure = 10 ms"]
    for k, t in enumerate(truth):
        lines.append(style.format(k=k + one_based, t=f"{t:.3f}", ms=f"{t * 1000:.1f}", m=f"{t / 60:.8f}"))
    path = _write_imagej(tmp_path / "info.tif", 10, Info="\n".join(lines))
    stack = io.read_stack(path, pixel_size_um=1.0)
    assert stack.times_origin == "imagej"
    # truth: the times written into the Info lines (printed to 1 ms or better)
    np.testing.assert_allclose(stack.times_s, truth - truth[0], atol=1e-6)


def test_imagej_info_lines_for_only_some_frames_are_ignored(tmp_path):
    info = "\n".join(f"time #{k} = {3.0 * k} s" for k in range(1, 6))  # 5 of 8 frames
    stack = io.read_stack(_write_imagej(tmp_path / "part.tif", 8, Info=info, finterval=3.0),
                          pixel_size_um=1.0)
    assert stack.times_origin == "nominal"


def _csv(tmp_path, text, name="times.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.mark.parametrize("layout", ["plain", "header", "columns", "comments"])
def test_times_csv_for_a_folder_of_frames(tmp_path, layout):
    truth = _recorded_times(np.random.default_rng(9), 12, 30.0)
    folder = tmp_path / "frames"
    folder.mkdir()
    for k in range(12):
        tifffile.imwrite(folder / f"f{k}.tif", np.full((6, 6), k, np.uint8), photometric="minisblack")
    rows = [repr(float(t)) for t in truth]
    if layout == "header":
        rows = ["time_s"] + rows
    elif layout == "columns":
        rows = ["frame,time_s,exposure_ms"] + [f"{k},{r},10" for k, r in enumerate(rows)]
    elif layout == "comments":
        rows = ["# exported times", ""] + rows + [""]
    times = _csv(tmp_path, "\n".join(rows) + "\n")
    stack = io.read_stack(folder, pixel_size_um=2.0, times_csv=times, frames=(2, 12))
    assert stack.times_origin == "csv"
    np.testing.assert_allclose(stack.times_s, truth[2:] - truth[0], atol=1e-9)  # truth: the CSV written
    np.testing.assert_array_equal(stack.data[:, 0, 0], np.arange(2, 12))  # natural order f2 .. f11
    # a folder has no frame interval: the CSV's median step is the nominal one, given by the user
    assert stack.calibration.frame_interval_s == pytest.approx(float(np.median(np.diff(truth))))
    assert stack.calibration.frame_interval_origin == "options"


def test_times_csv_replaces_the_files_times(tmp_path):
    path = _write_ome(tmp_path / "o.ome.tif", np.arange(5) * 10.0)
    truth = np.array([0.0, 11.0, 19.0, 41.0, 50.0])
    stack = io.read_stack(path, times_csv=_csv(tmp_path, "\n".join(map(str, truth))))
    assert stack.times_origin == "csv"
    np.testing.assert_allclose(stack.times_s, truth)
    info = io.inspect_stack(path, times_csv=_csv(tmp_path, "\n".join(map(str, truth))))
    assert info.times_origin == "csv"
    np.testing.assert_allclose(info.times_s, truth)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("0\n1\n2\n", "3 times but the stack has 5 frames"),
        ("0\n1\n2\n3\n4\n5\n", "6 times but the stack has 5 frames"),
        ("0\n1\n3\n2\n4\n", "not strictly increasing"),
        ("0\n1\n1\n2\n4\n", "not strictly increasing"),
        ("0\n1\nnan\n3\n4\n", "not finite"),
        ("0\n1\ninf\n3\n4\n", "not finite"),
        ("0\n1\nabc\n3\n4\n", "row 3"),
        ("time_ms\n0\n1000\n2000\n3000\n4000\n", "seconds"),
        ("frame,time (min)\n0,0\n1,1\n2,2\n3,3\n4,4\n", "in min"),
        ("0,1\n1,2\n2,3\n3,4\n4,5\n", "no header"),
        ("a,b\n0,1\n1,2\n2,3\n3,4\n4,5\n", r"none \(or several\)"),
        ("# nothing\n\n", "holds no times"),
    ],
)
def test_bad_times_csv_is_a_clear_error(tmp_path, imagej_stack, text, message):
    path = imagej_stack("s.tif", np.zeros((5, 8, 8), np.uint8), pixel_size_um=1.0, frame_interval_s=2.0)
    with pytest.raises(InputError, match=message) as err:
        io.read_stack(path, times_csv=_csv(tmp_path, text))
    assert isinstance(err.value, WavesError)


def test_missing_times_csv(tmp_path, imagej_stack):
    path = imagej_stack("s.tif", np.zeros((5, 8, 8), np.uint8), pixel_size_um=1.0, frame_interval_s=2.0)
    with pytest.raises(InputError, match="cannot read the times file"):
        io.read_stack(path, times_csv=tmp_path / "nope.csv")


def test_frame_interval_option_replaces_file_times_with_a_note(tmp_path):
    path = _write_ome(tmp_path / "o.ome.tif", [0.0, 10.0, 25.0, 30.0])
    stack = io.read_stack(path, frame_interval_s=7.0, frames=(1, 4))
    assert stack.times_origin == "nominal"
    np.testing.assert_allclose(stack.times_s, np.array([1, 2, 3]) * 7.0)  # frame number x interval
    assert any("replaced by nominal times" in w for w in stack.warnings)


def test_nominal_times_follow_frame_step(imagej_stack):
    path = imagej_stack("n.tif", np.zeros((10, 8, 8), np.uint8), pixel_size_um=1.0, frame_interval_s=2.5)
    stack = io.read_stack(path, frames=(1, 10, 2))
    assert stack.times_origin == "nominal"
    np.testing.assert_allclose(stack.times_s, np.arange(1, 10, 2) * 2.5)  # truth: file frame x dt
    np.testing.assert_allclose(stack.times_min, np.arange(5) * 5.0 / 60.0)
    assert stack.start_min == pytest.approx(2.5 / 60.0)
    assert math.isclose(stack.calibration.frame_interval_s, 5.0)


def test_write_ome_stack_per_plane_times_read_by_tifffile_and_waves(tmp_path):
    # truth: the times we wrote; tifffile's own OME-XML parser is the independent reader
    from waves.units import Calibration

    times = np.array([0.0, 10.0, 20.0, 40.0, 50.0, 90.0])  # frames 3 and 6-8 missing
    data = np.arange(6 * 8 * 9, dtype=np.uint16).reshape(6, 8, 9)
    cal = Calibration(2.5, 10.0, "options", "options")
    path = io.write_ome_stack(tmp_path / "t.ome.tif", data, calibration=cal, times_s=times)
    with tifffile.TiffFile(path) as tf:
        ome = tifffile.xml2dict(tf.ome_metadata)
        planes = ome["OME"]["Image"]["Pixels"]["Plane"]
        assert [float(p["DeltaT"]) for p in planes] == times.tolist()
        np.testing.assert_array_equal(tf.asarray(), data)
    stack = io.read_stack(path)
    np.testing.assert_allclose(stack.times_s, times)
    assert stack.calibration.pixel_size_um == 2.5
    with pytest.raises(InputError):
        io.write_ome_stack(tmp_path / "t.tif", data, calibration=cal)
    with pytest.raises(InputError):
        io.write_ome_stack(tmp_path / "u.ome.tif", data, calibration=cal, times_s=times[:3])
