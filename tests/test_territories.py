"""Centres and territories against fields of known truth."""

import numpy as np
import pytest
from scipy.spatial import cKDTree

from waves import synthetic as S
from waves.analyse import analyse_movie
from waves.measure.territories import fill_gaps, find_territories
from waves.models.stimulus import Pacemaker
from waves.render import DarkfieldStyle
from waves.simulate import simulate

PX, DT, SPEED, PERIOD = 10.0, 20.0, 100.0, 6.0
WAVELENGTH = SPEED * PERIOD


def _voronoi_areas(shape, centres_rc):
    # truth: nearest-source labels (scipy.spatial.cKDTree as the reference)
    rr, cc = np.mgrid[0 : shape[0], 0 : shape[1]]
    _, idx = cKDTree(np.asarray(centres_rc)).query(np.stack([rr.ravel(), cc.ravel()], axis=1))
    return np.bincount(idx, minlength=len(centres_rc))


def test_exact_direction_field_two_targets():
    # exact radial propagation away from the nearer of two sources
    ny, nx = 60, 90
    rr, cc = np.mgrid[0:ny, 0:nx].astype(float)
    src = np.array([[30.0, 20.0], [30.0, 70.0]])
    near = np.argmin([np.hypot(rr - r, cc - c) for r, c in src], axis=0)
    dr = rr - src[near, 0]
    dc = cc - src[near, 1]
    direction = np.arctan2(-dr, dc)  # counterclockwise as displayed from +x
    t = find_territories(direction, np.ones((ny, nx), bool), merge_radius_px=3.0)
    assert t.n_centres == 2
    order = np.argsort(t.cols)
    np.testing.assert_allclose(np.stack([t.rows, t.cols], 1)[order], src, atol=1.0)
    labels = fill_gaps(t.labels, np.ones((ny, nx), bool))
    truth = near + 1
    # label ids follow territory size; compare as partitions
    agree = max(np.mean(labels == truth), np.mean(labels == 3 - truth))
    assert agree > 0.97


def test_in_phase_targets_give_voronoi_territories():
    # equal periods and phases: the nearest source wins (waves.synthetic truth)
    sources = [S.TargetSource(500.0, 600.0, PERIOD), S.TargetSource(1500.0, 500.0, PERIOD),
               S.TargetSource(1000.0, 1500.0, PERIOD)]
    shape = (200, 200, 200)
    m = S.synthetic_movie(shape, pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED, sources=sources,
                          style=DarkfieldStyle(noise=0.02), seed=2)
    s = analyse_movie(m.data, calibration=m.calibration).summary
    centres = s["centres"]
    assert len(centres) == 3 and {c["kind"] for c in centres} == {"target"}
    truth_rc = [(src.y_um / PX, src.x_um / PX) for src in sources]
    truth_area = _voronoi_areas(shape[1:], truth_rc) * (PX * PX * 1e-6)
    for src, area in zip(sources, truth_area, strict=True):
        c = min(centres, key=lambda c: np.hypot(c["x_um"] - src.x_um, c["y_um"] - src.y_um))
        assert np.hypot(c["x_um"] - src.x_um, c["y_um"] - src.y_um) < WAVELENGTH / 10
        assert c["territory_area_mm2"] == pytest.approx(area, rel=0.10)
        assert c["period_min"] == pytest.approx(PERIOD, rel=0.03)


def test_spiral_and_target_in_one_field():
    # the spiral's leftward branch ray reaches the edge in its own territory
    sources = [S.SpiralSource(500.0, 1000.0, PERIOD, charge=1), S.TargetSource(1550.0, 1000.0, PERIOD)]
    m = S.synthetic_movie((200, 200, 200), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                          sources=sources, style=DarkfieldStyle(noise=0.02), seed=5)
    centres = analyse_movie(m.data, calibration=m.calibration).summary["centres"]
    kinds = {c["kind"]: c for c in centres}
    assert set(kinds) == {"spiral", "target"}
    assert np.hypot(kinds["spiral"]["x_um"] - 500.0, kinds["spiral"]["y_um"] - 1000.0) < WAVELENGTH / 10
    assert kinds["spiral"]["rotation"] == "clockwise"
    assert np.hypot(kinds["target"]["x_um"] - 1550.0, kinds["target"]["y_um"] - 1000.0) < WAVELENGTH / 10


def test_relay_faster_pacemaker_takes_over():
    # Martiel-Goldbeter relay medium (waves.models.relay, ke 10/min: excitable);
    # a pacemaker firing every 8 min entrains the field of one firing every 12 min
    run = simulate(
        "relay", size=(100, 100), pixel_size_um=40.0, minutes=120.0, frame_interval_s=30.0,
        params={"ke_per_min": 10.0}, initial="rest", render="darkfield", progress=False, truth_analysis=False,
        pacemakers=[Pacemaker(2000.0, 800.0, 8.0, radius_um=150.0), Pacemaker(2000.0, 3200.0, 12.0, radius_um=150.0)],
    )
    a = analyse_movie(run.frames, calibration=run.calibration)
    centres = a.summary["centres"]
    fast = min(centres, key=lambda c: np.hypot(c["x_um"] - 800.0, c["y_um"] - 2000.0))
    slow = min(centres, key=lambda c: np.hypot(c["x_um"] - 3200.0, c["y_um"] - 2000.0))
    assert fast is not slow
    assert fast["period_min"] == pytest.approx(8.0, rel=0.03)
    course = a.tables["territories_timecourse"]
    share = {cid: course["field_share"][course["centre_id"] == cid] for cid in (fast["id"], slow["id"])}
    # the slow centre is active early, then loses its whole territory
    assert share[slow["id"]].size >= 1 and share[slow["id"]][0] > 0.05
    assert slow["last_min"] < 0.5 * 120.0
    assert share[fast["id"]][-1] > 0.95
    assert fast["territory_area_mm2"] > 0.9 * 16.0  # field 4 mm x 4 mm


def test_obstacle_is_left_out_of_territories():
    # a target pacemaker in a relay field with a disc-shaped obstacle (no cells, no flux)
    ny = nx = 100
    rr, cc = np.mgrid[0:ny, 0:nx]
    obstacle = np.hypot(rr - 50, cc - 60) < 10
    run = simulate(
        "relay", size=(ny, nx), pixel_size_um=40.0, minutes=90.0, frame_interval_s=30.0,
        params={"ke_per_min": 10.0}, initial="rest", render="darkfield", progress=False, truth_analysis=False,
        obstacles=obstacle, pacemakers=[Pacemaker(2000.0, 800.0, 8.0, radius_um=150.0)],
    )
    a = analyse_movie(run.frames, calibration=run.calibration)
    centres = a.summary["centres"]
    assert len(centres) == 1
    c = centres[0]
    assert np.hypot(c["x_um"] - 800.0, c["y_um"] - 2000.0) < 300.0
    labels = a.maps["territory_labels"]
    g = a.summary["analysis"]["grid"]
    # obstacle pixels on the analysis grid (their centres in recorded um)
    yy = (np.arange(labels.shape[0]) * g["pixel_size_um"] + g["origin_y_um"]) / 40.0
    xx = (np.arange(labels.shape[1]) * g["pixel_size_um"] + g["origin_x_um"]) / 40.0
    inside = np.hypot(yy[:, None] - 50, xx[None, :] - 60) < 7
    assert inside.any() and np.mean(labels[inside] == 0) > 0.8
    outside = np.hypot(yy[:, None] - 50, xx[None, :] - 60) > 14
    assert np.mean(labels[outside] == c["id"]) > 0.9
