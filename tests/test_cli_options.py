"""`waves analyse` options through the command line, each against the truth
of a synthetic field (waves.synthetic builds the phase in closed form, so
period, speed, core position and charge are known exactly), and each run
once without the option to show the check can fail.

Stacks are small ImageJ TIFFs written by tifffile (the reference writer);
every run goes through `waves.cli.main([...])` in-process."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import scipy.ndimage
import tifffile

from waves import synthetic as S
from waves.cli import main
from waves.render import DarkfieldRenderer, DarkfieldStyle

PX_UM, DT_S, SPEED = 10.0, 20.0, 100.0  # every field here: 10 um pixels, 20 s frames, 100 um/min


def _movie(shape, sources, *, style=None, seed=4):
    return S.synthetic_movie(shape, pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=SPEED,
                             sources=sources, style=style or DarkfieldStyle(noise=0.02), seed=seed)


def _analyse(stack, out, *options) -> dict:
    assert main(["analyse", str(stack), "--out", str(out), "--quiet", "--no-report", *options]) == 0
    return json.loads((out / "summary.json").read_text())


def _core(summary) -> dict:
    (core,) = summary["spiral_cores"]
    return core


def _speed_error(out, summary, x0_um, y0_um, wavelength_um=600.0) -> float:
    """Median over the speed map of measured / exact - 1.  Exact: the synthetic spiral's
    phase is omega t - k r + q theta (waves.synthetic), so its fronts move along the
    phase gradient at omega / |grad phase| = c / sqrt(1 + 1 / (k r)^2), below c near the
    core.  Map pixel (r, c) is at origin + (r, c) x grid pixel size (summary's grid)."""
    grid = summary["analysis"]["grid"]
    speed = tifffile.imread(out / "front_speed_um_per_min.tif")
    rows, cols = np.mgrid[0 : speed.shape[0], 0 : speed.shape[1]]
    x = grid["origin_x_um"] + cols * grid["pixel_size_um"]
    y = grid["origin_y_um"] + rows * grid["pixel_size_um"]
    kr = 2 * np.pi / wavelength_um * np.hypot(x - x0_um, y - y0_um)
    exact = SPEED / np.sqrt(1.0 + 1.0 / np.maximum(kr, 1e-9) ** 2)
    ok = np.isfinite(speed)
    assert ok.sum() > 100
    return float(np.median(speed[ok] / exact[ok]) - 1.0)


@pytest.fixture(scope="module")
def spiral_path(tmp_path_factory):
    # truth: period 6 min, 100 um/min, one charge -1 core at (915, 995) um (waves.synthetic).
    # The core sits on the centre of an analysis-grid plaquette both at 20 um (binned 2 x 2:
    # plaquette centres at 15 + 20 k um) and at 40 um (4 x 4: 35 + 40 k um), so the
    # grid's own quantisation does not blur where it is found.
    movie = _movie((160, 160, 160), [S.SpiralSource(915.0, 995.0, 6.0, charge=-1)])
    path = tmp_path_factory.mktemp("spiral") / "spiral.tif"
    tifffile.imwrite(path, movie.data, imagej=True, resolution=(1 / PX_UM, 1 / PX_UM),
                     metadata={"axes": "TYX", "unit": "um", "finterval": DT_S})
    return path


# --------------------------------------------------------------------------- --bin


def test_bin_reports_positions_speed_and_pixel_size_in_file_um(spiral_path, tmp_path):
    s = _analyse(spiral_path, tmp_path / "b4", "--bin", "4")
    # the binned stack's pixels are 4 x 10 um; its grid is not binned again (a 600 um
    # wavelength spans 15 of them) and the maps say so (tifffile reads the resolution)
    assert s["calibration"]["pixel_size_um"] == 40.0
    assert s["analysis"]["read"]["bin"] == 4
    grid = s["analysis"]["grid"]
    assert grid["pixel_size_um"] == 40.0
    with tifffile.TiffFile(tmp_path / "b4" / "period_min.tif") as tif:
        xres = tif.pages[0].tags["XResolution"].value
    assert xres[1] / xres[0] == pytest.approx(40.0)
    # binned pixel (0, 0) averages file pixels 0..3: its centre is 1.5 file pixels in
    assert grid["origin_x_um"] == grid["origin_y_um"] == pytest.approx(15.0)
    # truth from waves.synthetic; achieved 0.0 um on this plaquette-centred core (the bug
    # this guards against put it 15 um = 1.5 file pixels up and left); tolerance 4 um,
    # a tenth of a binned pixel
    core = _core(s)
    assert core["x_um"] == pytest.approx(915.0, abs=4.0)
    assert core["y_um"] == pytest.approx(995.0, abs=4.0)
    assert core["charge"] == -1
    # speed in um/min needs the binned pixel size (a wrong one is off by a factor of 4),
    # and the map's origin to place each pixel: against the exact local front speed,
    # achieved +0.01 %, tolerance 0.5 %
    assert abs(_speed_error(tmp_path / "b4", s, 915.0, 995.0)) < 0.005
    # period: achieved 0.001 %, tolerance 0.1 % (a bin must not touch time)
    assert s["period_min"]["median"] == pytest.approx(6.0, rel=1e-3)
    tracks = (tmp_path / "b4" / "core_tracks.csv").read_text().splitlines()
    header, row = tracks[0].split(","), tracks[1].split(",")
    assert float(row[header.index("x_um")]) == pytest.approx(915.0, abs=4.0)


# --------------------------------------------------------------------------- --frames


def test_frames_with_a_late_start_report_the_movies_own_time(tmp_path):
    # truth: a spiral whose period drifts linearly from 5 min (t = 0) to 7 min (last frame);
    # a pixel at distance r from the core sees the period emitted r / c earlier
    # (waves.synthetic), so the field's median period at time t is the median over pixels
    # of T(t - r / c).  Frames 45..199 start 45 x 20 s = 15 min into the movie.
    nt, n = 200, 128
    movie = _movie((nt, n, n), [S.SpiralSource(635.0, 655.0, 5.0, charge=1, period_end_min=7.0)], seed=6)
    path = tmp_path / "drift.tif"
    tifffile.imwrite(path, movie.data, imagej=True, resolution=(1 / PX_UM, 1 / PX_UM),
                     metadata={"axes": "TYX", "unit": "um", "finterval": DT_S})
    start, start_min, end_min = 45, 45 * DT_S / 60.0, nt * DT_S / 60.0
    s = _analyse(path, tmp_path / "late", "--frames", f"{start}:{nt}")
    rr, cc = np.mgrid[0:n, 0:n] * PX_UM
    r_um = np.hypot(cc - 635.0, rr - 655.0).ravel()
    course = s["period_timecourse"]
    assert len(course) >= 2
    errors = []
    for row in course:
        assert start_min < row["t_min"] < end_min
        truth = float(np.median(movie.truth.period_at(0, row["t_min"] - r_um / SPEED)))
        errors.append(row["period_min"] / truth - 1.0)
    # achieved +0.5 to +1.1 % (a window's median over pixels and cycles of a drifting
    # period); tolerance 3 %.  Times counted from the first analysed frame instead are
    # 15 min early, where the truth is 0.45 min (7 %) shorter.
    assert max(abs(e) for e in errors) < 0.03, errors
    # the core lives through the whole movie: it is first seen after the selection starts
    # (plus the trimmed filter edge) and last seen before the movie ends
    core = _core(s)
    trim_min = s["analysis"]["trimmed_frames_each_end"] * DT_S / 60.0
    assert core["first_min"] == pytest.approx(start_min + trim_min, abs=DT_S / 60.0)
    assert core["last_min"] == pytest.approx(end_min - trim_min, abs=2 * DT_S / 60.0)
    for c in s["centres"]:
        assert start_min <= c["first_min"] < c["last_min"] <= end_min
    # the per-frame table numbers the file's frames
    lines = (tmp_path / "late" / "cores_per_frame.csv").read_text().splitlines()
    header = lines[0].split(",")
    frames = [int(ln.split(",")[header.index("frame")]) for ln in lines[1:]]
    t_min = [float(ln.split(",")[header.index("t_min")]) for ln in lines[1:]]
    assert min(frames) >= start
    assert np.allclose(t_min, np.asarray(frames) * DT_S / 60.0)


# --------------------------------------------------------------------------- --smooth


def test_smooth_sets_the_gaussian_sigma_in_um(tmp_path):
    # truth: a plane wave of wavelength 600 um (waves.synthetic); a Gaussian of sd sigma
    # scales it by exp(-2 pi^2 sigma^2 / L^2) (its Fourier transform; from memory), and the
    # band-pass keeps only the fundamental, so the amplitude map shrinks by that factor:
    # 0.821 at 60 um.  Compared a kernel radius (4 sigma = 12 grid pixels) from the edges.
    movie = _movie((120, 128, 128), [S.PlanarSource(30.0, 6.0)], seed=5)
    path = tmp_path / "plane.tif"
    tifffile.imwrite(path, movie.data, imagej=True, resolution=(1 / PX_UM, 1 / PX_UM),
                     metadata={"axes": "TYX", "unit": "um", "finterval": DT_S})
    raw = _analyse(path, tmp_path / "s0", "--smooth", "0")
    wide = _analyse(path, tmp_path / "s60", "--smooth", "60")
    default = _analyse(path, tmp_path / "default")
    assert raw["analysis"]["smoothing_sigma_um"] == 0.0
    assert wide["analysis"]["smoothing_sigma_um"] == pytest.approx(60.0)
    assert wide["analysis"]["grid"]["pixel_size_um"] == 20.0

    def inner_median(out):
        amp = tifffile.imread(out / "amplitude.tif")
        return float(np.nanmedian(amp[12:-12, 12:-12]))

    want = math.exp(-2 * math.pi**2 * 60.0**2 / 600.0**2)
    # achieved 0.8200 (-0.1 %), tolerance 0.5 %
    assert inner_median(tmp_path / "s60") / inner_median(tmp_path / "s0") == pytest.approx(want, rel=0.005)
    # the default (wavelength / 12: 53 um here) is another sigma, and another factor
    sigma = default["analysis"]["smoothing_sigma_um"]
    assert abs(sigma - 60.0) > 5.0
    assert abs(inner_median(tmp_path / "default") / inner_median(tmp_path / "s0") - want) > 0.02
    # smoothing must not change the period: truth 6 min, achieved +0.4 % on this 40 min movie
    # with or without smoothing, tolerance 1.5 %
    for s in (raw, wide):
        assert s["period_min"]["median"] == pytest.approx(6.0, rel=0.015)


# --------------------------------------------------------------------------- --no-flatten


def test_amplitude_is_relative_with_and_without_flatten(tmp_path):
    # truth: the renderer's static gain (illumination only: no texture), spanning 0.6..1
    # (waves.render); a plane wave has the same band amplitude everywhere.  The amplitude map
    # is in units of the local mean brightness (fractional modulation), so it is a constant
    # whether the movie was flattened or not (in counts, unflattened, it followed the gain:
    # 1st-99th percentile ratio 1.34, correlation 0.98 with the gain)
    style = DarkfieldStyle(noise=0.01, texture=0.0, illumination=0.4, drift=0.0)
    movie = _movie((120, 128, 128), [S.PlanarSource(30.0, 6.0)], style=style, seed=5)
    gain = DarkfieldRenderer((128, 128), style=style, seed=5).gain_yx
    path = tmp_path / "vignette.tif"
    tifffile.imwrite(path, movie.data, imagej=True, resolution=(1 / PX_UM, 1 / PX_UM),
                     metadata={"axes": "TYX", "unit": "um", "finterval": DT_S})
    spread = {}
    for tag, extra in (("flat", ()), ("raw", ("--no-flatten",))):
        s = _analyse(path, tmp_path / tag, *extra)
        assert s["analysis"]["options"]["flatten"] is (tag == "flat")
        amp = tifffile.imread(tmp_path / tag / "amplitude.tif")
        f = s["analysis"]["grid"]["bin"]
        g = gain.reshape(128 // f, f, 128 // f, f).mean(axis=(1, 3))
        inner = np.zeros(amp.shape, bool)
        inner[3:-3, 3:-3] = np.isfinite(amp[3:-3, 3:-3])  # filter edges aside
        a, g = amp[inner], g[inner]
        lo, hi = np.percentile(a, [1, 99])
        glo, ghi = np.percentile(a / g, [1, 99])
        spread[tag] = (hi / lo, ghi / glo, np.corrcoef(a, g)[0, 1])
    # flattened and not: the amplitude is even (achieved 1st-99th percentile ratio 1.07 both;
    # the gain's own is 1.6), tolerance 1.15
    assert spread["flat"][0] < 1.15
    assert spread["raw"][0] < 1.15


# --------------------------------------------------------------------------- --phase delay


def test_phase_delay_finds_the_same_truth(spiral_path, tmp_path):
    s = _analyse(spiral_path, tmp_path / "delay", "--phase", "delay")
    assert s["analysis"]["phase_method"] == "delay"
    # a quarter period: 6 min = 18 frames of 20 s, 4.5 frames, rounded from the measured
    # dominant period either way
    assert s["analysis"]["delay_lag_frames"] in (4, 5)
    # truth from waves.synthetic: period 6 min (achieved 0.03 %, tolerance 0.1 %), core
    # (915, 995) um with charge -1 (achieved 0 um, tolerance 10 um), the exact local front
    # speed (achieved -0.03 %; -0.12 % with the analytic-signal phase; tolerance 0.5 %)
    assert s["period_min"]["median"] == pytest.approx(6.0, rel=1e-3)
    core = _core(s)
    assert core["charge"] == -1 and core["rotation"] == "counterclockwise"
    assert math.hypot(core["x_um"] - 915.0, core["y_um"] - 995.0) < 10.0
    assert abs(_speed_error(tmp_path / "delay", s, 915.0, 995.0)) < 0.005
    default = _analyse(spiral_path, tmp_path / "hilbert")
    assert default["analysis"]["phase_method"] == "hilbert" and default["analysis"]["delay_lag_frames"] is None


# --------------------------------------------------------------------------- --register


def test_register_puts_a_drifted_core_back_where_it_is(tmp_path):
    # truth: a charge +1 spiral at (655, 635) um (waves.synthetic) recorded by a camera whose
    # field slides away in the last 40 % of the movie, up to (dy, dx) = (4, -6) px, applied
    # with scipy.ndimage.shift; more than half the frames are unshifted, so the temporal
    # median the registration aligns to is the true frame
    nt, n = 120, 128
    movie = _movie((nt, n, n), [S.SpiralSource(655.0, 635.0, 6.0, charge=1)], seed=8)
    ramp = np.clip((np.arange(nt) - 0.6 * nt) / (0.4 * nt - 1), 0.0, 1.0)
    drift = np.stack([4.0 * ramp, -6.0 * ramp], axis=1)
    data = np.empty_like(movie.data)
    for i in range(nt):
        moved = scipy.ndimage.shift(movie.data[i].astype(np.float32), drift[i], order=1, mode="nearest")
        data[i] = np.clip(np.rint(moved), 0, 255).astype(np.uint8)
    path = tmp_path / "drifted.tif"
    tifffile.imwrite(path, data, imagej=True, resolution=(1 / PX_UM, 1 / PX_UM),
                     metadata={"axes": "TYX", "unit": "um", "finterval": DT_S})

    def worst_core_offset(out) -> float:
        lines = (out / "cores_per_frame.csv").read_text().splitlines()
        header = lines[0].split(",")
        ix, iy = header.index("x_um"), header.index("y_um")
        pts = np.array([[float(v.split(",")[ix]), float(v.split(",")[iy])] for v in lines[1:]])
        return float(np.hypot(pts[:, 0] - 655.0, pts[:, 1] - 635.0).max())

    s = _analyse(path, tmp_path / "reg", "--register")
    assert s["analysis"]["options"]["register"] is True
    core = _core(s)
    assert core["charge"] == 1
    # achieved: every frame's core on the truth (0 um; it sits on a plaquette centre of the
    # 20 um grid), tolerance 10 um, half a grid pixel
    assert worst_core_offset(tmp_path / "reg") < 10.0
    assert math.hypot(core["x_um"] - 655.0, core["y_um"] - 635.0) < 10.0  # achieved 0 um
    # the same stack with registration forbidden: the core follows the drift (achieved 57 um)
    s = _analyse(path, tmp_path / "noreg", "--no-register")
    assert s["drift"]["corrected"] is False and any("drift" in w for w in s["warnings"])
    assert worst_core_offset(tmp_path / "noreg") > 40.0
    # by default the drift (7.2 px, well over a quarter pixel) is measured and corrected
    s = _analyse(path, tmp_path / "auto")
    assert s["drift"]["corrected"] is True
    assert worst_core_offset(tmp_path / "auto") < 10.0


# --------------------------------------------------------------------------- --memory-mb


def test_a_small_memory_budget_gives_the_same_results(spiral_path, tmp_path, monkeypatch):
    import waves.analyse.clean as C  # patch targets: where each name is looked up
    import waves.analyse.pipeline as P

    seen = {"in_memory": [], "rows": []}
    movie_init, strip_rows = C._Movie.__init__, P._strip_rows

    def spy_init(self, shape, *, in_memory, folder):
        seen["in_memory"].append(in_memory)
        movie_init(self, shape, in_memory=in_memory, folder=folder)

    def spy_rows(*args):
        seen["rows"].append(strip_rows(*args))
        return seen["rows"][-1]

    monkeypatch.setattr(C._Movie, "__init__", spy_init)
    monkeypatch.setattr(P, "_strip_rows", spy_rows)
    big = _analyse(spiral_path, tmp_path / "big", "--memory-mb", "400")
    small = _analyse(spiral_path, tmp_path / "small", "--memory-mb", "1")
    # 400 MB holds the cleaned 160 x 80 x 80 float32 movie (4 MB) and all 80 rows in one
    # strip; 1 MB sends it to a scratch file and cuts the rows into strips of a few (4)
    assert seen["in_memory"] == [True, False]
    assert seen["rows"][0] == 80 and seen["rows"][1] <= 10
    assert not list((tmp_path / "small").glob(".waves-scratch-*"))
    assert big["analysis"]["options"]["memory_budget_mb"] == 400.0
    assert small["analysis"]["options"]["memory_budget_mb"] == 1.0
    # the same numbers: each pixel's measures do not depend on the strip it is computed in
    # (3 halo rows); only float32 summation order may differ
    for key in ("period_min", "front_speed_um_per_min", "wavelength_um"):
        for q in ("median", "q25", "q75"):
            assert small[key][q] == pytest.approx(big[key][q], rel=1e-5)
        assert small[key]["n"] == big[key]["n"]
    assert small["spiral_cores"] == big["spiral_cores"]
    for name in ("period_min.tif", "front_speed_um_per_min.tif"):
        np.testing.assert_allclose(tifffile.imread(tmp_path / "small" / name),
                                   tifffile.imread(tmp_path / "big" / name), rtol=1e-5)
    # and both the truth (waves.synthetic): core (915, 995) um
    assert math.hypot(_core(small)["x_um"] - 915.0, _core(small)["y_um"] - 995.0) < 10.0


# --------------------------------------------------------------------------- --zslice


def test_zslice_picks_the_plane_that_carries_the_waves(tmp_path, capsys):
    # an ImageJ hyperstack (t, z, y, x) of three planes: z = 1 carries a charge -1 spiral
    # (waves.synthetic), z = 0 and z = 2 only camera noise about the same background
    nt, n = 120, 128
    movie = _movie((nt, n, n), [S.SpiralSource(635.0, 655.0, 6.0, charge=-1)], seed=9)
    rng = np.random.default_rng(11)
    stack = np.empty((nt, 3, n, n), np.uint8)
    level = float(movie.data.mean())
    for z in (0, 2):
        stack[:, z] = np.clip(np.rint(rng.normal(level, 5.0, (nt, n, n))), 0, 255).astype(np.uint8)
    stack[:, 1] = movie.data
    path = tmp_path / "hyper.tif"
    tifffile.imwrite(path, stack, imagej=True, resolution=(1 / PX_UM, 1 / PX_UM),
                     metadata={"axes": "TZYX", "unit": "um", "finterval": DT_S})
    s = _analyse(path, tmp_path / "z1", "--zslice", "1")
    assert s["analysis"]["read"]["zslice"] == 1 and s["source"]["shape_tyx"] == [nt, n, n]
    # truth: period 6 min (achieved 0.4 %, tolerance 1.5 % on this 40-min movie), core
    # (635, 655) um charge -1 (achieved 0 um, tolerance 10 um)
    assert s["period_min"]["median"] == pytest.approx(6.0, rel=0.015)
    core = _core(s)
    assert core["charge"] == -1
    assert math.hypot(core["x_um"] - 635.0, core["y_um"] - 655.0) < 10.0
    # a plane of noise holds no waves
    noise = _analyse(path, tmp_path / "z0", "--zslice", "0")
    assert noise["period_min"] is None and noise["spiral_cores"] == []
    assert any("no waves detected" in w for w in noise["warnings"])
    # without a choice the three planes are refused, naming the option
    capsys.readouterr()
    assert main(["analyse", str(path), "--out", str(tmp_path / "none"), "--quiet", "--no-report"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--zslice" in err[0]


# --------------------------------------------------------------------------- exit 1


def test_an_internal_error_exits_1_in_one_line_and_debug_reraises(spiral_path, tmp_path, monkeypatch, capsys):
    import waves.analyse

    def broken(*args, **kwargs):
        raise RuntimeError("strip kernel lost its halo")

    monkeypatch.setattr(waves.analyse, "analyse_movie", broken)
    out = tmp_path / "res"
    assert main(["analyse", str(spiral_path), "--out", str(out), "--quiet", "--no-report"]) == 1
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in err
    assert lines[0].startswith("waves: internal error: RuntimeError: strip kernel lost its halo")
    assert "--debug" in lines[0]
    assert not (out / "summary.json").exists()
    with pytest.raises(RuntimeError, match="lost its halo"):
        main(["--debug", "analyse", str(spiral_path), "--out", str(out), "--quiet", "--no-report"])


def test_a_frame_step_and_bin_keep_file_frame_numbers_and_times(spiral_path, tmp_path):
    from waves import io
    from waves.result import analyse_file, read_table_csv

    # by hand: frames 30, 32, ... of 20 s frames start 10 min into the file; a 2 x 2 bin
    # centres pixel (0, 0) half a file pixel (5 um) in
    stack = io.read_stack(spiral_path, frames=(30, 160, 2), bin=2)
    assert (stack.first_frame, stack.frame_step, stack.bin) == (30, 2, 2)
    assert stack.start_min == pytest.approx(10.0) and stack.origin_um == pytest.approx(5.0)
    s = analyse_file(spiral_path, out=tmp_path / "step", frames=(30, 160, 2), bin=2).summary
    cores = read_table_csv(tmp_path / "step" / "cores_per_frame.csv")
    frames = np.asarray(cores["frame"], dtype=int)
    assert frames.min() >= 30 and np.all((frames - 30) % 2 == 0)
    np.testing.assert_allclose(np.asarray(cores["t_min"], dtype=float), frames * DT_S / 60.0)
    trim = s["analysis"]["trimmed_frames_each_end"]  # in 40 s frames of the selection
    assert _core(s)["first_min"] == pytest.approx(10.0 + trim * 2 * DT_S / 60.0)
    # truth (waves.synthetic): core (915, 995) um, achieved 0 um on the 20 um grid
    assert math.hypot(_core(s)["x_um"] - 915.0, _core(s)["y_um"] - 995.0) < 10.0
