"""Records a read returns: `Stack`, `StackInfo`, `MapImage`."""

from __future__ import annotations

from dataclasses import dataclass

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
    """

    data: np.ndarray
    calibration: Calibration
    info: StackInfo
    warnings: tuple[str, ...]
    first_frame: int = 0
    frame_step: int = 1
    bin: int = 1  # noqa: A003 - the name users know from ImageJ

    @property
    def start_min(self) -> float:
        """File time of the first selected frame, in minutes."""
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
        """Time of each frame in minutes, frame 0 at 0 (float64)."""
        return np.arange(self.n_frames, dtype=np.float64) * self.calibration.frame_interval_min

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
