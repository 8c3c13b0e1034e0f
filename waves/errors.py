"""One exception family for everything a user can get wrong.

Every message says what was wrong and how to fix it.  The command line turns a
`WavesError` into one line on stderr and exit code 2; anything else is an
internal error (exit code 1).
"""

from __future__ import annotations

__all__ = [
    "WavesError",
    "InputError",
    "CalibrationError",
    "StabilityError",
    "SimulationError",
]


class WavesError(ValueError):
    """Bad input or usage.  The message names the problem and the fix."""


class InputError(WavesError):
    """A stack or table that cannot be read, or that holds unusable data."""


class CalibrationError(WavesError):
    """Missing, contradictory or unusable pixel size / frame interval."""


class StabilityError(WavesError):
    """A time step or parameter set the explicit scheme cannot integrate."""


class SimulationError(WavesError):
    """A run that went non-finite or otherwise cannot continue."""
