"""Stage drift on every run (waves.analyse.drift_auto) and the first look on
drift-corrected difference frames (waves.analyse.look): against the known truth
of synthetic recordings (waves.synthetic.synthetic_recording: truth.drift_px,
truth.drift_jump_frames, the sources' cores, periods and speed)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import ndimage

from waves import synthetic as S
from waves.analyse import AnalysisOptions, analyse_movie, drift_auto
from waves.analyse.look import _wavelength_look
from waves.analyse.options import PIXELS_PER_WAVELENGTH
from waves.cli import main
from waves.errors import WavesError
from waves.render import Degradations
from waves.report import write_report

PX, DT, SPEED, PERIOD = 10.0, 20.0, 100.0, 6.0  # um, s, um/min, min: wavelength 600 um = 60 px
SEEDS = (0, 1, 2)
CORE_UM = (640.0, 640.0)  # the spiral's core (x, y), synthetic truth
TARGET_UM = (600.0, 680.0)


def _deg(drift: bool = True) -> Degradations:
    # the class: a few px of smooth drift plus one 1.5 px jump, cell texture, camera noise
    return Degradations(texture_contrast=0.3, drift_px=3.0 if drift else 0.0, drift_jump_px=1.5 if drift else 0.0,
                        full_well_e=4000, read_noise_counts=1.0)


def _rec(kind: str, seed: int, *, drift: bool = True, shape=(144, 128, 128)):
    src = [S.SpiralSource(*CORE_UM, PERIOD)] if kind == "spiral" else [S.TargetSource(*TARGET_UM, PERIOD)]
    return S.synthetic_recording(shape, pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                                 sources=src, degradations=_deg(drift), seed=seed)


# ----------------------------------------------------------------- the estimate


@pytest.mark.parametrize("seed", SEEDS)
def test_drift_estimate_matches_the_truth_and_finds_the_jump(seed):
    rec = _rec("spiral", seed, shape=(96, 128, 128))
    truth = rec.truth.drift_px  # synthetic truth, relative to frame 0 like the estimate
    assert np.abs(truth).max() > 2.5 and len(rec.truth.drift_jump_frames) == 1
    est = drift_auto.estimate_coarse_drift(rec.data)
    assert est.reliable
    # within 0.2 px of the recorded grid (the brief; measured 0.02-0.04 px)
    assert np.abs(est.shifts_px - truth).max() < 0.2
    # the jump: its frame exactly, its size within 0.2 px (synthetic truth: 1.5 px plus a little smooth drift)
    (frame, size), = est.jumps
    j = rec.truth.drift_jump_frames[0]
    assert frame == j
    assert size == pytest.approx(float(np.hypot(*(truth[j] - truth[j - 1]))), abs=0.2)


@pytest.mark.parametrize("seed", SEEDS)
def test_sampled_estimate_refines_around_the_jump(seed):
    # every 5th frame matched, the frames between two that differ by more than a smooth drift
    # filled in: the same truth (synthetic) and the same 0.2 px as every frame matched
    rec = _rec("spiral", seed, shape=(96, 128, 128))
    truth = rec.truth.drift_px
    est = drift_auto.estimate_coarse_drift(rec.data, stride=5)
    assert est.reliable
    assert np.abs(est.shifts_px - truth).max() < 0.2
    (frame, size), = est.jumps
    j = rec.truth.drift_jump_frames[0]
    assert frame == j and j % 5 != 0  # the jump falls between two sampled frames
    assert size == pytest.approx(float(np.hypot(*(truth[j] - truth[j - 1]))), abs=0.2)


def test_still_field_estimates_no_drift_and_no_jump():
    rec = _rec("spiral", 0, drift=False, shape=(96, 128, 128))
    est = drift_auto.estimate_coarse_drift(rec.data)
    assert est.reliable and not est.jumps
    assert est.max_shift_px < 0.1  # synthetic truth: no drift at all


def test_moving_bands_without_texture_are_not_taken_for_drift():
    # an exact plane wave (waves.synthetic.planar_wave) has no static texture: no drift to measure
    phase, _ = S.planar_wave((150, 96, 96), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                             period_min=PERIOD, direction_deg=30.0)
    est = drift_auto.estimate_coarse_drift((100 + 50 * np.cos(phase)).astype(np.float32))
    assert not est.reliable


def test_noise_alone_is_not_a_measurable_drift():
    # white noise has no static texture: the frames do not match a reference (common practice, no source)
    rng = np.random.default_rng(3)
    est = drift_auto.estimate_coarse_drift(rng.normal(100.0, 5.0, (40, 96, 96)).astype(np.float32))
    assert not est.reliable
    corrected, reason = drift_auto.decide(est, factor=1, mode="auto")
    assert not corrected and "texture" in reason


def test_covered_map_matches_a_nan_fill_shift():
    # reference: scipy.ndimage.shift with a NaN fill marks what no frame data reaches
    rng = np.random.default_rng(1)
    shifts = np.cumsum(rng.normal(0, 0.4, (30, 2)), axis=0)
    shifts[10:] += (1.2, -0.7)
    shape = (40, 48)
    finite = np.ones(shape, dtype=bool)
    for s in shifts:
        finite &= np.isfinite(ndimage.shift(np.zeros(shape), -s, order=1, mode="constant", cval=np.nan))
    cov = drift_auto.covered_map(shifts, shape)
    assert not (cov & ~finite).any()  # nothing covered that some frame leaves empty
    assert not (ndimage.binary_erosion(finite) & ~cov).any()  # within a pixel of the exact strip
    wider = drift_auto.covered_map(shifts, shape, margin_px=2)
    assert wider.sum() < cov.sum() and not (wider & ~cov).any()
    assert drift_auto.covered_map(None, shape).all()


def test_register_option_values():
    for v in (None, True, False, "auto", "on", "off"):
        AnalysisOptions(register=v)
    with pytest.raises(WavesError, match="register"):
        AnalysisOptions(register="sometimes")
    assert [drift_auto.register_mode(v) for v in (None, True, False)] == ["auto", "on", "off"]


# ----------------------------------------------------------------- whole analyses


def _covered_only(a):
    cov = a.maps["covered"]
    assert cov.dtype == bool and not cov.all()  # the drift left a border strip without data
    for name in ("period_min", "front_speed_um_per_min", "wavelength_um", "direction_deg"):
        assert np.isnan(a.maps[name][~cov]).all(), name
    # territories are a partition of the cell field: the border strip goes to the nearest
    # territory (as the truth's territory areas count it), but nothing is measured there
    assert (a.maps["territory_labels"][~cov] > 0).mean() > 0.9
    grid = a.summary["analysis"]["grid"]

    def on_grid(rec):
        r = int(round((rec["y_um"] - grid["origin_y_um"]) / grid["pixel_size_um"]))
        c = int(round((rec["x_um"] - grid["origin_x_um"]) / grid["pixel_size_um"]))
        return cov[min(max(r, 0), cov.shape[0] - 1), min(max(c, 0), cov.shape[1] - 1)]

    assert all(on_grid(c) for c in a.summary["spiral_cores"] + a.summary["centres"])


def _check_drift_block(a, rec):
    d = a.summary["drift"]
    assert d["estimated"] and d["corrected"]
    assert d["max_shift_px"] == pytest.approx(float(np.abs(rec.truth.drift_px).max()), abs=0.2)
    assert [j["frame"] for j in d["jumps"]] == list(rec.truth.drift_jump_frames)
    tab = a.tables["drift"]
    assert list(tab) == ["frame", "t_min", "dy_px", "dx_px"] and len(tab["frame"]) == rec.data.shape[0]
    assert np.abs(np.stack([tab["dy_px"], tab["dx_px"]], axis=1) - rec.truth.drift_px).max() < 0.2


@pytest.mark.parametrize("seed", SEEDS)
def test_textured_drifting_spiral_is_measured_as_if_still(seed):
    rec = _rec("spiral", seed)
    a = analyse_movie(rec.data, calibration=rec.calibration)
    s = a.summary
    # synthetic truth: one spiral, period 6 min, 100 um/min; cores within max(300 um, wavelength / 4)
    (core,) = s["spiral_cores"]
    assert np.hypot(core["x_um"] - CORE_UM[0], core["y_um"] - CORE_UM[1]) < max(300.0, SPEED * PERIOD / 4)
    assert s["period_min"]["median"] == pytest.approx(PERIOD, rel=0.05)
    assert s["front_speed_um_per_min"]["median"] == pytest.approx(SPEED, rel=0.10)
    assert len(s["centres"]) == 1
    _covered_only(a)
    _check_drift_block(a, rec)


@pytest.mark.parametrize("seed", SEEDS)
def test_textured_drifting_target_is_measured_as_if_still(seed):
    rec = _rec("target", seed)
    a = analyse_movie(rec.data, calibration=rec.calibration)
    s = a.summary
    # synthetic truth: one target centre, no spiral
    assert s["spiral_cores"] == []
    (centre,) = s["centres"]
    assert centre["kind"] == "target"
    assert np.hypot(centre["x_um"] - TARGET_UM[0], centre["y_um"] - TARGET_UM[1]) < max(300.0, SPEED * PERIOD / 4)
    assert s["period_min"]["median"] == pytest.approx(PERIOD, rel=0.05)
    assert s["front_speed_um_per_min"]["median"] == pytest.approx(SPEED, rel=0.10)
    _covered_only(a)
    _check_drift_block(a, rec)


def test_still_field_is_not_corrected_and_not_warned_about():
    rec = _rec("spiral", 1, drift=False)
    a = analyse_movie(rec.data, calibration=rec.calibration)
    d = a.summary["drift"]
    assert d["estimated"] and not d["corrected"] and d["jumps"] == []
    assert d["max_shift_px"] < 0.25  # synthetic truth: 0
    assert a.maps["covered"].all()
    assert not [w for w in a.warnings if "drift" in w]
    assert not [n for n in a.summary["analysis"]["notes"] if "drift" in n]
    assert len(a.summary["spiral_cores"]) == 1


def test_no_register_on_a_drifting_field_warns():
    rec = _rec("spiral", 0)
    try:
        a = analyse_movie(rec.data, calibration=rec.calibration, options=AnalysisOptions(register=False))
    except WavesError:
        return  # uncorrected drift may leave no usable period at all: refused, fine
    assert not a.summary["drift"]["corrected"] and a.summary["drift"]["estimated"]
    assert any("drift" in w for w in a.warnings)


# ----------------------------------------------------------------- the command line


@pytest.mark.slow  # three whole analyses through the CLI and a report: ~25-50 s on a shared machine
def test_cli_register_and_no_register(tmp_path):
    drifting = S.write_recording(_rec("spiral", 2), tmp_path / "drifting.ome.tif")
    still = S.write_recording(_rec("spiral", 2, drift=False), tmp_path / "still.ome.tif")
    out = tmp_path / "off"
    code = main(["analyse", str(drifting), "--out", str(out), "--quiet", "--no-report", "--no-register"])
    assert code in (0, 2)  # uncorrected drift may leave no usable period: refused with exit 2
    if code == 0:
        s = json.loads((out / "summary.json").read_text())
        assert s["drift"]["corrected"] is False and any("drift" in w for w in s["warnings"])
    out = tmp_path / "on"
    assert main(["analyse", str(still), "--out", str(out), "--quiet", "--no-report", "--register"]) == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["drift"]["corrected"] is True and "--register" in s["drift"]["reason"]
    assert (out / "drift.csv").read_text().splitlines()[0] == "frame,t_min,dy_px,dx_px"
    assert (out / "covered.tif").is_file()
    out = tmp_path / "auto"
    assert main(["analyse", str(drifting), "--out", str(out), "--quiet", "--no-report"]) == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["drift"]["corrected"] is True and len(s["spiral_cores"]) == 1  # synthetic truth: one spiral
    # the report shows the drift trace
    html = write_report(out, movie=False).read_text()
    assert 'alt="stage drift"' in html and "sudden jumps (dotted) at frame" in html
    # argparse refuses both at once: exit 2
    assert main(["analyse", str(still), "--register", "--no-register"]) == 2


# ----------------------------------------------------------------- the first look


LOOK_CASES = [(kind, period) for kind in ("target", "spiral") for period in (3.0, 4.5, 6.0, 8.0)]


def _rule_bin(lam_px: float) -> int:
    return max(1, int(lam_px // PIXELS_PER_WAVELENGTH))


def _look(data, cal):
    plan = drift_auto.plan(data, None)
    lag = drift_auto.look_lag_frames((2.0, 20.0), cal.frame_interval_min, data.shape[0])
    return _wavelength_look(data, shifts_px=plan.look_shifts_px, lag_frames=lag)


@pytest.mark.parametrize("textured", [False, True])
@pytest.mark.parametrize(("kind", "period"), LOOK_CASES)
def test_first_look_wavelength_and_bin(kind, period, textured):
    size = 256
    src = ([S.TargetSource(0.45 * size * PX, 0.55 * size * PX, period)] if kind == "target"
           else [S.SpiralSource(0.5 * size * PX, 0.5 * size * PX, period)])
    if textured:
        m = S.synthetic_recording((48, size, size), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                                  sources=src, degradations=_deg(), seed=int(period))
    else:
        m = S.synthetic_movie((48, size, size), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                              sources=src, seed=1)
    lam_true = SPEED * period / PX  # synthetic truth, pixels
    lam = _look(m.data, m.calibration)
    assert lam == pytest.approx(lam_true, rel=0.10)
    assert abs(_rule_bin(lam) - _rule_bin(lam_true)) <= 1
