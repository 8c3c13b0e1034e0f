"""Issue 12's acceptance checks: every class of real-recording degradation, at two
strengths and two seeds, on a spiral-and-target field of known truth, analysed
from an OME-TIFF with per-plane times through `analyse_file` as a user would.

Truths: the synthetic recording's (tests/recording_classes.py); tolerances are
the issue's (period 5 %, speed 10 %, exact spiral and centre counts, cores and
centres within max(300 um, a quarter wavelength), territories 15 %)."""

from __future__ import annotations

import warnings

import pytest
from recording_classes import errors, failures, recording, variants

from waves.result import analyse_file
from waves.synthetic import write_recording

# Known misses, kept visible (strict: they fail the suite the day they pass, so the
# marker goes).  None now.  All degradations at once used to give a period of +93 %
# and 163 cores, then (seeds 0-2) an extra core on a dim dish edge taken for cells, a
# fade left in and a 15-min "period" from slowly changing texture; measured after the
# fixes (seeds 0-2): period -0.8 .. +0.3 %, speed -2.9 .. -1.0 %, one core, two centres,
# cores within 39 um, territories within 9.9 %.
KNOWN_MISSES: set = set()


def _cases():
    for cls, variant in variants():
        marks = [pytest.mark.xfail(strict=True, reason="known miss, issue 12 notes")] if (cls, variant) in KNOWN_MISSES else []
        yield pytest.param(cls, variant, marks=marks, id=f"{cls}-{variant}")


@pytest.mark.slow
@pytest.mark.parametrize("seed", [1, 2])
@pytest.mark.parametrize(("cls", "variant"), list(_cases()))
def test_degraded_recording_meets_the_issue_tolerances(cls, variant, seed, tmp_path):
    rec = recording(cls, variant, seed)
    path = write_recording(rec, tmp_path / "rec.ome.tif")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # analysis warnings go into the summary
        a = analyse_file(path)
    e = errors(a, rec.truth)
    assert not failures(e), (cls, variant, seed, e)
    rec_block = a.summary["recording"]
    if rec.truth.flicker_frames and not rec.truth.dropped_frames:
        # flicker frames left out of the measurements, exactly those (synthetic truth)
        assert set(rec.truth.flicker_frames) <= set(rec_block["excluded_frames"])
    if rec.truth.dropped_frames:
        assert rec_block["dropped_frames"] == sorted(rec.truth.dropped_frames)  # synthetic truth


def test_a_clean_field_meets_them_too(tmp_path):
    # the same field with only the camera (texture, noise, 8 bits): the reference case
    from recording_classes import CAMERA, DT, PX, SHAPE, SPEED, sources

    from waves.render import Degradations
    from waves.synthetic import synthetic_recording

    rec = synthetic_recording(SHAPE, pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=SPEED,
                              sources=sources(), degradations=Degradations(**CAMERA), seed=3)
    a = analyse_file(write_recording(rec, tmp_path / "clean.ome.tif"))
    e = errors(a, rec.truth)
    assert not failures(e), e
    # tighter on a clean field: the period is exact to the frame resolution (synthetic truth)
    assert abs(e["period_rel"]) < 0.01 and abs(e["speed_rel"]) < 0.03
