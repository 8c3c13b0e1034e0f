"""`waves analyse` through the command line: the output contract, bad input,
nothing lost on failure."""

import hashlib
import json
import subprocess
import sys

import numpy as np
import pytest
import tifffile

from waves import synthetic as S
from waves.cli import main
from waves.render import DarkfieldStyle

CONTRACT_KEYS = {
    "schema_version", "source", "calibration", "period_min", "front_speed_um_per_min", "wavelength_um",
    "period_timecourse", "spiral_cores", "centres", "warnings",
}


@pytest.fixture(scope="module")
def spiral_movie():
    # truth: period 6 min, 100 um/min, charge -1 at (900, 1000) um (waves.synthetic)
    return S.synthetic_movie(
        (160, 160, 160), pixel_size_um=10.0, frame_interval_s=20.0, speed_um_per_min=100.0,
        sources=[S.SpiralSource(900.0, 1000.0, 6.0, charge=-1)], style=DarkfieldStyle(noise=0.02), seed=4,
    )


@pytest.fixture
def stack_path(tmp_path, spiral_movie, imagej_stack):
    return imagej_stack("field.tif", spiral_movie.data, pixel_size_um=10.0, frame_interval_s=20.0)


def test_analyse_writes_the_contract(tmp_path, stack_path, capsys):
    out = tmp_path / "res"
    assert main(["analyse", str(stack_path), "--out", str(out), "--quiet"]) == 0
    assert "period" in capsys.readouterr().out
    s = json.loads((out / "summary.json").read_text())
    assert CONTRACT_KEYS <= set(s)
    assert s["schema_version"] == 1
    # provenance: hashlib is the reference for the digest
    assert s["source"]["sha256"] == hashlib.sha256(stack_path.read_bytes()).hexdigest()
    assert s["source"]["shape_tyx"] == [160, 160, 160]
    assert s["calibration"] == {**s["calibration"], "pixel_size_um": 10.0, "frame_interval_s": 20.0, "origin": "imagej"}
    for key in ("period_min", "front_speed_um_per_min", "wavelength_um"):
        assert set(s[key]) == {"median", "q25", "q75", "n"}
    assert s["period_min"]["median"] == pytest.approx(6.0, rel=0.03)
    (core,) = s["spiral_cores"]
    assert set(core) >= {"id", "x_um", "y_um", "charge", "rotation", "first_min", "last_min"}
    assert core["charge"] == -1 and core["rotation"] == "counterclockwise"
    assert all(set(row) == {"t_min", "period_min"} for row in s["period_timecourse"])
    for name in ("cores_per_frame.csv", "core_tracks.csv", "period_timecourse.csv", "dispersion.csv"):
        assert (out / name).read_text().splitlines()[0]
    # maps are calibrated ImageJ TIFFs (tifffile as the reference reader)
    grid_px = s["analysis"]["grid"]["pixel_size_um"]
    with tifffile.TiffFile(out / "period_min.tif") as tif:
        img = tif.asarray()
        xres = tif.pages[0].tags["XResolution"].value
    assert xres[1] / xres[0] == pytest.approx(grid_px)
    assert np.nanmedian(img) == pytest.approx(6.0, rel=0.03)
    assert not list(out.glob(".waves-scratch-*"))


def _one_error_line(capsys):
    err = capsys.readouterr().err
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("waves: error:")
    return lines[0]


def test_failure_keeps_earlier_results(tmp_path, stack_path, capsys):
    out = tmp_path / "res"
    assert main(["analyse", str(stack_path), "--out", str(out), "--quiet"]) == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    capsys.readouterr()
    # 6 frames cannot hold a time series worth analysing
    assert main(["analyse", str(stack_path), "--out", str(out), "--frames", "0:6", "--quiet"]) == 2
    assert "frames" in _one_error_line(capsys)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_missing_calibration_says_how_to_give_it(tmp_path, spiral_movie, tiff_factory, capsys):
    path = tiff_factory("plain.tif", spiral_movie.data)
    out = tmp_path / "res"
    assert main(["analyse", str(path), "--out", str(out), "--quiet"]) == 2
    line = _one_error_line(capsys)
    assert "--pixel-size" in line and "--frame-interval" in line
    assert not (out / "summary.json").exists()
    args = ["analyse", str(path), "--out", str(out), "--quiet", "--pixel-size", "10", "--frame-interval", "20"]
    assert main(args) == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["calibration"]["origin"] == "options"


@pytest.mark.parametrize(
    "make, needle",
    [
        (lambda p: p.write_text("not an image"), "TIFF"),
        (lambda p: tifffile.imwrite(p, np.full((60, 32, 32), 9, np.uint8), imagej=True,
                                    resolution=(0.1, 0.1), metadata={"unit": "um", "finterval": 20.0, "axes": "TYX"}),
         "flat"),
    ],
)
def test_bad_inputs_exit_2(tmp_path, capsys, make, needle):
    path = tmp_path / "bad.tif"
    make(path)
    assert main(["analyse", str(path), "--out", str(tmp_path / "res"), "--quiet"]) == 2
    assert needle.lower() in _one_error_line(capsys).lower()


def test_unresolvable_period_band_exit_2(tmp_path, stack_path, capsys):
    # 20 s frames cannot resolve a 0.5 min period (Nyquist: more than 2 frames per period)
    args = ["analyse", str(stack_path), "--out", str(tmp_path / "r"), "--period-band", "0.5", "10", "--quiet"]
    assert main(args) == 2
    assert "too far apart" in _one_error_line(capsys)


def test_subprocess_exit_code_and_no_traceback(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "waves.cli", "analyse", str(tmp_path / "missing.tif"), "--out", str(tmp_path / "o")],
        capture_output=True, text=True,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and proc.stderr.startswith("waves: error:")


def test_a_command_imports_only_its_own_subsystem():
    # DESIGN.md: the parser imports a subsystem only when its command runs (a fresh
    # interpreter, so that no other test's imports count)
    code = (
        "import sys\n"
        "from waves.cli import main\n"
        "assert main(['analyse', '--help']) == 0\n"
        "heavy = [m for m in ('waves.simulate', 'waves.simulate_cli', 'waves.screen', 'waves.compare', 'numba', "
        "'dask') if m in sys.modules]\n"
        "print('HEAVY:' + ','.join(heavy), file=sys.stderr)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert "--out DIR" in out.stdout
    assert out.stderr.strip().splitlines()[-1] == "HEAVY:", out.stderr
    # and every command still builds and answers --help
    from waves.cli import COMMANDS, main

    for name in COMMANDS:
        assert main([name, "--help"]) == 0, name
    assert main(["no-such-command"]) == 2
