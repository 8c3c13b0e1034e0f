"""Front speed in fields of many centres: collision lines, centres and edges
kept out, the per-wave estimate beside the phase velocity, speed by territory
and distance (the eikonal relation c = c0 - D kappa, Tyson & Keener 1988).

Truths are waves.synthetic's first-arrival fields: each source's waves travel
at a known speed, a pixel takes the latest wave to reach it (the eikonal
construction), and a source with a curvature coefficient D emits rings whose
arrival time is the exact integral of dr / (c0 - D / r).
"""

import numpy as np
import pytest

from waves import synthetic as S
from waves.analyse import analyse_movie
from waves.analyse import speed_regions as R
from waves.degrade import Degradations
from waves.synthetic_recording import synthetic_recording
from waves.synthetic_sources import TargetSource, travel_delay_min

PX_UM = 20.0
DT_S = 15.0
SPEED = 250.0  # um/min
PERIOD = 6.0  # min: wavelength 1.5 mm, 75 px


def _centres(n, seed, side_um):
    rng = np.random.default_rng(seed)
    pts = []
    while len(pts) < n:
        p = rng.uniform(0.12, 0.88, 2) * side_um
        if all(np.hypot(*(p - q)) > 0.65 * side_um / np.sqrt(n) for q in pts):
            pts.append(p)
    return pts, rng


def _field(n, in_phase, *, seed, noisy, size=320, nt=300):
    pts, rng = _centres(n, seed, size * PX_UM)
    sources = [S.TargetSource(float(x), float(y), PERIOD if in_phase else PERIOD * float(rng.uniform(0.9, 1.1)),
                              phase0=0.0 if in_phase else float(rng.uniform(0, 2 * np.pi))) for x, y in pts]
    deg = (Degradations(texture_contrast=0.3, vignetting=0.3, full_well_e=3000, read_noise_counts=1.5) if noisy
           else Degradations(full_well_e=20000))
    return synthetic_recording((nt, size, size), pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=SPEED,
                               sources=sources, degradations=deg, seed=seed)


@pytest.mark.slow
@pytest.mark.parametrize("n", [2, 3, 4, 6])
@pytest.mark.parametrize("in_phase", [True, False])
@pytest.mark.parametrize("noisy", [False, True])
def test_speed_within_3_percent_in_fields_of_many_centres(n, in_phase, noisy):
    # 2-6 targets in and out of phase (out of phase: periods 0.9-1.1 x, so collision
    # lines sweep), clean or with cell texture, vignetting, shot and read noise.  Truth:
    # every front moves at SPEED.  The bound is the (3 %); achieved on these
    # fields (seed 0): per-wave fits -0.13 to +0.29 %, phase velocity -0.54 to +0.05 %
    # (before the sweeping collision lines were kept out: phase velocity +1.3 %).
    rec = _field(n, in_phase, seed=0, noisy=noisy)
    a = analyse_movie(rec.data, calibration=rec.calibration)
    s = a.summary
    assert len(s["centres"]) == n
    for key in ("front_speed_um_per_min", "front_speed_phase_velocity_um_per_min",
                "front_speed_displacement_um_per_min"):
        assert abs(s[key]["median"] / SPEED - 1) < 0.03, (key, s[key])
    # the margins are stated, in um, tied to the smoothing (3 sigma)
    reg = s["speed_regions"]
    sigma = s["analysis"]["smoothing_sigma_um"]
    assert 3 * sigma <= reg["collision_margin_um"] <= 3 * sigma + s["analysis"]["grid"]["pixel_size_um"]
    assert reg["centre_margin_um"] == reg["collision_margin_um"]


