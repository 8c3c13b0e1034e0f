"""Synthetic recordings: a known wave field filmed the way a real set-up films it.

`synthetic_recording` evaluates the competing sources of `waves.synthetic` on a
canvas larger than the frame (so drift shows texture and waves that continue past
the borders), renders every recorded frame with `waves.degrade_render.RecordingRenderer`
and returns a `Recording`: the camera counts, the calibration, the true acquisition
time of each recorded frame and a `RecordingTruth`, which is the `WaveField` truth
of the sources plus the truth of every degradation.

Coordinates of the truth (cores, territories, cell_mask, mound centres) are those of
the field at zero drift; drift_px[0] is 0, so they are frame 0's coordinates.
Nominal frame i is at t = i * frame_interval_s; `truth.shape_tyx`, `t_min`,
`territory_area_mm2` and `labels_at` refer to the nominal frame grid.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from waves.degrade import Degradations
from waves.degrade_fields import stream_offset_px
from waves.degrade_render import RecordingRenderer
from waves.errors import WavesError
from waves.synthetic import (
    Source,
    WaveField,
    _Evaluator,
    _make_truth,
    _prepare,
    _Territory,
    excitation,
    pulse_exponent,
)
from waves.units import Calibration

__all__ = ["Recording", "RecordingTruth", "synthetic_recording", "write_recording"]

_NONE = Degradations()


@dataclass(frozen=True, eq=False)
class RecordingTruth(WaveField):
    """`WaveField` truth plus the truth of the degradations.

    recorded_frames         (t,) int: nominal frame index of every frame of rec.data.
    times_s                 (t,) float: true acquisition time of every recorded frame.
    drift_px                (t, 2) [row, col] stage shift of each recorded frame: the
                            feature at truth pixel (r, c) appears at (r + dy, c + dx).
    drift_jump_frames       indices into rec.data of the first frame after each jump.
    flicker_frames          indices into rec.data of the flicker frames.
    flicker_gain            (len(flicker_frames),) gain factor of each of them.
    dropped_frames          nominal frame indices that are missing.
    gaps                    [(t_start_min, t_stop_min)] of each run of consecutive missing
                            frames: time of its first missing frame, time of the next
                            recorded frame.
    gain_t                  (t,) global gain (lamp x flicker) of each recorded frame.
    lamp_t                  (t,) lamp fade alone.
    illumination_yx         (y, x) camera-fixed illumination gain.
    cell_mask               (y, x) bool: where cells (and signal) are, truth coordinates.
    speck_mask              (y, x) bool: camera-fixed dust specks (frame coordinates).
    mound_centres_px        (k, 2) [row, col] of the mounds.
    stream_center_px        (row, col) of the stream centre; stream_speed_um_per_min the
                            inflow speed far from it (0: no streaming); stream_core_um.
    territory_area_in_cells_mm2  (nominal t, n_sources) area each source holds inside cell_mask.
    full_scale              counts at full scale (255, 4095 or 65535).
    saturated_fraction      fraction of recorded pixels at full scale.
    """

    recorded_frames: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    times_s: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    drift_px: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    drift_jump_frames: tuple[int, ...] = ()
    flicker_frames: tuple[int, ...] = ()
    flicker_gain: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    dropped_frames: tuple[int, ...] = ()
    gaps: tuple[tuple[float, float], ...] = ()
    gain_t: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    lamp_t: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    illumination_yx: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    cell_mask: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    speck_mask: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    mound_centres_px: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    stream_center_px: tuple[float, float] = (0.0, 0.0)
    stream_speed_um_per_min: float = 0.0
    stream_core_um: float = 0.0
    territory_area_in_cells_mm2: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]
    full_scale: int = 255
    saturated_fraction: float = 0.0

    def stream_offset_px(self, t_min: float) -> np.ndarray:
        """(2, y, x) offset [drow, dcol] from where the texture at each pixel is at
        `t_min` back to where it was at t = 0 (zero where nothing streams)."""
        ny, nx = self.shape_tyx[1:]
        if self.stream_speed_um_per_min <= 0.0:
            return np.zeros((2, ny, nx))
        y, x = np.mgrid[0:ny, 0:nx].astype(np.float64)
        oy, ox = stream_offset_px(
            y, x, float(t_min), center_yx=self.stream_center_px,
            speed_px_per_min=self.stream_speed_um_per_min / self.pixel_size_um,
            core_px=self.stream_core_um / self.pixel_size_um,
        )
        return np.stack([oy, ox])

    def to_dict(self) -> dict:
        out = super().to_dict()
        out.update(
            recorded_frames=int(self.recorded_frames.size),
            dropped_frames=[int(f) for f in self.dropped_frames],
            gaps_min=[[float(a), float(b)] for a, b in self.gaps],
            flicker_frames=[int(f) for f in self.flicker_frames],
            drift_px_max=float(np.abs(self.drift_px).max()) if self.drift_px.size else 0.0,
            cell_fraction=float(self.cell_mask.mean()),
            stream_speed_um_per_min=self.stream_speed_um_per_min,
            full_scale=self.full_scale,
            saturated_fraction=self.saturated_fraction,
        )
        return out


@dataclass(frozen=True, eq=False)
class Recording:
    """A degraded synthetic recording.

    data          (t, y, x) camera counts, uint8 or uint16 (12-bit values when bits=12).
    calibration   pixel size and the nominal frame interval, origin 'simulation'.
    times_s       (t,) true acquisition time of every recorded frame.
    truth         `RecordingTruth`.
    degradations  the `Degradations` used; pulse_width, polarity, seed as given.
    """

    data: np.ndarray = field(repr=False)
    calibration: Calibration
    times_s: np.ndarray = field(repr=False)
    truth: RecordingTruth = field(repr=False)
    degradations: Degradations
    pulse_width: float
    polarity: str
    seed: int


def synthetic_recording(
    shape_tyx: Sequence[int],
    *,
    pixel_size_um: float,
    frame_interval_s: float,
    speed_um_per_min: float,
    sources: Sequence[Source],
    pulse_width: float = 0.5,
    degradations: Degradations = _NONE,
    dtype: str = "uint8",
    polarity: str = "bright",
    background: float = 0.45,
    seed: int = 0,
) -> Recording:
    """Render `shape_tyx` nominal frames of the sources with `degradations`.

    shape_tyx          (nominal frames, rows, columns); dropped frames make rec.data shorter.
    pixel_size_um      micrometres per pixel.
    frame_interval_s   nominal seconds between frames.
    speed_um_per_min   front speed of every wave.
    pulse_width        fraction of the period excited (see `waves.synthetic.excitation`).
    dtype              'uint8' or 'uint16' (Degradations.bits sets 12-bit full scale).
    polarity           'bright' or 'dark' bands (and the sign of the texture modulation).
    background         mean sample level, fraction of full scale.
    seed               every random part (texture, drift, drops, noise) follows from it.
    """
    pulse_exponent(pulse_width)
    shape, cal, speed, srcs, _ = _prepare(shape_tyx, pixel_size_um, frame_interval_s, speed_um_per_min, sources)
    nt, ny, nx = shape
    ren = RecordingRenderer(
        (ny, nx), nt, pixel_size_um=cal.pixel_size_um, frame_interval_s=cal.frame_interval_s,
        degradations=degradations, polarity=polarity, background=background, dtype=dtype, seed=seed,
    )
    m = ren.margin_px
    ev = _Evaluator(
        srcs, (nt,) + ren.canvas_yx, pixel_size_um=cal.pixel_size_um,
        frame_interval_s=cal.frame_interval_s, speed_um_per_min=speed, origin_px=(m, m),
    )
    recorded = ren.recorded
    slot = np.full(nt, -1, dtype=np.int64)
    slot[recorded] = np.arange(recorded.size)
    data = np.empty((recorded.size, ny, nx), dtype=ren.dtype)
    terr = _Territory(shape, len(srcs), cal.pixel_size_um)
    mask = ren.cell_mask()
    in_cells = np.zeros((nt, len(srcs)), dtype=np.float64)
    for start, phase, labels in ev.blocks():
        crop = np.ascontiguousarray(labels[:, m : m + ny, m : m + nx])
        terr.add(start, crop)
        for j in range(crop.shape[0]):
            in_cells[start + j] = np.bincount(crop[j][mask], minlength=len(srcs)) * terr.pixel_area_mm2
        exc = excitation(phase, pulse_width=pulse_width)
        for j in range(exc.shape[0]):
            k = slot[start + j]
            if k >= 0:
                data[k] = ren.frame(exc[j], start + j)
    base = _make_truth(
        srcs, shape, pixel_size_um=cal.pixel_size_um, frame_interval_s=cal.frame_interval_s,
        speed_um_per_min=speed, labels_first=terr.first, labels_last=terr.last, area_mm2=terr.area,
    )
    times_s = recorded * cal.frame_interval_s
    flick = [f for f in sorted(ren.flicker) if slot[f] >= 0]
    dt_min = cal.frame_interval_s / 60.0
    truth = RecordingTruth(
        **{f: getattr(base, f) for f in WaveField.__dataclass_fields__},
        recorded_frames=recorded,
        times_s=times_s,
        drift_px=ren.drift_px[recorded],
        drift_jump_frames=tuple(int(np.searchsorted(recorded, j)) for j in ren.jump_frames),
        flicker_frames=tuple(int(slot[f]) for f in flick),
        flicker_gain=np.array([ren.flicker[f] for f in flick]),
        dropped_frames=tuple(int(f) for f in np.flatnonzero(slot < 0)),
        gaps=tuple((a * dt_min, b * dt_min) for a, b in ren.gaps),
        gain_t=ren.gain[recorded],
        lamp_t=ren.lamp[recorded],
        illumination_yx=ren.illumination,
        cell_mask=mask,
        speck_mask=ren.speck_mask,
        mound_centres_px=ren.mound_centres_px,
        stream_center_px=ren.stream_center_px,
        stream_speed_um_per_min=degradations.stream_speed_um_per_min,
        stream_core_um=degradations.stream_core_um,
        territory_area_in_cells_mm2=in_cells,
        full_scale=ren.full_scale,
        saturated_fraction=float(np.mean(data == ren.full_scale)) if data.size else 0.0,
    )
    for arr in (truth.recorded_frames, truth.times_s, truth.drift_px, truth.gain_t, truth.lamp_t,
                truth.illumination_yx, truth.cell_mask, truth.speck_mask, truth.territory_area_in_cells_mm2):
        arr.flags.writeable = False
    return Recording(
        data=data, calibration=cal, times_s=times_s, truth=truth, degradations=degradations,
        pulse_width=float(pulse_width), polarity=polarity, seed=int(seed),
    )


def write_recording(rec: Recording, path: str | os.PathLike, *, time_increment: bool = False) -> str:
    """Write `rec` as an OME-TIFF (axes TYX) with PhysicalSizeX/Y and one Plane per
    recorded frame whose DeltaT (s) is its true acquisition time.  With
    `time_increment` the nominal frame interval is written as TimeIncrement too (a
    reader that prefers TimeIncrement then ignores the per-plane times).  Written to a
    temporary file and renamed, so a failure leaves no partial file."""
    from waves import io

    if not isinstance(rec, Recording):
        raise WavesError(f"write_recording needs a Recording, got {type(rec).__name__}")
    target = os.fspath(path)
    if not target.lower().endswith((".ome.tif", ".ome.tiff")):
        raise WavesError(f"an OME-TIFF path must end in .ome.tif or .ome.tiff, got {target!r}")
    io.write_ome_stack(target, rec.data, calibration=rec.calibration, times_s=rec.times_s,
                       time_increment=time_increment)
    return target
