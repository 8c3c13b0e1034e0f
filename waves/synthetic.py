"""Analytic wave fields with known truth, in calibrated units.

Target rings, rotating spirals and plane waves, one or several, are written
down as closed-form phase fields, so every number the analyser should find
(period, speed, wavelength, core positions and charges, rotation sense,
territories) is known exactly by construction.  Frame ``i`` is at
``t_min = i * frame_interval_s / 60``; pixel ``[row, col]`` sits at
``x_um = col * pixel_size_um``, ``y_um = row * pixel_size_um`` (DESIGN.md).

Phase convention
----------------
The wave phase increases in time (d phase/dt = 2 pi / T > 0) and decreases with
distance from a source (waves travel outward).  With omega = 2 pi / T,
k = 2 pi / wavelength, wavelength_um = speed_um_per_min * period_min, and
r the distance from the source:

- target:  phase = omega t - k r + phi0
- spiral with topological charge q = +1 or -1:
           phase = omega t - k r + q * theta_disp + phi0,
  where theta_disp = atan2(-(y - y0), x - x0) is the polar angle counted
  COUNTERCLOCKWISE AS DISPLAYED (row 0 at the top, so y grows downward on the
  screen).  The topological charge is the winding of the phase counted
  counterclockwise as displayed (DESIGN.md), which is q.  Because the phase
  increases in time, a spiral of charge +1 rotates CLOCKWISE as displayed and
  one of charge -1 COUNTERCLOCKWISE (see `rotation_of_charge`).
- plane wave travelling in direction a (degrees counterclockwise from +x as
  displayed, 0 = rightwards, 90 = upwards on the screen):
           phase = omega t - k s + phi0,  s = x cos a - y sin a.

Exactly, a source emits with the phase Phi(t) = 2 pi * integral_0^t dt'/T(t')
and the wave travels at constant speed c, so the phase at distance r is
Phi(t - r/c) (+ q theta_disp + phi0).  For a constant period this is the
formula above.  A drifting period is linear in time, from `period_min` at
t = 0 to `period_end_min` at `drift_end_min` (default: the last frame), and
constant outside that interval (period_min before, period_end_min after);
Phi is integrated in closed form (a logarithm), not summed.  The local period
seen at distance r at time t is T(t - r/c).  Excitation is maximal where the
phase is 0 (mod 2 pi).

Several sources
---------------
In a relay medium the wave that arrives first wins and colliding fronts
annihilate.  Modelled here: at each pixel and time the phase is that of the
source whose unwrapped phase (the expression above, with theta_disp in
(-pi, pi]) is largest; exact ties go to the lower source index.  For equal
periods and offsets of targets this gives Voronoi territories (nearest source
wins); a source of shorter period gradually takes over.  The truth records the
winner map of the first and last frames, the area each source holds in every
frame, and `WaveField.labels_at(index)` recomputes the winner map of any
frame exactly.

Topology forces one caveat: the phase winding around a closed curve equals
the total charge inside, so a spiral whose territory is enclosed by another
source's territory must be accompanied by a compensating singularity on its
territory boundary (where the spiral's branch ray theta_disp = pi, pointing
left on the screen, meets the boundary).  Such boundary defects are not in
`WaveField.cores`.  To avoid them, let each spiral's territory reach the edge
of the field along its leftward ray, or pair spirals of opposite charge.

Two kinds of source have truth beyond a period law: a target whose firing
times are jittered with a known spread (`TargetSource.jitter_min`; the truth's
`firing_times_min`), and a spiral whose core moves on a circle or a line
(`SpiralSource.orbit_radius_um`, `velocity_um_per_min`; the truth's `core_at`).
The sources and their period laws live in `waves.synthetic_sources`.

Returned phases are float32 in (-pi, pi].  The competition is evaluated in
frame blocks by a compiled kernel (`_competition_kernel`) beside a readable
numpy twin (`_Evaluator.block_numpy`); the two are tested against each other.
Moving cores and jittered firing times are evaluated by the numpy twin only.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from waves.errors import WavesError
from waves.render import DarkfieldRenderer, DarkfieldStyle
from waves.synthetic_eval import _BLOCK_ELEMENTS, _Evaluator
from waves.synthetic_sources import (
    PlanarSource,
    Source,
    SpiralSource,
    TargetSource,
    _finite,
    _law_of,
    _positive,
    core_position,
    firing_times_min,
    rotation_of_charge,
    speed_of,
)
from waves.units import Calibration

__all__ = [
    "TargetSource",
    "SpiralSource",
    "PlanarSource",
    "SourceTruth",
    "Core",
    "WaveField",
    "SyntheticMovie",
    "rotation_of_charge",
    "core_position",
    "firing_times_min",
    "pulse_exponent",
    "excitation",
    "phase_field",
    "planar_wave",
    "synthetic_movie",
]

# Degraded recordings (waves.synthetic_recording builds on this module) are reachable
# here too: `from waves.synthetic import synthetic_recording, Recording`.

_RECORDING_NAMES = ("synthetic_recording", "Recording", "RecordingTruth", "write_recording")


def __getattr__(name: str):  # PEP 562: imported on first use, so no import cycle
    if name in _RECORDING_NAMES:
        from waves import synthetic_recording as _rec

        return getattr(_rec, name)
    raise AttributeError(f"module 'waves.synthetic' has no attribute {name!r}")

_DEFAULT_STYLE = DarkfieldStyle()


# ----------------------------------------------------------------------------
# truth


@dataclass(frozen=True)
class Core:
    """A spiral core: position (um), charge and rotation sense as displayed."""

    x_um: float
    y_um: float
    charge: int
    rotation: str
    source_index: int

    def to_dict(self) -> dict:
        return {
            "x_um": self.x_um,
            "y_um": self.y_um,
            "charge": self.charge,
            "rotation": self.rotation,
            "source_index": self.source_index,
        }


@dataclass(frozen=True)
class SourceTruth:
    """What one source is, exactly.

    kind               'target', 'spiral' or 'planar'.
    x_um, y_um         position (None for a plane wave).
    direction_deg      travel direction of a plane wave (None otherwise).
    period_min         period at t = 0 (at the source).
    period_end_min     period at the end of the drift (= period_min if constant).
    drift_end_min      time the drift ends (None if constant).
    charge             +1/-1 for spirals, 0 otherwise.
    rotation           'clockwise'/'counterclockwise' for spirals, None otherwise.
    wavelength_um      speed_um_per_min * period_min.
    wavelength_end_um  speed_um_per_min * period_end_min.
    speed_um_per_min   front speed of this source's waves.
    period_timecourse  ((t_min, period_min), ...) emitted at the source, per frame.
    """

    index: int
    kind: str
    x_um: float | None
    y_um: float | None
    direction_deg: float | None
    period_min: float
    period_end_min: float
    drift_end_min: float | None
    phase0: float
    charge: int
    rotation: str | None
    wavelength_um: float
    wavelength_end_um: float
    period_timecourse: tuple[tuple[float, float], ...]
    speed_um_per_min: float | None = None

    def to_dict(self) -> dict:
        """JSON-friendly record; the period time course is given per frame when
        the period drifts, and by its first and last frame when it is constant."""
        course = self.period_timecourse
        if self.drift_end_min is None:
            course = (course[0], course[-1])
        return {
            "index": self.index,
            "kind": self.kind,
            "x_um": self.x_um,
            "y_um": self.y_um,
            "direction_deg": self.direction_deg,
            "period_min": self.period_min,
            "period_end_min": self.period_end_min,
            "drift_end_min": self.drift_end_min,
            "phase0": self.phase0,
            "charge": self.charge,
            "rotation": self.rotation,
            "wavelength_um": self.wavelength_um,
            "wavelength_end_um": self.wavelength_end_um,
            "speed_um_per_min": self.speed_um_per_min,
            "period_timecourse": [{"t_min": t, "period_min": p} for t, p in course],
        }


@dataclass(frozen=True, eq=False)
class WaveField:
    """Known truth of a synthetic field.

    shape_tyx                  movie shape (frames, rows, columns).
    pixel_size_um              micrometres per pixel.
    frame_interval_s           seconds between frames (frame i at t_min = i * frame_interval_s / 60).
    speed_um_per_min           front speed of every wave.
    sources                    one `SourceTruth` per source, in input order (the label values).
    cores                      one `Core` per spiral (x_um, y_um, charge, rotation), whether or
                               not its core lies inside the field or its own territory.
    labels_first, labels_last  (y, x) int16: index of the winning source in the
                               first and last frame (`labels_at` gives any frame).
    territory_area_mm2         (t, n_sources) float64: area each source holds per frame.
    """

    shape_tyx: tuple[int, int, int]
    pixel_size_um: float
    frame_interval_s: float
    speed_um_per_min: float
    sources: tuple[SourceTruth, ...]
    cores: tuple[Core, ...]
    labels_first: np.ndarray = field(repr=False)
    labels_last: np.ndarray = field(repr=False)
    territory_area_mm2: np.ndarray = field(repr=False)
    _inputs: tuple = field(repr=False, default=())

    @property
    def calibration(self) -> Calibration:
        return Calibration(self.pixel_size_um, self.frame_interval_s, "simulation", "simulation")

    @property
    def t_min(self) -> np.ndarray:
        """Frame times (minutes), float64."""
        return np.arange(self.shape_tyx[0]) * (self.frame_interval_s / 60.0)

    @property
    def period_min(self) -> tuple[float, ...]:
        return tuple(s.period_min for s in self.sources)

    @property
    def wavelength_um(self) -> tuple[float, ...]:
        return tuple(s.wavelength_um for s in self.sources)

    def period_at(self, source_index: int, t_min: np.ndarray | float) -> np.ndarray:
        """Period (min) that source `source_index` emits at time `t_min`.  At
        distance r the local period at time t is ``period_at(i, t - r / speed)``."""
        return _law_of(self._inputs[source_index], self._last_frame_min).period(t_min)

    @property
    def _last_frame_min(self) -> float:
        return (self.shape_tyx[0] - 1) * self.frame_interval_s / 60.0

    def core_at(self, source_index: int, t_min: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
        """(x_um, y_um) of source `source_index`'s core at times `t_min` (its
        path when the core moves; `Core` holds the position at t = 0 of a
        drifting core and the orbit's centre of a meandering one)."""
        return core_position(self._inputs[source_index], t_min)

    def firing_times_min(self, source_index: int) -> np.ndarray:
        """Times (min, from 0 to past the last frame) at which source
        `source_index` fires: phase 0 at the source, the excitation's peak."""
        return firing_times_min(self._inputs[source_index], self._last_frame_min)

    def labels_at(self, index: int) -> np.ndarray:
        """Winning-source map (y, x) int16 of frame `index`, recomputed exactly."""
        if not 0 <= int(index) < self.shape_tyx[0]:
            raise WavesError(f"frame index {index!r} is outside 0..{self.shape_tyx[0] - 1}")
        evaluator = _Evaluator(
            self._inputs,
            self.shape_tyx,
            pixel_size_um=self.pixel_size_um,
            frame_interval_s=self.frame_interval_s,
            speed_um_per_min=self.speed_um_per_min,
        )
        _, labels = evaluator.block(int(index), int(index) + 1)
        return labels[0]

    def to_dict(self) -> dict:
        """JSON-friendly truth (no per-pixel maps)."""
        area = self.territory_area_mm2
        return {
            "shape_tyx": list(self.shape_tyx),
            "pixel_size_um": self.pixel_size_um,
            "frame_interval_s": self.frame_interval_s,
            "speed_um_per_min": self.speed_um_per_min,
            "sources": [s.to_dict() for s in self.sources],
            "spiral_cores": [c.to_dict() for c in self.cores],
            "territory_area_mm2_first": [float(a) for a in area[0]],
            "territory_area_mm2_last": [float(a) for a in area[-1]],
            "phase_convention": (
                "phase = Phi(t - r/c) [+ q*theta_disp] + phi0, Phi(t) = 2 pi int_0^t dt'/T(t'); "
                "theta_disp counterclockwise as displayed (row 0 at top); excitation peaks at phase 0"
            ),
        }


