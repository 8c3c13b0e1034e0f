"""Regenerate samples/synthetic_spiral_target.tif and its truth sidecar.

    python samples/make_synthetic_sample.py            (from the repository root)

A small calibrated dark-field-like movie with known truth: one clockwise
spiral (charge +1) and one target pacemaker competing in a relay medium, made
with `waves.synthetic.synthetic_movie`.  Every number below is invented for a
demo; they are only chosen to be plausible for an aggregating field (pixel
size 10-20 um, frames every 20-30 s, period 6-8 min, speed 300-400 um/min).
With a fixed seed the output is the same bit for bit on every run.

Writes (atomically):
  samples/synthetic_spiral_target.tif         uint8 (t, y, x), ImageJ calibration,
                                              truth dict in the metadata
  samples/synthetic_spiral_target.truth.json  the same truth, plus the
                                              territory label maps of the first
                                              and last frames (one digit string
                                              per image row)
"""

from __future__ import annotations

import argparse
import pathlib
import sys

HERE = pathlib.Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # run from a checkout without installing

from waves import io  # noqa: E402
from waves.render import DarkfieldStyle  # noqa: E402
from waves.synthetic import SpiralSource, TargetSource, synthetic_movie  # noqa: E402

NAME = "synthetic_spiral_target"

# invented demo values (see the module docstring)
SHAPE_TYX = (150, 160, 160)  # 75 min of a 3.2 mm x 3.2 mm field
PIXEL_SIZE_UM = 20.0
FRAME_INTERVAL_S = 30.0
SPEED_UM_PER_MIN = 320.0
SOURCES = (
    # spiral core left of centre; its leftward branch ray runs to the field
    # edge inside its own territory, so no boundary defect appears
    SpiralSource(1130.0, 1730.0, 6.0, charge=1),
    # slightly slower target pacemaker in the upper right; the spiral slowly
    # takes over (its territory shrinks from about 3.7 to 1.0 mm^2)
    TargetSource(2530.0, 770.0, 6.3),
)
PULSE_WIDTH = 0.3
# every style field spelled out, so a change of defaults does not change the sample
STYLE = DarkfieldStyle(
    polarity="bright",
    contrast=0.25,
    background=0.45,
    texture=0.15,
    texture_scale_px=1.5,
    illumination=0.15,
    drift=0.05,
    drift_period_frames=400.0,
    noise=0.015,
    dtype="uint8",
)
SEED = 20240611


def build() -> tuple:
    movie = synthetic_movie(
        SHAPE_TYX,
        pixel_size_um=PIXEL_SIZE_UM,
        frame_interval_s=FRAME_INTERVAL_S,
        speed_um_per_min=SPEED_UM_PER_MIN,
        sources=SOURCES,
        pulse_width=PULSE_WIDTH,
        style=STYLE,
        seed=SEED,
    )
    truth = movie.truth.to_dict()
    truth["note"] = "synthetic demo: every number is invented, not a measurement"
    truth["generator"] = "samples/make_synthetic_sample.py (waves.synthetic.synthetic_movie)"
    truth["pulse_width"] = PULSE_WIDTH
    truth["render_seed"] = SEED
    truth["style"] = {
        "polarity": STYLE.polarity,
        "contrast": STYLE.contrast,
        "background": STYLE.background,
        "texture": STYLE.texture,
        "texture_scale_px": STYLE.texture_scale_px,
        "illumination": STYLE.illumination,
        "drift": STYLE.drift,
        "drift_period_frames": STYLE.drift_period_frames,
        "noise": STYLE.noise,
        "dtype": STYLE.dtype,
    }
    return movie, truth


def label_rows(labels) -> list[str]:
    """A (y, x) label map of fewer than 10 sources as one digit string per row."""
    return ["".join(str(int(v)) for v in row) for row in labels]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out-dir", default=str(HERE), help="folder to write into (default: samples/)")
    args = parser.parse_args(argv)
    out = pathlib.Path(args.out_dir)
    movie, truth = build()
    tif = io.write_stack(
        out / f"{NAME}.tif", movie.data, calibration=movie.calibration, metadata=truth, compression="zlib"
    )
    sidecar = dict(truth)
    sidecar["territory_labels_format"] = (
        "one string per image row (row 0 first); character c of a row is the index of the "
        "source winning at pixel (row, c)"
    )
    sidecar["territory_labels_first"] = label_rows(movie.truth.labels_first)
    sidecar["territory_labels_last"] = label_rows(movie.truth.labels_last)
    js = io.write_json(out / f"{NAME}.truth.json", sidecar)
    print(f"wrote {tif} ({tif.stat().st_size / 1e6:.2f} MB) and {js}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