def test_collision_lines_and_centres_are_kept_out_with_the_stated_margin():
    # in-phase targets collide on the perpendicular bisector (closed form); no speed
    # is reported within the stated margin of it nor of a centre
    srcs = [S.TargetSource(1600.0, 3200.0, PERIOD), S.TargetSource(4800.0, 3200.0, PERIOD)]
    rec = synthetic_recording((240, 320, 320), pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=SPEED,
                              sources=srcs, degradations=Degradations(full_well_e=20000), seed=1)
    a = analyse_movie(rec.data, calibration=rec.calibration)
    g = a.summary["analysis"]["grid"]
    sp = a.maps["front_speed_um_per_min"]
    ny, nx = sp.shape
    x = g["origin_x_um"] + g["pixel_size_um"] * np.arange(nx)[None, :] + 0 * np.arange(ny)[:, None]
    y = g["origin_y_um"] + g["pixel_size_um"] * np.arange(ny)[:, None] + 0 * x
    margin = a.summary["speed_regions"]["collision_margin_um"]
    ok = np.isfinite(sp)
    assert ok.mean() > 0.3
    # a square kernel of half side `margin`: its reach across the vertical line is `margin`
    assert np.all(np.abs(x[ok] - 3200.0) > margin - g["pixel_size_um"])
    for s in srcs:
        assert np.all(np.hypot(x[ok] - s.x_um, y[ok] - s.y_um) > margin - g["pixel_size_um"])
    # the report marks what was kept out: the speed map's excluded pixels exist
    assert np.sum(np.isfinite(a.maps["period_min"]) & ~ok) > 0


@pytest.mark.slow
@pytest.mark.parametrize("noisy", [False, True])
def test_two_territories_of_different_speeds_and_the_curvature_effect(noisy):
    # territory A: 200 um/min plane-like rings; territory B: c0 = 300 um/min with the
    # eikonal curvature effect D = 30000 um^2/min (rings at 750 um move at 260 um/min).
    # Truth: c0 and D of each source (waves.synthetic_sources.travel_delay_min).
    # Bounds: c0 within 3 % (the issue's); D within what moves the speed at the
    # smallest fitted radius by 3 % of c0.  Achieved (seed 3), territories B / A: c0 +0.2 /
    # +0.3 % clean, +0.9 / +0.6 % noisy; D 30822 / 860 clean (0.4 % of c0 at r_min),
    # 35823 / 851 noisy (2.7 % / 0.6 %); D's noise on such a field is several thousand
    # um^2/min, and the fit's interval says so.
    srcs = [S.TargetSource(1800.0, 3200.0, PERIOD, speed_um_per_min=200.0),
            S.TargetSource(5000.0, 3000.0, PERIOD, phase0=1.0, speed_um_per_min=300.0, curvature_um2_per_min=30000.0)]
    deg = (Degradations(texture_contrast=0.3, full_well_e=3000, read_noise_counts=1.5) if noisy
           else Degradations(full_well_e=20000))
    rec = synthetic_recording((300, 320, 400), pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=SPEED,
                              sources=srcs, degradations=deg, seed=3)
    a = analyse_movie(rec.data, calibration=rec.calibration)
    by_id = {c["id"]: c for c in a.summary["centres"]}
    found = {}
    for t in a.summary["front_speed_by_territory"]:
        c = by_id[t["centre_id"]]
        src = min(srcs, key=lambda s, c=c: np.hypot(s.x_um - c["x_um"], s.y_um - c["y_um"]))
        found[src.speed_um_per_min] = t
    assert set(found) == {200.0, 300.0}
    for c0, t in found.items():
        e = t["eikonal"]
        assert e is not None and e["bins"] >= R.MIN_BINS
        assert abs(e["plane_wave_speed_um_per_min"] / c0 - 1) < 0.03, (c0, e)
        d_true = 30000.0 if c0 == 300.0 else 0.0
        assert abs(e["curvature_coefficient_um2_per_min"] - d_true) / e["r_min_um"] < 0.03 * c0, (c0, e)
    # the slow territory has no curvature effect: its median is its speed
    assert abs(found[200.0]["median_um_per_min"] / 200.0 - 1) < 0.03


def test_travel_delay_is_the_integral_of_the_eikonal_speed():
    # d T / d r = 1 / (c0 - D / r) (Tyson & Keener 1988, a ring's eikonal speed),
    # checked by numerical differentiation of the closed form (numpy.gradient)
    src = TargetSource(0.0, 0.0, 6.0, speed_um_per_min=300.0, curvature_um2_per_min=30000.0)
    r = np.linspace(210.0, 3000.0, 4000)
    c = 1.0 / np.gradient(travel_delay_min(src, r, 100.0), r)
    np.testing.assert_allclose(c[2:-2], 300.0 - 30000.0 / r[2:-2], rtol=1e-5)
    # no curvature: dist / c, the field's speed when the source has none
    np.testing.assert_allclose(travel_delay_min(TargetSource(0.0, 0.0, 6.0), r, 100.0), r / 100.0)