# ----------------------------------------------------------------------------
# evaluation


def _check_shape(shape_tyx: Sequence[int]) -> tuple[int, int, int]:
    try:
        shape = tuple(int(n) for n in shape_tyx)
    except (TypeError, ValueError):
        raise WavesError(f"shape_tyx must be three integers (frames, rows, columns), got {shape_tyx!r}") from None
    if len(shape) != 3 or min(shape) < 1:
        raise WavesError(f"shape_tyx must be three positive integers (frames, rows, columns), got {shape_tyx!r}")
    return shape  # type: ignore[return-value]


def _check_sources(sources: Sequence[Source]) -> tuple[Source, ...]:
    if isinstance(sources, (TargetSource, SpiralSource, PlanarSource)):
        sources = (sources,)
    try:
        out = tuple(sources)
    except TypeError:
        raise WavesError("sources must be a sequence of TargetSource, SpiralSource or PlanarSource") from None
    if not out:
        raise WavesError("sources is empty; give at least one TargetSource, SpiralSource or PlanarSource")
    if len(out) > 32767:
        raise WavesError(f"at most 32767 sources are supported, got {len(out)}")
    for i, s in enumerate(out):
        if not isinstance(s, (TargetSource, SpiralSource, PlanarSource)):
            raise WavesError(
                f"sources[{i}] is a {type(s).__name__}; use TargetSource, SpiralSource or PlanarSource"
            )
    return out


