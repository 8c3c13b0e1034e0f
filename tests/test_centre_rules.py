"""A centre must be a source in view (issue 13): waves entering the view from
outside make no centre on the image edge; a pacemaker on the edge stays.

Truths: synthetic recordings (waves.synthetic_recording) of a plane wave, a
pacemaker beyond the edge and one on it, filmed with issue 12's camera.
"""

from __future__ import annotations

import numpy as np
import pytest
from recording_classes import CAMERA, DT, PX

from waves.analyse import analyse_movie
from waves.analyse.centre_rules import radial_alignment
from waves.render import Degradations
from waves.synthetic import PlanarSource, TargetSource, synthetic_recording

NY, NX = 96, 112


def _summary(sources, seed=0):
    rec = synthetic_recording((200, NY, NX), pixel_size_um=PX, frame_interval_s=DT, speed_um_per_min=150.0,
                              sources=sources, degradations=Degradations(**CAMERA), seed=seed)
    return analyse_movie(rec.data, calibration=rec.calibration, times_s=rec.times_s).summary


def test_radial_alignment_of_exact_fields():
    # closed forms: radial directions from the centre give 1; a plane wave seen from a point
    # on its entry edge, over a half ring, gives the mean of sin over (0, pi): 2 / pi
    rr, cc = np.mgrid[0:81, 0:81].astype(float)
    radial = np.arctan2(-(rr - 40), cc - 40)  # (row, col) step (-sin a, cos a) = outward
    assert radial_alignment(radial, np.ones_like(radial, bool), 40, 40, 20) == pytest.approx(1.0, abs=1e-9)
    plane = np.zeros_like(rr)  # travelling +x, entering at column 0
    al = radial_alignment(plane, np.ones_like(plane, bool), 40, 0, 20)
    assert al == pytest.approx(2 / np.pi, abs=0.03)  # the ring's pixels sample the angles unevenly


@pytest.mark.parametrize("direction", [0.0, 30.0, -120.0])
def test_a_plane_wave_entering_the_view_is_no_centre(direction):
    s = _summary([PlanarSource(direction, 6.0)])
    assert s["centres"] == []
    assert any("enter the view from outside" in r["reason"] for r in s["rejected_centres"])


def test_a_pacemaker_beyond_the_edge_is_no_centre():
    s = _summary([TargetSource(-300.0, 0.5 * NY * PX, 6.0)])
    assert s["centres"] == []


def test_a_pacemaker_on_the_edge_stays_a_centre():
    # within max(300 um, a quarter wavelength) of the truth, issue 12's tolerance
    s = _summary([TargetSource(0.0, 0.5 * NY * PX, 6.0)])
    (c,) = s["centres"]
    assert c["kind"] == "target" and np.hypot(c["x_um"], c["y_um"] - 0.5 * NY * PX) < 300.0
