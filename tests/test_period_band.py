"""What a period band can hide (waves.analyse.look.band_warnings), against fields of
known period: a synthetic 8-min sinusoidal spiral (waves.synthetic) and a simulated
Barkley spiral, whose spiky waves have strong harmonics (period from the simulator's
own threshold crossings, run.truth)."""

from __future__ import annotations

import re

import pytest

from waves import synthetic as S
from waves.analyse import AnalysisOptions, analyse_movie
from waves.render import DarkfieldStyle


@pytest.fixture(scope="module")
def eight_min():
    return S.synthetic_movie((240, 96, 96), pixel_size_um=10.0, frame_interval_s=20.0, speed_um_per_min=100.0,
                             sources=[S.SpiralSource(480.0, 480.0, 8.0)], style=DarkfieldStyle(noise=0.02), seed=1)


def _run(m, band):
    return analyse_movie(m.data, calibration=m.calibration, options=AnalysisOptions(period_band_min=band))


def test_default_band_draws_no_band_warning(eight_min):
    a = _run(eight_min, (2.0, 20.0))
    assert a.summary["period_min"]["median"] == pytest.approx(8.0, rel=0.01)
    assert not [w for w in a.warnings if "period band" in w]


def test_band_below_the_waves_names_their_period(eight_min):
    # nothing in 2-6 min; the 8-min waves are named with a band that holds them
    a = _run(eight_min, (2.0, 6.0))
    assert a.summary["period_min"] is None
    (hint,) = [w for w in a.warnings if "outside the period band" in w]
    p = float(re.search(r"signal \(([\d.]+) min\)", hint).group(1))
    assert p == pytest.approx(8.0, rel=0.05)
    lo, hi = (float(v) for v in re.search(r"--period-band ([\d.]+) ([\d.]+)", hint).groups())
    assert lo < 8.0 < hi


def test_period_at_the_band_edge_is_said(eight_min):
    a = _run(eight_min, (2.0, 8.2))
    assert any("upper edge" in w for w in a.warnings)


@pytest.mark.slow
def test_half_period_trap_on_spiky_waves():
    # a band ending below a Barkley spiral's period finds its second harmonic; the warning
    # names the fundamental (the simulator's truth, within the spectral bin of ~3 %)
    from waves.simulate import simulate

    run = simulate("barkley", size=(120, 120), minutes=100.0, frame_interval_s=30.0, seed=3, initial="spiral",
                   rotation="clockwise", render="darkfield", progress=False)
    truth = run.truth["period_min"]["median"]
    a = analyse_movie(run.frames, calibration=run.calibration, options=AnalysisOptions(period_band_min=(2.0, 5.0)))
    assert a.summary["period_min"]["median"] == pytest.approx(truth / 2, rel=0.05)
    (hint,) = [w for w in a.warnings if "second harmonic" in w]
    p = float(re.search(r"a period of ([\d.]+) min", hint).group(1))
    assert p == pytest.approx(truth, rel=0.05)
