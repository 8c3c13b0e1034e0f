"""Whole analyses of fields with a dish edge (half the frame without cells, a bright
rim) and dust specks: nothing is measured outside the cells, speeds stay right up to
the margin, territories count only the cell field; `--mask FILE.tif` through the
command line.  The feature is switched off inside the test once and must then fail.

Truths: the synthetic recording's sources, front speed and
truth.territory_area_in_cells_mm2 / truth.cell_mask (waves.synthetic_recording)."""

from __future__ import annotations

import json

import numpy as np
import pytest

import waves.analyse.pipeline as analyse_pipeline  # patch target: where cell_field is looked up
from waves import io, preprocess
from waves.analyse import analyse_movie
from waves.cli import main
from waves.render import Degradations
from waves.synthetic import TargetSource, synthetic_recording, write_recording

PX, DT, SPEED, PERIOD = 10.0, 15.0, 150.0, 6.0
LAMBDA_UM = SPEED * PERIOD
SOURCES = {
    "line": [(350.0, 450.0), (550.0, 1150.0)],
    "circle": [(550.0, 600.0), (1050.0, 1000.0)],
}


def _rec(edge, seed, *, n=160, nt=160):
    deg = Degradations(dish_edge=edge, dish_line_frac=0.6, dish_radius_frac=0.42, rim_gain=1.5, empty_level=0.1,
                       dust_count=6, read_noise_counts=1.0)
    (x0, y0), (x1, y1) = SOURCES[edge]
    return synthetic_recording(
        (nt, n, n), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
        sources=[TargetSource(x0, y0, PERIOD), TargetSource(x1, y1, PERIOD, phase0=2.0)],
        degradations=deg, seed=seed, background=0.3, dtype="uint16",
    )


def _feature_off(monkeypatch):
    plan, _ = analyse_pipeline.cell_field.plan, analyse_pipeline.cell_field.find

    def no_plan(data, **kw):
        p = plan(data, **kw)
        p.weight = p.coverage = p.user_mask = None
        return p

    def no_field(p, mean_b, **kw):
        z = np.zeros(mean_b.shape, bool)
        return preprocess.CellField(mask=~z, outside=z, specks=z, uncovered=z, source="automatic", bad=None)

    monkeypatch.setattr(analyse_pipeline.cell_field, "plan", no_plan)
    monkeypatch.setattr(analyse_pipeline.cell_field, "find", no_field)