def _make_truth(
    sources: tuple[Source, ...],
    shape_tyx: tuple[int, int, int],
    *,
    pixel_size_um: float,
    frame_interval_s: float,
    speed_um_per_min: float,
    labels_first: np.ndarray,
    labels_last: np.ndarray,
    area_mm2: np.ndarray,
) -> WaveField:
    t_min = np.arange(shape_tyx[0]) * (frame_interval_s / 60.0)
    last = float(t_min[-1])
    truths = []
    cores = []
    for i, s in enumerate(sources):
        law = _law_of(s, last)
        course = tuple((float(t), float(p)) for t, p in zip(t_min, law.period(t_min), strict=True))
        drifting = law.t1 != law.t0
        common = dict(
            index=i,
            period_min=s.period_min,
            period_end_min=law.t1,
            drift_end_min=law.d if drifting else None,
            phase0=s.phase0,
            wavelength_um=speed_of(s, speed_um_per_min) * s.period_min,
            wavelength_end_um=speed_of(s, speed_um_per_min) * law.t1,
            speed_um_per_min=speed_of(s, speed_um_per_min),
            period_timecourse=course,
        )
        if isinstance(s, PlanarSource):
            truths.append(
                SourceTruth(kind="planar", x_um=None, y_um=None, direction_deg=s.direction_deg,
                            charge=0, rotation=None, **common)
            )
        elif isinstance(s, SpiralSource):
            rot = rotation_of_charge(s.charge)
            truths.append(
                SourceTruth(kind="spiral", x_um=s.x_um, y_um=s.y_um, direction_deg=None,
                            charge=s.charge, rotation=rot, **common)
            )
            cores.append(Core(s.x_um, s.y_um, s.charge, rot, i))
        else:
            truths.append(
                SourceTruth(kind="target", x_um=s.x_um, y_um=s.y_um, direction_deg=None,
                            charge=0, rotation=None, **common)
            )
    for arr in (labels_first, labels_last, area_mm2):
        arr.flags.writeable = False
    return WaveField(
        shape_tyx=shape_tyx,
        pixel_size_um=pixel_size_um,
        frame_interval_s=frame_interval_s,
        speed_um_per_min=speed_um_per_min,
        sources=tuple(truths),
        cores=tuple(cores),
        labels_first=labels_first,
        labels_last=labels_last,
        territory_area_mm2=area_mm2,
        _inputs=sources,
    )


