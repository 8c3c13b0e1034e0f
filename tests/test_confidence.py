"""Confidence on the headline numbers (issue 13): 95 % intervals by a two-way
bootstrap over time windows x spatial blocks, their coverage of known truths,
and where they are shown.

Truths: normal variables of known median (numpy), and synthetic recordings
(waves.synthetic_recording) of one spiral or target of known period and speed;
a spiral's front speed is the closed form of tests/synthetic_truth.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from recording_classes import CAMERA, DT, PX
from synthetic_truth import median_truth, spiral_front_speed

from waves.analyse import analyse_movie
from waves.cli_common import summary_lines
from waves.measure.intervals import block_labels, cell_medians, two_way_interval
from waves.render import Degradations
from waves.synthetic import SpiralSource, TargetSource, synthetic_recording


def test_block_labels_tile_the_grid():
    lab, n = block_labels((10, 7), 4)
    assert n == 3 * 2 and lab.shape == (10, 7)
    assert set(np.unique(lab)) == set(range(n))
    assert (lab[:4, :4] == 0).all() and lab[9, 6] == n - 1


def test_cell_medians_ignore_thin_cells():
    lab, n = block_labels((8, 8), 4)
    m = np.full((1, 8, 8), np.nan)
    m[0, :4, :4] = 3.0  # 16 pixels: a median
    m[0, 4, 4] = 9.0  # 1 pixel: too few
    cells = cell_medians(m, lab, n)
    assert cells[0, 0] == 3.0 and np.isnan(cells[0, 3])


def test_two_way_interval_covers_a_known_median():
    # cells = window effect + block effect + noise, all normal with median 0: the interval of
    # the median should hold 0 in about 95 % of tables; 200 tables give a binomial sd of 1.5 %,
    # and the percentile bootstrap of a 6 x 6 table runs a little narrow (Efron & Tibshirani
    # 1993, ch. 13, from memory): 85-99 %
    rng = np.random.default_rng(7)
    hits = 0
    for _ in range(200):
        cells = rng.normal(size=(6, 1)) + rng.normal(size=(1, 6)) + 0.5 * rng.normal(size=(6, 6))
        lo, hi = two_way_interval(cells, n_boot=400, seed=int(rng.integers(1 << 30)))
        hits += lo <= 0.0 <= hi
    assert 0.85 <= hits / 200 <= 0.99


def test_two_way_interval_needs_units():
    assert two_way_interval(np.array([[1.0, np.nan]])) is None


@pytest.mark.slow
def test_intervals_hold_the_truth_in_90_to_99_percent_of_fields():
    # issue 13: over >= 50 seeded fields with known truth the 95 % interval of period and
    # speed holds the truth in 90-99 % of them (measured when written: 96.7 % and 96.7 %
    # of 60 fields)
    hp = hs = 0
    n_fields = 60
    for seed in range(n_fields):
        rng = np.random.default_rng([13, seed])
        period, speed = rng.uniform(5, 8), rng.uniform(100, 200)
        ny, nx = 96, 112
        x0, y0 = rng.uniform(0.3, 0.7) * nx * PX, rng.uniform(0.3, 0.7) * ny * PX
        spiral = seed % 2 == 0
        src = SpiralSource(x0, y0, period, charge=1) if spiral else TargetSource(x0, y0, period)
        rec = synthetic_recording((200, ny, nx), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=speed,
                                  sources=[src], degradations=Degradations(**CAMERA), seed=seed)
        a = analyse_movie(rec.data, calibration=rec.calibration, times_s=rec.times_s)
        c = a.summary["confidence"]
        truth_speed = median_truth(a, spiral_front_speed(a, x0, y0, speed, speed * period)) if spiral else speed
        lo, hi = c["period_min"]["ci95"]
        hp += lo <= period <= hi
        lo, hi = c["front_speed_um_per_min"]["ci95"]
        hs += lo <= truth_speed <= hi
    assert 0.90 <= hp / n_fields <= 0.99, hp
    assert 0.90 <= hs / n_fields <= 0.99, hs


def test_intervals_are_in_the_summary_and_the_terminal_lines():
    ny, nx = 96, 112
    rec = synthetic_recording((200, ny, nx), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=150.0,
                              sources=[TargetSource(0.5 * nx * PX, 0.5 * ny * PX, 6.0)],
                              degradations=Degradations(**CAMERA), seed=1)
    s = analyse_movie(rec.data, calibration=rec.calibration, times_s=rec.times_s).summary
    c = s["confidence"]
    for key in ("period_min", "front_speed_um_per_min", "wavelength_um"):
        lo, hi = c[key]["ci95"]
        assert lo <= s[key]["median"] <= hi or abs(s[key]["median"] - 0.5 * (lo + hi)) < (hi - lo)
    assert c["blocks"] >= 2 and c["windows"] >= 2
    assert [t["id"] for t in c["centres"]] == [x["id"] for x in s["centres"]]
    lines = "\n".join(summary_lines(s))
    assert "95 % interval" in lines and "beats red noise" in lines
