"""The analyser on simulator output: the period it measures on a rendered,
noisy movie after the start-up transient equals the period from threshold
crossings on the clean field (the simulator's truth, waves.simulate, an
independent measurement) within 0.1 %, and it finds the spiral core with the
rotation the simulation was started with."""

import numpy as np
import pytest

from waves.analyse import analyse_movie
from waves.simulate import simulate


@pytest.mark.parametrize("rotation", ["clockwise", "counterclockwise"])
def test_barkley_spiral_period_and_core(rotation):
    run = simulate(
        "barkley",
        size=(160, 160),
        minutes=150.0,
        frame_interval_s=30.0,
        seed=3,
        initial="spiral",
        rotation=rotation,
        render="darkfield",
        progress=False,
    )
    truth_period = run.truth["period_min"]["median"]
    s = analyse_movie(run.frames, calibration=run.calibration).summary
    # like with like: the simulator measures after its start-up transient
    late = [row["period_min"] for row in s["period_timecourse"] if row["t_min"] > run.truth["transient_min"]]
    assert len(late) >= 3
    # achieved 0.022 % (clockwise) and 0.020 % (counterclockwise); a 0.5 % bias fails
    assert np.median(late) == pytest.approx(truth_period, rel=0.001)
    # the whole-movie period includes the start-up transient, which the truth leaves
    # out (+1.76 % measured): a sanity bound, not an accuracy check
    assert s["period_min"]["median"] == pytest.approx(truth_period, rel=0.05)
    rotations = {c["rotation"] for c in s["spiral_cores"]}
    assert rotations == {rotation}


def test_sidecar_truth_holds_clean_field_cores(tmp_path):
    # the sidecar's core truth is measured on the clean field; the rotation
    # must be the one the broken-wave start was given
    import json

    out = tmp_path / "fhn.tif"
    simulate("fhn", out=out, size=(128, 128), minutes=60.0, rotation="clockwise", progress=False)
    truth = json.loads(out.with_suffix(".json").read_text())["truth"]["analysis"]
    assert [c["rotation"] for c in truth["spiral_cores"]] == ["clockwise"]
    assert truth["spiral_cores"][0]["charge"] == 1  # +1 turns clockwise as displayed