def _prepare(shape_tyx, pixel_size_um, frame_interval_s, speed_um_per_min, sources):
    shape = _check_shape(shape_tyx)
    cal = Calibration(pixel_size_um, frame_interval_s, "simulation", "simulation")
    speed = _positive("speed_um_per_min", speed_um_per_min, "micrometres per minute, e.g. 350")
    srcs = _check_sources(sources)
    ev = _Evaluator(
        srcs, shape, pixel_size_um=cal.pixel_size_um, frame_interval_s=cal.frame_interval_s,
        speed_um_per_min=speed,
    )
    return shape, cal, speed, srcs, ev


class _Territory:
    """Accumulates winner maps of the first/last frame and per-frame areas."""

    def __init__(self, shape_tyx: tuple[int, int, int], n_sources: int, pixel_size_um: float) -> None:
        self.nt = shape_tyx[0]
        self.n = n_sources
        self.pixel_area_mm2 = (pixel_size_um / 1000.0) ** 2
        self.area = np.zeros((self.nt, n_sources), dtype=np.float64)
        self.first: np.ndarray | None = None
        self.last: np.ndarray | None = None

    def add(self, start: int, labels: np.ndarray) -> None:
        for j in range(labels.shape[0]):
            counts = np.bincount(labels[j].ravel(), minlength=self.n)
            self.area[start + j] = counts * self.pixel_area_mm2
        if start == 0:
            self.first = labels[0].copy()
        if start + labels.shape[0] == self.nt:
            self.last = labels[-1].copy()