def test_eikonal_fit_recovers_c0_and_d_and_says_when_it_cannot():
    # exact points of c = c0 - D / r: the least-squares fit is exact (numpy lstsq)
    r = np.array([600.0, 900.0, 1400.0, 2000.0, 3000.0])
    e = R.eikonal_fit(r, 300.0 - 30000.0 / r + np.array([0.5, -0.5, 0.5, -0.5, 0.0]))
    assert e["plane_wave_speed_um_per_min"] == pytest.approx(300.0, rel=0.01)
    assert e["curvature_coefficient_um2_per_min"] == pytest.approx(30000.0, rel=0.05)
    assert e["curvature_coefficient_ci95"][0] < 30000.0 < e["curvature_coefficient_ci95"][1]
    assert e["constrained"]
    assert R.eikonal_fit(r[:3], r[:3]) is None  # too few bins
    # a narrow range of 1/r with scatter: D is not constrained
    rr = np.array([3000.0, 3050.0, 3100.0, 3150.0, 3200.0])
    assert not R.eikonal_fit(rr, 300.0 + np.array([3.0, -3.0, 2.0, -2.0, 1.0]))["constrained"]


def test_front_curvature_of_a_ring_and_a_plane():
    # a ring expanding from its centre has curvature 1 / r; a plane wave 0 (geometry)
    rr, cc = np.mgrid[0:201, 0:201].astype(float)
    theta = np.arctan2(-(rr - 100.0), cc - 100.0)  # displayed angle: +y up = -row
    k = R.front_curvature(theta)
    r = np.hypot(rr - 100.0, cc - 100.0)
    far = (r > 20) & (r < 90)
    np.testing.assert_allclose(k[far], 1.0 / r[far], rtol=0.01)
    assert np.abs(R.front_curvature(np.full((50, 50), 0.7))).max() < 1e-12
    assert R.plane_like(np.full((50, 50), 0.7), wavelength_px=40.0).all()
    assert not R.plane_like(theta, wavelength_px=40.0)[100, 110]  # 10 px from the centre: 4 rad per wavelength


@pytest.mark.slow
def test_dispersion_points_of_a_simulated_field_follow_the_exact_relation(tmp_path):
    # a Barkley medium paced every 12 min at the centre of a 15 mm field; every
    # (window, region) point of dispersion.csv against the plane-wave dispersion
    # relation of the same discrete model (h = 0.25, the simulator's dt) computed on
    # a 1-D ring by waves.dispersion (periodic trains: an independent route, no 2-D
    # field, no analysis), at the point's own period.  Bound 3 % (the issue's).
    # Achieved: median +0.9 %, worst 1.8 % (the first window, the pacemaker's start-up); the
    # median bound (1.5 %) fails a 2 % bias.
    from waves.dispersion import dispersion_curve
    from waves.models.stimulus import Pacemaker
    from waves.simulate import simulate

    n = 300
    run = simulate("barkley", size=(n, n), minutes=200.0, frame_interval_s=30.0, seed=2, initial="rest",
                   pacemakers=[Pacemaker(n * 25.0, n * 25.0, 12.0)], render="darkfield", progress=False)
    a = analyse_movie(run.frames, calibration=run.calibration)
    d = a.tables["dispersion"]
    assert len(d["window"]) >= 20
    curve = dispersion_curve("barkley", converge=False, cache_dir=tmp_path)
    u = curve.in_units(time_scale_s=130.0, length_scale_um=200.0)  # the simulator's scales (waves.models.barkley)
    exact = np.interp(d["period_min"], u["period_min"], u["speed_um_per_min"])
    err = d["speed_um_per_min"] / exact - 1
    assert np.abs(err).max() < 0.03
    assert abs(np.median(err)) < 0.015
