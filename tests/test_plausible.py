"""Unit slips in the calibration (nm typed as um, ms as s) are named in the warnings
(waves.analyse.plausible); an ordinary calibration gets none.  The synthetic field's
true calibration is 10 um per pixel and 20 s per frame (waves.synthetic)."""

from __future__ import annotations

import pytest

from waves import synthetic as S
from waves.analyse import AnalysisOptions, analyse_movie
from waves.analyse.plausible import calibration_warnings, result_warnings
from waves.errors import WavesError
from waves.render import DarkfieldStyle
from waves.units import Calibration


@pytest.fixture(scope="module")
def movie():
    return S.synthetic_movie((120, 64, 64), pixel_size_um=10.0, frame_interval_s=20.0, speed_um_per_min=100.0,
                             sources=[S.TargetSource(320.0, 320.0, 6.0)], style=DarkfieldStyle(noise=0.02), seed=1)


def _slips(a):
    return [w for w in a.summary["warnings"] if "given in" in w or "unit" in w]


def test_true_calibration_draws_no_unit_warning(movie):
    a = analyse_movie(movie.data, calibration=movie.calibration)
    assert _slips(a) == []


def test_pixel_size_in_nm_is_named(movie):
    # 10 um typed as 10000 (nm): a 64-px field 0.64 m wide
    a = analyse_movie(movie.data, calibration=Calibration(10000.0, 20.0, "options", "options"))
    slips = _slips(a)
    assert any("nm" in w and "pixel size" in w for w in slips)
    assert list(a.warnings) == a.summary["warnings"]


def test_frame_interval_in_ms_is_named(movie):
    # 20 s typed as 20000 (ms): the default period band (2-20 min) is finer than the frames
    # (5.6 h apart), and the refusal names the slip
    with pytest.raises(WavesError, match="given in ms"):
        analyse_movie(movie.data, calibration=Calibration(10.0, 20000.0, "options", "options"))
    # with a band the frames can hold, the analysis runs and both warnings name it
    a = analyse_movie(movie.data, calibration=Calibration(10.0, 20000.0, "options", "options"),
                      options=AnalysisOptions(period_band_min=(4000.0, 40000.0)))
    slips = _slips(a)
    assert any("ms" in w and "frame interval" in w for w in slips)
    assert any("period is" in w for w in slips)


def test_bounds_by_themselves():
    assert calibration_warnings(10.0, 20.0, (512, 512)) == []
    assert calibration_warnings(0.01, 20.0, (512, 512))[0].count("mm") >= 1  # a 5-um field: mm typed as um
    assert result_warnings({"period_min": {"median": 6.0}, "front_speed_um_per_min": {"median": 300.0}}) == []
    assert "m/s" in result_warnings({"front_speed_um_per_min": {"median": 3e8}})[0]
    assert "crawl" in result_warnings({"front_speed_um_per_min": {"median": 0.01}})[0]
    assert result_warnings({"period_min": None, "front_speed_um_per_min": None}) == []