def phase_field(
    shape_tyx: Sequence[int],
    *,
    pixel_size_um: float,
    frame_interval_s: float,
    speed_um_per_min: float,
    sources: Sequence[Source],
) -> tuple[np.ndarray, WaveField]:
    """Phase movie (t, y, x) float32 in (-pi, pi] of competing sources, and its truth.

    pixel_size_um      micrometres per pixel.
    frame_interval_s   seconds between frames.
    speed_um_per_min   front speed of every wave.
    sources            TargetSource / SpiralSource / PlanarSource instances.
    """
    shape, cal, speed, srcs, ev = _prepare(shape_tyx, pixel_size_um, frame_interval_s, speed_um_per_min, sources)
    out = np.empty(shape, dtype=np.float32)
    terr = _Territory(shape, len(srcs), cal.pixel_size_um)
    for start, phase, labels in ev.blocks():
        out[start : start + phase.shape[0]] = phase
        terr.add(start, labels)
    truth = _make_truth(
        srcs, shape, pixel_size_um=cal.pixel_size_um, frame_interval_s=cal.frame_interval_s,
        speed_um_per_min=speed, labels_first=terr.first, labels_last=terr.last, area_mm2=terr.area,
    )
    return out, truth


def planar_wave(
    shape_tyx: Sequence[int],
    *,
    pixel_size_um: float,
    frame_interval_s: float,
    speed_um_per_min: float,
    period_min: float,
    direction_deg: float,
    phase0: float = 0.0,
) -> tuple[np.ndarray, WaveField]:
    """Phase movie of one plane wave travelling in `direction_deg` (degrees
    counterclockwise from +x as displayed) at `speed_um_per_min`; see `phase_field`."""
    return phase_field(
        shape_tyx,
        pixel_size_um=pixel_size_um,
        frame_interval_s=frame_interval_s,
        speed_um_per_min=speed_um_per_min,
        sources=(PlanarSource(direction_deg, period_min, phase0=phase0),),
    )


# ----------------------------------------------------------------------------
# pulse shape


def pulse_exponent(pulse_width: float) -> float:
    """Exponent p of the pulse ((1 + cos phase) / 2) ** p whose excitation
    exceeds 0.5 for exactly the fraction `pulse_width` of each period.

    e > 0.5  <=>  cos(phase) > 2 ** (1 - 1/p) - 1 = cos(pi * pulse_width)
    so p = 1 / (1 - log2(1 + cos(pi * pulse_width))); p = 1 at pulse_width 0.5.
    """
    w = _finite("pulse_width", pulse_width)
    if not 0.0 < w < 1.0:
        raise WavesError(
            f"pulse_width must lie strictly between 0 and 1 (fraction of the period excited; "
            f"0.5 is sinusoidal, 0.1 a narrow pulse), got {pulse_width!r}"
        )
    return 1.0 / (1.0 - math.log2(1.0 + math.cos(math.pi * w)))


