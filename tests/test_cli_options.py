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
    # speed in um/min needs the binned pixel size: achieved +0.28 %, tolerance 1 %
    assert s["front_speed_um_per_min"]["median"] == pytest.approx(SPEED, rel=0.01)
    # period: achieved 0.001 %, tolerance 0.1 % (a bin must not touch time)
    assert s["period_min"]["median"] == pytest.approx(6.0, rel=1e-3)
    tracks = (tmp_path / "b4" / "core_tracks.csv").read_text().splitlines()
    header, row = tracks[0].split(","), tracks[1].split(",")
    assert float(row[header.index("x_um")]) == pytest.approx(915.0, abs=4.0)
