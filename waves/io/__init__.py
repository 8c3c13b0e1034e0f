"""Reading and writing time-lapse stacks, maps and small output files.

This package is the only part of waves that touches tifffile.  Everything it
returns is arrays plus metadata: a `Stack` holds the (t, y, x) pixel data, the
`Calibration` (pixel size in um, frame interval in s, and where each came from)
and a `StackInfo` describing the file.

Readable inputs
---------------
* ImageJ TIFF, including hyperstacks with channels (C) or z-slices (Z): pick one
  with ``channel=`` / ``zslice=``; an unselected axis of size > 1 is refused.
  A stack whose only non-spatial axis is labelled Z (ImageJ's default for a
  plain stack) or C is read as a time series, with a warning.
* OME-TIFF, plain multi-page TIFF, BigTIFF, zlib/LZW (any imagecodecs codec)
  compressed TIFF.
* A folder of single-frame TIFFs, or a glob pattern, in natural sort order
  (``frame2`` before ``frame10``).

Data types: uint8, uint16 and float32 are returned as stored.  Other types are
converted to float32 by this rule: int8, int16 and float16 always (exact);
int32, uint32, int64, uint64 when every value has magnitude <= 2**24 (exact),
otherwise refused; float64 always (rounded to float32's 24-bit mantissa, about
7 significant digits).  bool is read as uint8.  RGB/RGBA pixels are converted
to luminance with the ITU-R BT.709 weights Y = 0.2126 R + 0.7152 G + 0.0722 B
applied to the stored values (alpha ignored), as float32.

Calibration comes from ImageJ tags (XResolution/YResolution in pixels per
`unit`, `finterval` in `tunit`, default seconds), from OME-XML
(PhysicalSizeX/Y with their units, TimeIncrement, or the median difference of
per-plane DeltaT), or from the ``pixel_size_um=`` / ``frame_interval_s=``
options, which win.  A value found nowhere raises `CalibrationError` from
`read_stack`; `inspect_stack` records the problem instead.

Writing: calibrated ImageJ TIFFs (axes TYX for stacks, YX for maps, unit um,
finterval in s) with a JSON dict in the ImageJ 'Info' property, always written
atomically (temporary file in the target folder, then ``os.replace``).

The package's modules: `records` (what a read returns), `common` (shared
helpers), `calibration` (ImageJ and OME metadata), `tiff` (one TIFF file),
`sequence` (folders and patterns of frames), `read` (`inspect_stack`,
`read_stack`), `files` (atomic output, JSON, digests), `write` (stacks) and
`maps`.  Import from `waves.io`, not from them.
"""

from __future__ import annotations

#: Stacks larger than this (about 3.9 GB) are written as BigTIFF.
BIGTIFF_THRESHOLD_BYTES = 3_900_000_000

from waves.io.common import BT709_WEIGHTS  # noqa: E402
from waves.io.files import atomic_output, file_sha256, write_json  # noqa: E402
from waves.io.maps import read_map, read_metadata, write_map  # noqa: E402
from waves.io.read import inspect_stack, iter_blocks, read_stack  # noqa: E402
from waves.io.records import MapImage, Stack, StackInfo  # noqa: E402
from waves.io.write import StackWriter, write_ome_stack, write_stack  # noqa: E402

__all__ = [
    "StackInfo",
    "Stack",
    "MapImage",
    "inspect_stack",
    "read_stack",
    "iter_blocks",
    "write_stack",
    "write_ome_stack",
    "write_map",
    "read_map",
    "StackWriter",
    "read_metadata",
    "atomic_output",
    "write_json",
    "file_sha256",
    "BT709_WEIGHTS",
    "BIGTIFF_THRESHOLD_BYTES",
]

