"""Records a read returns: `Stack`, `StackInfo`, `MapImage`."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from waves.units import Calibration


@dataclass(frozen=True)
class StackInfo:
    """What a stack holds, read from its headers (and a scan of float data).

    `shape_tyx` is after channel/z selection, before frame selection and
    binning.  `calibration` is the file's calibration with the user's options
    applied (None when incomplete; `calibration_problem` then says why).
    `analysis_memory_bytes` estimates the working set of a tiled analysis in
    which the raw frames stay memory-mapped:
    ``T * min(64, Y) * min(64, X) * (8 + 3 * 4) + Y * X * 4 * 8`` bytes, i.e.
    one 64 x 64-pixel tile over all T frames as complex64 plus three float32
    arrays, plus eight float32 maps of one frame.
    `times_s` holds the acquisition time of every frame of the file in seconds,
    frame 0 at 0 (float64), and `times_origin` says where they come from:
    'ome', 'micromanager', 'imagej' (the file's per-plane times), 'csv' (the
    ``times_csv=`` option) or 'nominal' (frame number x frame interval; then
    `times_s` is None when the calibration is incomplete).
    """

    path: str
    format: str
    axes: str
    shape_tyx: tuple[int, int, int]
    dtype: str
    nbytes: int
    compression: str
    bigtiff: bool
    memory_mapped: bool
    calibration: Calibration | None
    calibration_problem: str | None
    analysis_memory_bytes: int
    warnings: tuple[str, ...]
    times_origin: str = "nominal"
    times_s: np.ndarray | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True, eq=False)
class Stack:
    """Pixel data (t, y, x) with its calibration.

    `data` is a numpy.memmap for uncompressed contiguous files read without
    binning or conversion, otherwise an in-memory array; its dtype is the
    file's (uint8, uint16, float32) unless binned, RGB or converted (float32).
    `calibration` is after frame-step subsampling and binning; `info`
    describes the whole file.  `first_frame`, `frame_step` and `bin` say how
    the frames were selected and binned: frame i of `data` is file frame
    ``first_frame + i * frame_step``, at ``first_frame * dt`` plus its own
    time (dt the file's frame interval), and binned pixel (r, c) is centred
    on file pixel ``(r * bin + (bin - 1) / 2, c * bin + (bin - 1) / 2)``.
    `times_s` is the acquisition time of each frame of `data` in seconds
    relative to the FIRST FRAME OF THE FILE (so a ``frames=(10, 50)`` selection
    starts at the time of file frame 10), float64, strictly increasing;
    `times_origin` as in `StackInfo`.  With 'nominal' times it is
    ``(first_frame + i * frame_step) * dt``.  The calibration's frame interval
    stays the nominal step (the median recorded step when the times are the
    file's); dropped frames and gaps show as longer steps in `times_s`.
    """

    data: np.ndarray
    calibration: Calibration
    info: StackInfo
    warnings: tuple[str, ...]
    first_frame: int = 0
    frame_step: int = 1
    bin: int = 1  # noqa: A003 - the name users know from ImageJ
    times_s: np.ndarray | None = None
    times_origin: str = "nominal"

    @property
    def start_min(self) -> float:
        """File time of the first selected frame, in minutes."""
        if self.times_s is not None:
            return float(self.times_s[0]) / 60.0
        return self.first_frame * self.calibration.frame_interval_min / self.frame_step

    @property
    def origin_um(self) -> float:
        """File position (um, x and y alike) of the centre of pixel (0, 0) of `data`."""
        return 0.5 * (self.bin - 1) * self.calibration.pixel_size_um / self.bin

    @property
    def n_frames(self) -> int:
        return int(self.data.shape[0])

    @property
    def shape_tyx(self) -> tuple[int, int, int]:
        t, y, x = self.data.shape
        return int(t), int(y), int(x)

    @property
    def duration_min(self) -> float:
        """Time covered by the frames: n_frames x frame interval, in minutes."""
        return self.n_frames * self.calibration.frame_interval_min

    @property
    def times_min(self) -> np.ndarray:
        """Time of each frame in minutes, frame 0 of `data` at 0 (float64): the
        recorded times when the file or a CSV gives them, else nominal."""
        if self.times_s is not None:
            return (np.asarray(self.times_s, dtype=np.float64) - float(self.times_s[0])) / 60.0
        return np.arange(self.n_frames, dtype=np.float64) * self.calibration.frame_interval_min

    @property
    def regular_times(self) -> bool:
        """True when every step of `times_s` is within 5 % of the frame interval."""
        if self.times_s is None or self.n_frames < 2:
            return True
        steps = np.diff(np.asarray(self.times_s, dtype=np.float64))
        dt = self.calibration.frame_interval_s
        return bool(np.all(np.abs(steps - dt) <= 0.05 * dt))

    @property
    def extent_um(self) -> tuple[float, float]:
        """Field size (height_um, width_um) = (rows, cols) x pixel size."""
        _, ny, nx = self.shape_tyx
        px = self.calibration.pixel_size_um
        return ny * px, nx * px


@dataclass(frozen=True, eq=False)
class MapImage:
    """A 2-D map read back by `read_map`: data (y, x), pixel size in um (None
    when the file has none) and the JSON metadata dict."""

    data: np.ndarray
    pixel_size_um: float | None
    metadata: dict
