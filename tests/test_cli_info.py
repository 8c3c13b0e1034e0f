"""`waves info` in-process and as a subprocess: what it prints and how it fails.

Truths: the shape and calibration written by tifffile in each test, the field
size and duration computed here from them, and the exit-code contract of
DESIGN.md (0 done, 2 bad input with one 'waves: error:' line, no traceback).
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
import tifffile

from waves.cli import main

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _one_error_line(err: str) -> None:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("waves: error:"), err
    assert "Traceback" not in err


def test_info_prints_shape_calibration_duration_and_field(imagej_stack, capsys):
    data = np.zeros((120, 200, 300), np.uint8)
    path = imagej_stack("movie.tif", data, pixel_size_um=2.5, frame_interval_s=20.0)
    assert main(["info", str(path)]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    assert "120 x 200 x 300" in out
    assert "2.5 um" in out and "(from imagej)" in out
    assert "20 s" in out
    # duration = 120 frames x 20 s = 40 min; field = 300 x 2.5 um by 200 x 2.5 um (computed here)
    assert f"{120 * 20 / 60:.1f} min" in out
    assert f"{300 * 2.5 / 1000:.2f} mm x {200 * 2.5 / 1000:.2f} mm" in out
    assert "memory-mapped" in out


def test_info_options_override_and_origin(imagej_stack, capsys):
    path = imagej_stack("movie.tif", np.zeros((5, 8, 8), np.uint16), pixel_size_um=2.5,
                        frame_interval_s=20.0)
    assert main(["info", str(path), "--pixel-size", "0.5", "--frame-interval", "6"]) == 0
    out = capsys.readouterr().out
    assert "0.5 um  (from options)" in out and "6 s  (from options)" in out
    assert f"{5 * 6 / 60:.1f} min" in out


def test_info_reports_missing_calibration_without_failing(tmp_path, capsys):
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, np.zeros((4, 8, 8), np.uint8), photometric="minisblack")
    assert main(["info", str(path)]) == 0
    out, err = capsys.readouterr()
    assert "MISSING" in out and "--pixel-size" in out
    assert err == ""


def test_info_hyperstack_channel_option(imagej_stack, capsys):
    data = np.zeros((4, 2, 8, 8), np.uint8)
    path = imagej_stack("h.tif", data, pixel_size_um=1.0, frame_interval_s=1.0, axes="TCYX")
    assert main(["info", str(path)]) == 2
    _one_error_line(capsys.readouterr().err)
    assert main(["info", str(path), "--channel", "1"]) == 0
    assert "4 x 8 x 8" in capsys.readouterr().out


def _bad_inputs(tmp_path):
    missing = tmp_path / "missing.tif"
    text = tmp_path / "notes.tif"
    text.write_text("not an image\n")
    full = tmp_path / "full.tif"
    tifffile.imwrite(full, np.arange(10 * 32 * 32, dtype=np.uint16).reshape(10, 32, 32),
                     imagej=True, metadata={"axes": "TYX"})
    truncated = tmp_path / "truncated.tif"
    truncated.write_bytes(full.read_bytes()[: full.stat().st_size // 2])
    single = tmp_path / "single.tif"
    tifffile.imwrite(single, np.zeros((16, 16), np.uint8))
    nan = tmp_path / "nan.tif"
    values = np.ones((4, 8, 8), np.float32)
    values[2, 0, 0] = np.nan
    tifffile.imwrite(nan, values, imagej=True, metadata={"axes": "TYX"})
    return {
        "missing": ([str(missing)], "no such file"),
        "not_tiff": ([str(text)], "not a TIFF"),
        "truncated": ([str(truncated)], "truncated"),
        "single_image": ([str(single)], "single 2-D image"),
        "nan": ([str(nan)], "NaN"),
        "negative_pixel_size": ([str(full), "--pixel-size", "-1"], "positive"),
    }


@pytest.mark.parametrize(
    "case", ["missing", "not_tiff", "truncated", "single_image", "nan", "negative_pixel_size"]
)
def test_info_bad_input_exit_2_one_line(tmp_path, capsys, case):
    argv, fragment = _bad_inputs(tmp_path)[case]
    assert main(["info", *argv]) == 2
    out, err = capsys.readouterr()
    _one_error_line(err)
    assert fragment in err
    assert out == ""


def test_info_subprocess_exit_code_and_no_traceback(tmp_path):
    bad = tmp_path / "bad.tif"
    bad.write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(32))
    env = dict(os.environ, PYTHONPATH=REPO)
    proc = subprocess.run(
        [sys.executable, "-m", "waves.cli", "info", str(bad)],
        capture_output=True, text=True, env=env, timeout=120, check=False,
    )
    assert proc.returncode == 2
    _one_error_line(proc.stderr)
    assert "not a TIFF" in proc.stderr