@pytest.mark.parametrize("on", [True, False])
@pytest.mark.parametrize("edge, seed", [("line", 1), ("line", 2), ("circle", 1), ("circle", 3)])
def test_dish_edge_field_measures_only_the_cells(edge, seed, on, monkeypatch):
    if not on:
        _feature_off(monkeypatch)
    rec = _rec(edge, seed)
    a = analyse_movie(rec.data, calibration=rec.calibration)
    s = a.summary
    g = s["analysis"]["grid"]
    f = g["bin"]
    sp = a.maps["front_speed_um_per_min"]
    ny, nx = sp.shape
    # analysis pixel (r, c) sits at recorded pixel r f + (f - 1) / 2
    rr = np.minimum(np.arange(ny) * f + (f - 1) // 2, rec.truth.cell_mask.shape[0] - 1)
    cc = np.minimum(np.arange(nx) * f + (f - 1) // 2, rec.truth.cell_mask.shape[1] - 1)
    cells = rec.truth.cell_mask[np.ix_(rr, cc)]
    measured = np.isfinite(sp)
    gy = (np.arange(ny) * g["pixel_size_um"] + g["origin_y_um"])[:, None]
    gx = (np.arange(nx) * g["pixel_size_um"] + g["origin_x_um"])[None, :]
    near_source = np.zeros(sp.shape, bool)
    for x, y in SOURCES[edge]:
        near_source |= np.hypot(gx - x, gy - y) < 250.0
    far = measured & ~near_source
    err = np.abs(sp[far] / SPEED - 1)
    # within 250 um of a target's source the curvature is too strong for the smoothing
    # correction; a clean field without an edge shows the same there (not this class)
    checks = {
        "no speed outside the cells": not (measured & ~cells).any(),
        "speeds measured": far.sum() >= 10,
        # issue target 10 %; achieved: all but 1 of ~460 pixels (line), all (circle)
        "speeds within 10 %": far.sum() > 0 and np.mean(err <= 0.10) >= 0.99 and err.max() <= 0.25,
        "centre count": len(s["centres"]) == 2,
    }
    truth_area = rec.truth.territory_area_in_cells_mm2[-1]  # synthetic truth (last frame)
    if checks["centre count"]:
        for c in s["centres"]:
            d = [np.hypot(c["x_um"] - x, c["y_um"] - y) for x, y in SOURCES[edge]]
            j = int(np.argmin(d))
            # issue target: within max(300 um, a quarter wavelength); achieved <= 25 um
            checks[f"centre {j} position"] = d[j] <= max(300.0, 0.25 * LAMBDA_UM)
            # issue target 15 %; achieved -2.6 % .. +2.4 %; off: +25 % .. +38 %
            checks[f"territory {j}"] = abs(c["territory_area_mm2"] / truth_area[j] - 1) <= 0.15
    ok = all(checks.values())
    assert ok == on, checks
    if on:
        cf = s["cell_field"]
        assert cf["source"] == "automatic"
        assert abs(cf["mask_fraction"] - cells.mean()) < 0.05  # synthetic truth: cell fraction
        assert cf["excluded"]["outside"] > 0 and cf["margin_um"] > 0
        assert any("outside the cell field" in n for n in s["analysis"]["notes"])
        assert a.maps["cell_mask"].shape == sp.shape


def test_clean_field_has_an_empty_cell_field_block():
    # a field of cells without an edge: nothing excluded, no note (synthetic truth: all cells)
    rec = synthetic_recording(
        (128, 96, 96), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
        sources=[TargetSource(400.0, 500.0, PERIOD)], degradations=Degradations(read_noise_counts=1.0),
        seed=2, background=0.3, dtype="uint16",
    )
    a = analyse_movie(rec.data, calibration=rec.calibration)
    cf = a.summary["cell_field"]
    assert cf["mask_fraction"] == 1.0 and cf["margin_um"] == 0.0
    assert cf["excluded"] == {"outside": 0, "saturated": 0, "dead": 0, "specks": 0}
    assert not any("cell field" in n for n in a.summary["analysis"]["notes"])


@pytest.fixture(scope="module")
def edge_file(tmp_path_factory):
    rec = _rec("line", 3, n=120, nt=120)
    d = tmp_path_factory.mktemp("edge")
    path = write_recording(rec, d / "edge.ome.tif")
    mask = d / "cells.tif"
    io.write_map(mask, rec.truth.cell_mask.astype(np.uint8), pixel_size_um=PX)
    return rec, d, path, mask


def test_mask_file_through_the_cli(edge_file, tmp_path):
    rec, d, path, mask = edge_file
    out = tmp_path / "res"
    assert main(["analyse", str(path), "--out", str(out), "--mask", str(mask), "--quiet", "--no-report"]) == 0
    s = json.loads((out / "summary.json").read_text())
    cf = s["cell_field"]
    assert cf["source"] == "file"
    # the mask file is the synthetic truth: the field fraction follows it
    assert abs(cf["mask_fraction"] - rec.truth.cell_mask.mean()) < 0.03
    written = io.read_map(out / "cell_mask.tif").data
    assert written.ndim == 2 and set(np.unique(written).tolist()) <= {0, 1}
    assert "cell_mask.tif" in s["files"]
    sp = io.read_map(out / "front_speed_um_per_min.tif").data
    assert not np.isfinite(sp[written == 0]).any()


@pytest.mark.parametrize(
    "bad, needle",
    [
        (lambda n: np.ones((n - 4, n), np.uint8), "frames are"),
        (lambda n: np.zeros((n, n), np.uint8), "all zero"),
        (lambda n: np.ones((3, n, n), np.uint8), "images"),
    ],
)
def test_bad_mask_files_exit_2(edge_file, tmp_path, capsys, bad, needle):
    rec, d, path, _ = edge_file
    n = rec.data.shape[1]
    mask = tmp_path / "bad.tif"
    arr = bad(n)
    if arr.ndim == 2:
        io.write_map(mask, arr, pixel_size_um=PX)
    else:
        io.write_stack(mask, arr, calibration=rec.calibration)
    assert main(["analyse", str(path), "--out", str(tmp_path / "res"), "--mask", str(mask), "--quiet",
                 "--no-report"]) == 2
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert "Traceback" not in err and len(lines) == 1 and lines[0].startswith("waves: error:")
    assert needle in lines[0]
