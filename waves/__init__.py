"""waves: relayed signalling waves in excitable media, simulated and measured.

The package keeps four layers apart: compiled kernels, a science core of
functions on arrays, thin I/O (`waves.io`) and the command line (`waves.cli`).
Importing `waves` has no side effects and does not import the heavy modules.
"""

from __future__ import annotations

from waves.errors import (
    CalibrationError,
    InputError,
    SimulationError,
    StabilityError,
    WavesError,
)

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "WavesError",
    "InputError",
    "CalibrationError",
    "StabilityError",
    "SimulationError",
]
