"""`waves simulate` and `waves.simulate.simulate`: files, calibration, sidecar,
reproducibility, masks, and errors."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from waves import __version__
from waves.cli import main
from waves.errors import SimulationError, WavesError
from waves.models import get_model
from waves.models.heterogeneity import Heterogeneity, Ramp
from waves.simulate import period_from_crossings, simulate, upward_crossings


def _pixels(path):
    """Raw pixel bytes of every page, read with tifffile (the reference reader)."""
    with tifffile.TiffFile(path) as tif:
        return b"".join(page.asarray().tobytes() for page in tif.pages)


def _run_small(tmp_path, name, **kw):
    args = dict(size=(48, 56), minutes=8, frame_interval_s=30, seed=3, initial="random",
                noise=0.05, heterogeneity=[Heterogeneity("eps", 0.1, 200.0)])
    args.update(kw)
    return simulate("barkley", out=tmp_path / name, **args)


# ----------------------------------------------------------------- truth helpers


def test_upward_crossings_interpolate_linearly():
    # a sampled sine crosses 0 upward at integer multiples of its period; linear
    # interpolation between samples (exact for these two-point segments)
    t = np.linspace(0, 10, 1001)
    x = np.sin(2 * np.pi * t / 2.5)[:, None]
    (c,) = upward_crossings(x - 0.0, t, 0.0)
    np.testing.assert_allclose(c, [2.5, 5.0, 7.5], atol=1e-3)
    # fed in two chunks, the same crossings
    c1, = upward_crossings(x[:400], t[:400], 0.0)
    c2, = upward_crossings(x[400:], t[400:], 0.0, previous=x[399], previous_time=t[399])
    np.testing.assert_allclose(np.concatenate([c1, c2]), c, atol=1e-12)
    assert period_from_crossings(c) == pytest.approx(2.5, abs=1e-3)
    assert period_from_crossings(c, after=6.0) is None


# ----------------------------------------------------------------- files


def test_same_seed_gives_identical_pixels_and_other_seed_differs(tmp_path):
    # determinism: every random draw is seeded (common practice, no source)
    a = _run_small(tmp_path, "a.tif")
    b = _run_small(tmp_path, "b.tif")
    c = _run_small(tmp_path, "c.tif", seed=4)
    assert _pixels(a.path) == _pixels(b.path)
    assert _pixels(a.path) != _pixels(c.path)
    assert a.frames is None and a.path.exists() and a.sidecar_path.exists()


def test_cli_writes_calibrated_movie_and_sidecar(tmp_path, capsys):
    out = tmp_path / "spiral.tif"
    code = main(["simulate", "barkley", "--out", str(out), "--size", "64", "80",
                 "--minutes", "10", "--frame-interval", "15", "--pixel-size", "40",
                 "--set", "b=0.03", "--quiet"])
    assert code == 0
    with tifffile.TiffFile(out) as tif:
        data = tif.asarray()
        ij = tif.imagej_metadata
        xres = tif.pages[0].tags["XResolution"].value
    # the ImageJ convention: XResolution = pixels per unit, finterval in s
    # (tifffile / ImageJ hyperstack format, from memory)
    assert data.shape == (41, 64, 80) and data.dtype == np.uint16
    assert xres[0] / xres[1] == pytest.approx(1 / 40.0)
    assert ij["finterval"] == pytest.approx(15.0)
    from waves import io

    stack = io.read_stack(out)
    assert stack.calibration.pixel_size_um == pytest.approx(40.0)
    assert stack.calibration.frame_interval_s == pytest.approx(15.0)
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["model"] == "barkley"
    assert side["params"] == {"a": 0.75, "b": 0.03, "eps": 0.02}
    assert side["seed"] == 0 and side["waves_version"] == __version__
    assert side["grid"]["shape_yx_out"] == [64, 80]
    assert side["numerics"]["spacing_model"] == pytest.approx(40.0 / 200.0)
    assert side["numerics"]["steps"] == 40 * side["numerics"]["steps_per_frame"]
    assert side["cell_updates_per_s"] > 0 and side["wall_time_s"] > 0
    assert side["calibration"]["pixel_size_um"] == 40.0
    assert "period_min" in side["truth"] and len(side["truth"]["probes"]) == 16
    # --quiet: no progress bar and no summary; only warnings reach stderr (h = 0.2
    # under-resolves the Barkley front, see the resolution tests below)
    err = capsys.readouterr().err.splitlines()
    assert err == [f"warning: {w}" for w in side["warnings"]]


def test_params_file_and_set_precedence(tmp_path):
    toml = tmp_path / "p.toml"
    toml.write_text("eps = 0.015\nb = 0.05\n")
    out = tmp_path / "m.tif"
    code = main(["simulate", "barkley", "--out", str(out), "--size", "32", "--minutes", "2",
                 "--params", str(toml), "--set", "b=0.01", "--quiet"])
    assert code == 0
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["params"] == {"a": 0.75, "b": 0.01, "eps": 0.015}


@pytest.mark.parametrize(
    "argv, message",
    [
        (["simulate", "nosuchmodel"], "unknown model 'nosuchmodel'"),
        (["simulate", "barkley", "--set", "zeta=1"], "valid names: a, b, eps"),
        (["simulate", "barkley", "--set", "dt=0.0163"], "diffusion limit"),
        (["simulate", "barkley", "--size", "-4"], "positive"),
        (["simulate", "fhn", "--set", "eps=abc"], "not a number"),
        (["simulate", "barkley", "--frame-interval", "0"], "frame interval"),
    ],
)
def test_bad_input_exits_2_with_one_line(tmp_path, capsys, argv, message):
    out = tmp_path / "bad.tif"
    code = main(argv + ["--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "Traceback" not in err
    assert message in err
    assert not out.exists() and not out.with_suffix(".json").exists()


def test_nonfinite_run_raises_simulation_error_naming_the_time(tmp_path):
    out = tmp_path / "blow.tif"
    with pytest.raises(SimulationError, match="non-finite between model time"):
        simulate("barkley", out=out, size=32, minutes=2, noise=1e30)
    assert not out.exists()  # the partial movie was discarded
    assert list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------- output forms


def test_uint16_is_the_documented_scaling_of_float32(tmp_path):
    kw = dict(out=None, size=40, minutes=5, seed=1, initial="random")
    raw = simulate("fhn", dtype="float32", **kw)
    scaled = simulate("fhn", dtype="uint16", **kw)
    lo, hi = get_model("fhn").observable_ranges["u"]
    assert (lo, hi) == (-2.5, 2.5)
    # documented formula: (value - lo) / (hi - lo) * 65535, rounded, clipped
    expect = np.clip(np.rint((raw.frames.astype(np.float64) - lo) / (hi - lo) * 65535), 0, 65535)
    np.testing.assert_array_equal(scaled.frames, expect.astype(np.uint16))
    assert scaled.metadata["output"]["value_range"] == [-2.5, 2.5]


def test_darkfield_rendering_uses_the_renderer_on_scaled_excitation(tmp_path):
    from waves.render import DarkfieldRenderer

    kw = dict(out=None, size=40, minutes=4, seed=2)
    raw = simulate("barkley", dtype="float32", **kw)
    cam = simulate("barkley", render="darkfield", **kw)
    ren = DarkfieldRenderer((40, 40), seed=2)
    expect = ren.movie(np.clip(raw.frames, 0.0, 1.0))
    assert cam.frames.dtype == np.uint8
    np.testing.assert_array_equal(cam.frames, expect)


def test_observable_v_and_unknown_observable():
    res = simulate("barkley", out=None, size=32, minutes=3, dtype="float32", observable="v")
    np.testing.assert_array_equal(res.frames[-1], res.final_state[1])
    with pytest.raises(WavesError, match="no variable 'w'"):
        simulate("barkley", out=None, size=32, minutes=3, observable="w")


# ----------------------------------------------------------------- media


def test_empty_pixels_do_not_fire_and_obstacles_stay_at_rest():
    # module docstring semantics: no cells -> no reaction (u only diffuses, so
    # it decays away from the cells); obstacles -> frozen at rest, no flux
    n = 96
    occ = np.ones((n, n))
    occ[:, 64:] = 0.0
    obstacles = np.zeros((n, n), bool)
    obstacles[10:30, 10:20] = True
    res = simulate("barkley", out=None, size=n, minutes=40, seed=0, initial="target",
                   center_um=(48 * 50.0, 40 * 50.0), occupancy=occ, obstacles=obstacles,
                   dtype="float32")
    assert res.frames[:, :, 30:60].max() > 0.9  # the wave crossed the cells
    assert res.frames[:, :, 72:].max() < 0.5  # 2 model units into the gap: never excited
    np.testing.assert_array_equal(res.frames[:, obstacles], 0.0)
    np.testing.assert_array_equal(res.final_state[1][:, 64:], 0.0)  # v frozen where empty


def test_coarse_pixels_are_oversampled():
    # 100 um pixels are 0.5 model units for Barkley (200 um / unit), twice the
    # default step: the grid is refined x2 and frames are block means
    res = simulate("barkley", out=None, size=40, pixel_size_um=100.0, minutes=3,
                   dtype="float32")
    assert res.metadata["numerics"]["oversample"] == 2
    assert res.metadata["numerics"]["spacing_model"] == pytest.approx(0.25)
    assert res.final_state.shape == (2, 80, 80)
    block = res.final_state[0].reshape(40, 2, 40, 2).mean(axis=(1, 3))
    np.testing.assert_allclose(res.frames[-1], block, rtol=1e-6)


def test_ramp_changes_the_parameter_during_the_run():
    # a flat ramp is no ramp (exact); a real one changes the field
    kw = dict(out=None, size=48, minutes=6, seed=0, dtype="float32")
    plain = simulate("barkley", **kw)
    flat = simulate("barkley", ramps=[Ramp("b", 0.02, 0.02)], **kw)
    ramped = simulate("barkley", ramps=[Ramp("b", 0.02, 0.06)], **kw)
    np.testing.assert_array_equal(plain.frames, flat.frames)
    assert np.abs(ramped.frames[-1] - plain.frames[-1]).max() > 0.01
    assert ramped.metadata["ramps"] == [
        {"param": "b", "start": 0.02, "end": 0.06, "start_min": 0.0, "end_min": None}
    ]
    with pytest.raises(WavesError, match="cannot ramp unknown parameter 'q'"):
        simulate("barkley", out=None, size=16, minutes=1, ramps=[Ramp("q", 0.0, 1.0)])
    with pytest.raises(WavesError, match="reaction limit"):
        # a ramp into a range the given dt cannot integrate is refused before the run
        simulate("barkley", out=None, size=16, minutes=1, params={"dt": 0.01},
                 ramps=[Ramp("eps", 0.02, 0.002)])


def test_cli_heterogeneity_ramp_pacemakers_and_rendering(tmp_path):
    out = tmp_path / "dev.tif"
    code = main(["simulate", "barkley", "--out", str(out), "--size", "48", "--minutes", "6",
                 "--initial", "rest", "--vary", "eps", "0.1", "300", "--ramp", "b", "0.02",
                 "0.04", "--random-pacemakers", "3", "4", "6", "--pacemaker", "1000", "1200",
                 "5", "--render", "darkfield", "--polarity", "dark", "--noise", "0.01",
                 "--quiet"])
    assert code == 0
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["heterogeneity"] == [{"param": "eps", "rel_sd": 0.1, "correlation_um": 300.0}]
    assert side["ramps"][0]["end"] == 0.04
    assert len(side["pacemakers"]) == 4
    assert side["pacemakers"][0] == {"y_um": 1000.0, "x_um": 1200.0, "period_min": 5.0,
                                     "radius_um": None, "first_min": 0.0}
    assert all(4 <= p["period_min"] <= 6 for p in side["pacemakers"][1:])
    assert side["output"]["dtype"] == "uint8"
    assert side["output"]["darkfield_style"]["polarity"] == "dark"
    with tifffile.TiffFile(out) as tif:
        assert tif.series[0].shape == (19, 48, 48) and tif.series[0].dtype == np.uint8


def test_heterogeneity_multiplier_has_the_stated_relative_sd():
    # normalised noise: mean 1, sd rel_sd (exact by construction; the floor at
    # 0.05 is 9.5 sd away here and never reached)
    het = Heterogeneity("eps", 0.1, 250.0)
    m = het.multiplier((128, 160), pixel_size_um=50.0, seed=11)
    assert float(m.mean()) == pytest.approx(1.0, abs=1e-5)
    assert float(m.std()) == pytest.approx(0.1, rel=1e-4)
    with pytest.raises(WavesError, match="cannot vary unknown parameter 'k'"):
        simulate("barkley", out=None, size=16, minutes=1,
                 heterogeneity=[Heterogeneity("k", 0.1, 100.0)])


def test_sites_outside_the_field_and_invalid_ramps_are_refused():
    from waves.models.stimulus import Pacemaker

    with pytest.raises(WavesError, match="pacemaker at .* lies outside the field"):
        simulate("barkley", out=None, size=32, minutes=1,
                 pacemakers=[Pacemaker(100.0, 5000.0, 10.0)])
    with pytest.raises(WavesError, match="centre at .* lies outside"):
        simulate("barkley", out=None, size=32, minutes=1, center_um=(-400.0, 10.0))
    with pytest.raises(WavesError, match="eps must be > 0"):
        simulate("barkley", out=None, size=32, minutes=1, ramps=[Ramp("eps", 0.02, -0.01)])


def test_model_specific_initial_state_hook_and_default_pacing(monkeypatch):
    import dataclasses

    import waves.simulate as sim

    base = get_model("barkley")
    seen = {}

    def hook(params, shape_yx, *, spacing, kind, rotation, center_yx, rng, dt, diffusion):
        seen.update(kind=kind, spacing=spacing, dt=dt)
        if kind != "spiral":
            return None  # fall back to the generic initial conditions
        state = np.zeros((2, *shape_yx), np.float32)
        state[0, :, :3] = 1.0  # a planar wave entering from the left
        return state

    monkeypatch.setattr(sim, "get_model",
                        lambda name: dataclasses.replace(base, initial_state=hook))
    res = sim.simulate("barkley", out=None, size=24, minutes=1, dtype="float32")
    np.testing.assert_array_equal(res.frames[0][:, :3], 1.0)
    np.testing.assert_array_equal(res.frames[0][:, 3:], 0.0)
    assert seen["kind"] == "spiral" and seen["spacing"] == pytest.approx(0.25)
    assert seen["dt"] == pytest.approx(res.metadata["numerics"]["dt_model"])
    res = sim.simulate("barkley", out=None, size=24, minutes=1, initial="pacing")
    assert seen["kind"] == "pacing"
    # default pacing: one site at the centre every 10 model time units
    # (130 s each by default) -> 21.67 min
    (pm,) = res.metadata["pacemakers"]
    assert pm["period_min"] == pytest.approx(10 * 130.0 / 60.0)
    assert (pm["y_um"], pm["x_um"]) == pytest.approx((11.5 * 50.0, 11.5 * 50.0))


# ----------------------------------------------------------------- grid resolution


def test_under_resolved_front_warns_and_a_resolved_run_does_not(tmp_path, capsys):
    # Barkley at h = 0.25: front about 0.2 units wide, its speed about 6-7 % slow
    # (1-D estimate at h and h/2, Richardson; checked against the exact Nagumo speed and
    # finer grids in test_models_convergence.py).  At oversample 2 (h = 0.125) the
    # error is about a quarter, 1.8 % < 2 %
    coarse = tmp_path / "coarse.tif"
    assert main(["simulate", "barkley", "--out", str(coarse), "--size", "32", "--minutes", "2",
                 "--quiet", "--no-truth-analysis"]) == 0
    side = json.loads(coarse.with_suffix(".json").read_text())
    res = side["numerics"]["front_resolution"]
    assert res["estimated"] and res["spacing_model"] == pytest.approx(0.25)
    assert -0.08 < res["speed_rel_error"] < -0.05
    assert len(side["warnings"]) == 1
    w = side["warnings"][0]
    assert "under-resolves the barkley front" in w
    assert f"{abs(res['speed_rel_error']):.1%} slow" in w
    assert "0.125 (25 um)" in w and "--oversample 2" in w
    assert capsys.readouterr().err.splitlines() == [f"warning: {w}"]

    fine = tmp_path / "fine.tif"
    assert main(["simulate", "barkley", "--out", str(fine), "--size", "32", "--minutes", "2",
                 "--quiet", "--no-truth-analysis", "--oversample", "2"]) == 0
    side = json.loads(fine.with_suffix(".json").read_text())
    res = side["numerics"]["front_resolution"]
    assert res["spacing_model"] == pytest.approx(0.125)
    assert -0.02 < res["speed_rel_error"] < -0.01
    assert side["warnings"] == []
    assert capsys.readouterr().err == ""
    # the Python API carries the same warnings
    api = simulate("barkley", out=None, size=16, minutes=1, truth_analysis=False)
    assert len(api.warnings) == 1 and "under-resolves" in api.warnings[0]


def test_transient_sets_where_the_ground_truth_period_starts(tmp_path):
    res = simulate("barkley", out=None, size=32, minutes=6, truth_analysis=False,
                   transient_min=4.5)
    assert res.truth["transient_min"] == pytest.approx(4.5)
    assert res.truth["transient_model"] == pytest.approx(4.5 * 60 / 130)
    # default: the first third of the run (module doc)
    res = simulate("barkley", out=None, size=16, minutes=6, truth_analysis=False)
    assert res.truth["transient_min"] == pytest.approx(2.0)
    out = tmp_path / "t.tif"
    assert main(["simulate", "barkley", "--out", str(out), "--size", "16", "--minutes", "3",
                 "--transient", "1.5", "--quiet", "--no-truth-analysis"]) == 0
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["truth"]["transient_min"] == pytest.approx(1.5)
    with pytest.raises(WavesError, match="transient_min"):
        simulate("barkley", out=None, size=16, minutes=2, transient_min=3.0)