def excitation(phase: np.ndarray, *, pulse_width: float = 0.5) -> np.ndarray:
    """Excitation in [0, 1] (float32) from a phase field (radians).

    e = ((1 + cos phase) / 2) ** p with p from `pulse_exponent`: peak 1 at
    phase 0, 0 at phase pi, above 0.5 for the fraction `pulse_width` of each
    period.  pulse_width = 0.5 gives the sinusoid 0.5 + 0.5 cos(phase);
    smaller values give narrow pulses, larger values broad ones.
    """
    p = pulse_exponent(pulse_width)
    ph = np.asarray(phase)
    if not np.issubdtype(ph.dtype, np.floating):
        raise WavesError(f"phase must be a floating-point array (radians), got dtype {ph.dtype}")
    out = np.empty(ph.shape, dtype=np.float32)
    flat_in = ph.reshape(-1)
    flat_out = out.reshape(-1)
    p32 = np.float32(p)
    for start in range(0, flat_in.size, _BLOCK_ELEMENTS):
        stop = min(flat_in.size, start + _BLOCK_ELEMENTS)
        block = flat_out[start:stop]
        np.cos(flat_in[start:stop].astype(np.float32, copy=False), out=block)
        block *= np.float32(0.5)
        block += np.float32(0.5)
        np.clip(block, 0.0, 1.0, out=block)
        if p != 1.0:
            np.power(block, p32, out=block)
    return out


# ----------------------------------------------------------------------------
# movie


@dataclass(frozen=True, eq=False)
class SyntheticMovie:
    """A rendered synthetic movie with its truth.

    data         (t, y, x) uint8 or uint16 camera-like frames.
    calibration  pixel size and frame interval, origin 'simulation'.
    truth        the `WaveField` truth.
    excitation   the clean excitation field (t, y, x) float32, or None unless asked for.
    pulse_width  fraction of the period excited.
    style        the `DarkfieldStyle` used.
    seed         seed of the renderer.
    """

    data: np.ndarray = field(repr=False)
    calibration: Calibration
    truth: WaveField
    excitation: np.ndarray | None = field(repr=False)
    pulse_width: float
    style: DarkfieldStyle
    seed: int


def synthetic_movie(
    shape_tyx: Sequence[int],
    *,
    pixel_size_um: float,
    frame_interval_s: float,
    speed_um_per_min: float,
    sources: Sequence[Source],
    pulse_width: float = 0.5,
    style: DarkfieldStyle = _DEFAULT_STYLE,
    seed: int = 0,
    keep_excitation: bool = False,
) -> SyntheticMovie:
    """Dark-field-like movie of competing sources with known truth.

    The phase is computed in frame blocks, turned into excitation with
    `excitation(phase, pulse_width=...)` and rendered by
    `DarkfieldRenderer(shape_yx, style=style, seed=seed)`, so no movie-sized
    float temporaries are held (unless `keep_excitation`).
    """
    pulse_exponent(pulse_width)  # validates before any work
    shape, cal, speed, srcs, ev = _prepare(shape_tyx, pixel_size_um, frame_interval_s, speed_um_per_min, sources)
    renderer = DarkfieldRenderer(shape[1:], style=style, seed=seed)
    data = np.empty(shape, dtype=style.dtype)
    kept = np.empty(shape, dtype=np.float32) if keep_excitation else None
    terr = _Territory(shape, len(srcs), cal.pixel_size_um)
    for start, phase, labels in ev.blocks():
        exc = excitation(phase, pulse_width=pulse_width)
        for j in range(exc.shape[0]):
            data[start + j] = renderer.frame(exc[j], start + j)
        if kept is not None:
            kept[start : start + exc.shape[0]] = exc
        terr.add(start, labels)
    truth = _make_truth(
        srcs, shape, pixel_size_um=cal.pixel_size_um, frame_interval_s=cal.frame_interval_s,
        speed_um_per_min=speed, labels_first=terr.first, labels_last=terr.last, area_mm2=terr.area,
    )
    return SyntheticMovie(
        data=data, calibration=cal, truth=truth, excitation=kept, pulse_width=float(pulse_width),
        style=style, seed=int(seed),
    )
